"""Write the seed corpus of the fuzz targets: small valid files of every kind, in both input modes.

Run from the repository root with the package installed:
``.venv/bin/python fuzz/make_seeds.py`` (writes fuzz/seeds/decode and fuzz/seeds/counts).
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pyarrow as pa
import treewise
from treewise import _core

HEADER = 28
KINDS = {"model": 1, "stats": 2, "tallies": 3, "codebook": 4}


def tables() -> dict[str, pa.Table]:
    """A few small tables covering every value family, nulls, caps and bins."""
    rng = np.random.default_rng(3)
    n = 60
    a = rng.integers(0, 4, n)
    return {
        "mixed": pa.table(
            {
                "i": pa.array(a, pa.int16()),
                "s": pa.array([None if k == 3 else f"v{k}" for k in (a + rng.integers(0, 2, n))]),
                "f": pa.array(np.where(a == 0, np.nan, a * 1.5 + rng.random(n))),
                "b": pa.array(a % 2 == 0),
                "u": pa.array(rng.integers(0, 3, n), pa.uint8()),
            }
        ),
        # Strings past max_categories: an "other" code with a tail table behind it.
        "capped": pa.table(
            {"c": pa.array([f"c{k}" for k in rng.integers(0, 40, n)]), "d": pa.array(a)}
        ),
        # Numbers with many values (bins with the values inside them), times, infinities, NaN.
        "numeric": pa.table(
            {
                "w": pa.array(rng.integers(0, 500, n)),
                "t": pa.array(rng.integers(0, 10**6, n)).cast(pa.timestamp("s", tz="UTC")),
                "x": pa.array(np.where(a == 1, np.inf, np.where(a == 2, np.nan, rng.random(n)))),
            }
        ),
        "one": pa.table({"x": pa.array(["only"] * 5)}),
        "dict": pa.table({"k": pa.array(["p", "q", "p", None]).dictionary_encode()}),
    }


def main() -> None:
    """Write every seed file."""
    root = Path(__file__).parent / "seeds"
    decode, counts = root / "decode", root / "counts"
    decode.mkdir(parents=True, exist_ok=True)
    counts.mkdir(parents=True, exist_ok=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for name, table in tables().items():
            model = treewise.DependencyTree(max_categories=8).fit(table)
            builder = _core.CodebookBuilder(table.column_names)
            builder.observe(table.to_batches()[0])
            files = {
                "model": model._fitted().to_bytes(),
                "stats": treewise.PairStats.from_source(table, model.codebook_).to_bytes(),
                "tallies": builder.to_bytes(),
                "codebook": model.codebook_.to_bytes(),
            }
            for kind, data in files.items():
                # Mode 0: a whole file. Mode 4 + kind - 1: the payload, re-signed by the target.
                (decode / f"{name}-{kind}-file").write_bytes(b"\x00" + data)
                mode = bytes([4 + KINDS[kind] - 1])
                (decode / f"{name}-{kind}-payload").write_bytes(mode + data[HEADER:])
        # A private model: its file ends in the privacy statement (model file field 9).
        private = treewise.DependencyTree(
            epsilon=1.0, delta=1e-6, domains={"f": (0.0, 10.0)}, random_state=0
        ).fit(tables()["mixed"])
        data = private._fitted().to_bytes()
        (decode / "private-model-file").write_bytes(b"\x00" + data)
        (decode / "private-model-payload").write_bytes(bytes([4]) + data[HEADER:])
    rng = np.random.default_rng(5)
    # Repeat bytes (see counts.rs): rows as given, tiled 4 times, and tiled 64 and 512 times
    # (160 rows x 512 = past the 70,000-row cap), so the block boundaries are in the seeds.
    for k, (d, repeat) in enumerate(((1, 0), (2, 3), (3, 0xE0), (5, 0xE7))):
        # Per column a cardinality selector and a mode; with 3 or more columns, selectors below
        # 0x80 (at most 16 codes) keep the tables within the target's cell limit.
        top = 256 if d < 3 else 128
        pairs = zip(rng.integers(0, top, d), rng.integers(0, 256, d), strict=True)
        head = bytes([d - 1]) + bytes(int(x) for pair in pairs for x in pair)
        body = bytes(int(x) for x in rng.integers(0, 256, 160 * d))
        # Kernel and batching byte 3k + 1: four kernels, and every way of batching.
        (counts / f"seed-{k}").write_bytes(head + bytes([repeat, 3 * k + 1, 100 + k]) + body)


if __name__ == "__main__":
    main()
