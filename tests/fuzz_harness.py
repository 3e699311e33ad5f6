"""Atheris fuzzing of the Python surface: loading model files, and fitting small odd tables.

Run a campaign from the repository root (libFuzzer flags after the target name), or with
``make fuzz`` / ``fuzz/run.sh SECONDS load fit`` (which keep a corpus in fuzz/corpus/):

    .venv/bin/python tests/fuzz_harness.py load -max_total_time=300
    .venv/bin/python tests/fuzz_harness.py fit -max_total_time=300

- ``load``: ``treewise.load`` on arbitrary bytes, or on a valid model file with fuzzed edits and
  a re-signed header (so edits get past the checksum), may only raise ``CorruptModelError``. A
  file it accepts must score, sample and save back to the same bytes.
- ``fit``: ``DependencyTree.fit`` on a small Arrow table built from the fuzz bytes (every
  supported type and some unsupported ones, nulls, NaN, infinities, odd names) with valid
  parameters may only raise ``TreewiseError`` subclasses. A fitted model must score its own data
  to finite numbers (or -inf with alpha=0), sample, and save and load back to the same bytes.

Anything else (another exception, a crash, a hang) is a finding. ``pytest tests/fuzz_harness.py``
runs each target for a few hundred inputs in a child process, as a smoke test.
"""

from __future__ import annotations

import math
import struct
import subprocess
import sys
import tempfile
import warnings
import zlib
from pathlib import Path
from typing import Any

import pytest

HEADER = 28
SMOKE_RUNS = 300

#: Warnings treewise gives on purpose for odd but valid data.
EXPECTED_WARNINGS = (
    "CategoryCapWarning",
    "ColumnKindWarning",
    "UnseenCategoryWarning",
    "SkippedFileWarning",
)


# -- building inputs from fuzz bytes -------------------------------------------------------------


def _column(fdp: Any, n: int) -> Any:
    """One column of ``n`` rows of a type picked by the fuzzer."""
    import numpy as np
    import pyarrow as pa

    kind = fdp.ConsumeIntInRange(0, 12)
    valid = [fdp.ConsumeProbability() > 0.2 for _ in range(n)]
    mask = np.array([not v for v in valid], dtype=bool)
    if kind <= 2:  # integers of three widths
        types = [pa.int8(), pa.int64(), pa.uint32()]
        low, high = [(-128, 127), (-(2**63), 2**63 - 1), (0, 2**32 - 1)][kind]
        small = fdp.ConsumeBool()
        values = [
            fdp.ConsumeIntInRange(low, high) if not small else fdp.ConsumeIntInRange(0, 3)
            for _ in range(n)
        ]
        return pa.array(values, types[kind], mask=mask)
    if kind == 3:
        return pa.array([fdp.ConsumeBool() for _ in range(n)], pa.bool_(), mask=mask)
    if kind in (4, 5, 6):  # strings: plain, large, dictionary
        values = [fdp.ConsumeUnicodeNoSurrogates(3) for _ in range(n)]
        array = pa.array([v if ok else None for v, ok in zip(values, valid, strict=True)])
        if kind == 5:
            return array.cast(pa.large_string())
        return array.dictionary_encode() if kind == 6 else array
    if kind in (7, 8):  # floats with NaN, infinities and repeats
        specials = [math.nan, math.inf, -math.inf, 0.0, -0.0, 1e308, 5e-324]
        values = [
            fdp.PickValueInList(specials)
            if fdp.ConsumeProbability() < 0.15
            else float(fdp.ConsumeIntInRange(-3, 3)) / 2
            if fdp.ConsumeBool()
            else fdp.ConsumeRegularFloat()
            for _ in range(n)
        ]
        return pa.array(values, pa.float64() if kind == 7 else pa.float32(), mask=mask)
    if kind == 9:
        return pa.nulls(n)
    if kind == 10:  # unsupported: binary
        return pa.array([fdp.ConsumeBytes(2) for _ in range(n)], pa.binary())
    if kind == 11:  # a time column (supported since column kinds)
        return pa.array([fdp.ConsumeIntInRange(0, 10) for _ in range(n)], pa.timestamp("s"))
    return pa.array([[fdp.ConsumeIntInRange(0, 2)] for _ in range(n)])  # unsupported: list


def _table(fdp: Any) -> Any:
    import pyarrow as pa

    d = fdp.ConsumeIntInRange(1, 4)
    n = fdp.ConsumeIntInRange(0, 24)
    names = []
    for k in range(d):
        if fdp.ConsumeProbability() < 0.1:
            names.append(fdp.ConsumeUnicodeNoSurrogates(2))  # odd names: empty, repeated, NUL
        else:
            names.append(f"c{k}")
    return pa.Table.from_arrays([_column(fdp, n) for _ in range(d)], names=names)


def _resign(valid: bytes, payload: bytes) -> bytes:
    header = bytearray(valid[:HEADER])
    struct.pack_into("<Q", header, 16, len(payload))
    struct.pack_into("<I", header, 24, zlib.crc32(payload))
    return bytes(header) + payload


# -- the targets ---------------------------------------------------------------------------------


class Targets:
    """The fuzz targets, with what they need imported once (under atheris' instrumentation)."""

    def __init__(self) -> None:
        import numpy as np
        import pyarrow as pa
        import treewise
        import treewise.sources

        self.np, self.pa, self.treewise = np, pa, treewise
        self.warnings = {
            "CategoryCapWarning": treewise.CategoryCapWarning,
            "ColumnKindWarning": treewise.ColumnKindWarning,
            "UnseenCategoryWarning": treewise.UnseenCategoryWarning,
            "SkippedFileWarning": treewise.sources.SkippedFileWarning,
        }
        self.folder = Path(tempfile.mkdtemp(prefix="treewise-fuzz-"))
        rng = np.random.default_rng(0)
        z = rng.integers(0, 3, 40)
        seed_table = pa.table(
            {
                "i": pa.array(z, pa.int16()),
                "s": pa.array([None if k == 2 else f"v{k}" for k in (z + rng.integers(0, 2, 40))]),
                "f": pa.array(np.where(z == 0, np.nan, z + rng.random(40))),
                "b": pa.array(z == 1),
            }
        )
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            model = treewise.DependencyTree(max_categories=4, n_bins=3).fit(seed_table)
        model.save(self.folder / "valid.treewise")
        self.valid = (self.folder / "valid.treewise").read_bytes()

    def load(self, data: bytes) -> None:
        import atheris

        fdp = atheris.FuzzedDataProvider(data)
        if fdp.ConsumeBool():
            payload = bytearray(self.valid[HEADER:])
            for _ in range(fdp.ConsumeIntInRange(1, 4)):
                at = fdp.ConsumeIntInRange(0, max(len(payload) - 1, 0))
                edit = fdp.ConsumeIntInRange(0, 2)
                chunk = fdp.ConsumeBytes(fdp.ConsumeIntInRange(1, 8))
                if edit == 0:
                    payload[at : at + len(chunk)] = chunk  # overwrite
                elif edit == 1:
                    payload[at:at] = chunk  # insert
                else:
                    del payload[at : at + len(chunk)]  # delete
            file = _resign(self.valid, bytes(payload))
        else:
            file = fdp.ConsumeBytes(fdp.remaining_bytes())
        path = self.folder / "input.treewise"
        path.write_bytes(file)
        try:
            model = self.treewise.load(path)
        except self.treewise.CorruptModelError:
            return
        self._check_model(model)

    def fit(self, data: bytes) -> None:
        import atheris

        fdp = atheris.FuzzedDataProvider(data)
        table = _table(fdp)
        params = {
            "max_categories": fdp.ConsumeIntInRange(2, 6),
            "n_bins": fdp.ConsumeIntInRange(1, 4),
            "alpha": fdp.PickValueInList([0.0, 0.5, 1.0, 1e-9]),
            "prune": fdp.PickValueInList([None, "bic", 0.05]),
        }
        try:
            model = self.treewise.DependencyTree(**params).fit(table)
        except self.treewise.TreewiseError:
            return
        self._check_model(model, table)

    def _check_model(self, model: Any, table: Any = None) -> None:
        np = self.np
        if table is not None:
            scores = model.score_samples(table)
            assert len(scores) == table.num_rows
            bad = np.isnan(scores) | (scores > 1e-9)
            if model.alpha > 0:
                bad |= ~np.isfinite(scores)
            assert not bad.any(), f"impossible log-probabilities {scores[bad]}"
        drawn = model.sample(7, random_state=3)
        assert drawn.num_rows == 7
        again = model.score_samples(drawn)
        assert not np.isnan(again).any()
        first = self.folder / "first.treewise"
        second = self.folder / "second.treewise"
        model.save(first)
        self.treewise.load(first).save(second)
        assert first.read_bytes() == second.read_bytes(), "save-load-save changed the bytes"


def main(argv: list[str]) -> None:
    """``fuzz_harness.py TARGET [libFuzzer flags]``: fuzz one target."""
    import atheris

    if len(argv) < 2 or argv[1] not in ("load", "fit"):
        raise SystemExit("usage: fuzz_harness.py {load,fit} [libFuzzer flags]")
    with atheris.instrument_imports(include=["treewise"]):
        targets = Targets()
    # Any warning is a finding, except those treewise gives on purpose for odd but valid data.
    warnings.simplefilter("error")
    for name in EXPECTED_WARNINGS:
        warnings.filterwarnings("ignore", category=targets.warnings[name])
    atheris.Setup([argv[0], *argv[2:]], getattr(targets, argv[1]))
    atheris.Fuzz()


# -- the smoke test ------------------------------------------------------------------------------


@pytest.mark.parametrize("target", ["load", "fit"])
def test_fuzz_smoke(target: str, tmp_path: Path) -> None:
    pytest.importorskip(
        "atheris", reason="atheris is not installed (pip install atheris); fuzzing skipped"
    )
    done = subprocess.run(
        [
            sys.executable,
            __file__,
            target,
            f"-runs={SMOKE_RUNS}",
            "-seed=1",
            f"-artifact_prefix={tmp_path}/",
        ],
        capture_output=True,
        text=True,
        timeout=300,
        cwd=tmp_path,
    )
    assert done.returncode == 0, done.stderr[-4000:]
    assert f"Done {SMOKE_RUNS} runs" in done.stderr


if __name__ == "__main__":
    main(sys.argv)
