"""memory_limit: the size parser, the machine's memory, and the refusals before allocating."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import treewise
from treewise.checks import check_memory_limit
from treewise.errors import MemoryLimitError, ResourceLimitError
from treewise.memory import DEFAULT_SHARE, machine_memory, parse_size

GIB = 1024**3


# -- the parser ------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        # Decimal and binary prefixes as IEC 80000-13 defines them (k = 10^3, Ki = 2^10).
        ("4GiB", 4 * 2**30),
        ("4 gib", 4 * 2**30),
        ("500MB", 500 * 10**6),
        ("500M", 500 * 10**6),
        ("1.5GiB", 3 * 2**29),
        ("2TB", 2 * 10**12),
        ("64KiB", 64 * 1024),
        ("12345", 12345),
        ("12345B", 12345),
        ("50%", 500),
        ("100%", 1000),
        ("0.5%", 5),
    ],
)
def test_sizes_are_read_in_their_units(text: str, expected: int) -> None:
    assert parse_size(text, whole=1000) == expected


@pytest.mark.parametrize("text", ["", "GiB", "4 gigs", "-1GB", "4GiB5", "0%", "150%", "1e9", "%"])
def test_other_sizes_are_refused(text: str) -> None:
    with pytest.raises(ValueError, match=r"size|share"):
        parse_size(text, whole=1000)


def test_a_share_needs_the_machines_memory() -> None:
    with pytest.raises(ValueError, match="cannot be read"):
        parse_size("50%", whole=None)


def test_check_memory_limit_takes_bytes_sizes_and_shares() -> None:
    assert check_memory_limit(123_456) == 123_456
    assert check_memory_limit("4GiB") == 4 * GIB
    whole = machine_memory()
    assert whole is not None
    assert check_memory_limit(None) == int(whole * DEFAULT_SHARE)
    assert check_memory_limit("25%") == int(whole * 25 / 100)
    for bad in (0, -5):
        with pytest.raises(ValueError, match="at least one byte"):
            check_memory_limit(bad)
    for wrong in (True, 1.5, [1]):
        with pytest.raises(TypeError, match="memory_limit"):
            check_memory_limit(wrong)


def test_machine_memory_is_the_kernels_total_or_the_cgroup_limit() -> None:
    """Against /proc/meminfo's MemTotal (the Linux kernel's own report, in KiB; proc(5)) and
    the cgroup v2 file memory.max (a byte count or "max"; the kernel's cgroup-v2 docs)."""
    meminfo = Path("/proc/meminfo")
    if not meminfo.exists():
        pytest.skip("no /proc/meminfo on this system")
    total = next(
        int(line.split()[1]) * 1024
        for line in meminfo.read_text().splitlines()
        if line.startswith("MemTotal:")
    )
    cgroup = Path("/sys/fs/cgroup/memory.max")
    text = cgroup.read_text().strip() if cgroup.exists() else "max"
    expected = min(total, int(text)) if text.isdigit() else total
    assert machine_memory() == expected


# -- refusals --------------------------------------------------------------------------------------


def table_2_3_4() -> pa.Table:
    """Three columns with 2, 3 and 4 values and no nulls: cardinalities 2, 3 and 4."""
    rows = 24
    return pa.table(
        {
            "a": pa.array([k % 2 for k in range(rows)], pa.int8()),
            "b": pa.array([k % 3 for k in range(rows)], pa.int8()),
            "c": pa.array([k % 4 for k in range(rows)], pa.int8()),
        }
    )


def test_a_fit_past_the_limit_says_what_needs_how_much() -> None:
    table = table_2_3_4()
    assert treewise.DependencyTree().fit(table).codebook_.cardinalities == [2, 3, 4]
    model = treewise.DependencyTree(memory_limit=1000)
    with pytest.raises(MemoryLimitError) as caught:
        model.fit(table)
    message = str(caught.value)
    # Tables 2x3 + 2x4 + 3x4 = 26 cells, 2 + 3 + 4 marginal counts, 4 table offsets: u64 each.
    assert f"pair statistics {(26 + 9 + 4) * 8} bytes" in message
    assert "memory limit of 1000 bytes" in message
    for advice in ("memory_limit", "max_categories", "n_bins", "columns=", "kinds="):
        assert advice in message
    assert isinstance(caught.value, ResourceLimitError)
    assert isinstance(caught.value, MemoryError)
    # The same fit under a limit it fits in.
    assert treewise.DependencyTree(memory_limit="1GiB").fit(table).n_rows_ == 24


def test_the_classifier_shares_its_limit() -> None:
    table = table_2_3_4()
    with pytest.raises(MemoryLimitError, match="pair statistics"):
        treewise.TreeAugmentedClassifier(memory_limit="1KiB").fit(table, np.arange(24) % 2)


def test_sampling_past_the_limit_is_refused_before_drawing() -> None:
    model = treewise.DependencyTree().fit(table_2_3_4())
    model.set_params(memory_limit=1000)
    # Three u16 codes per row (1,200 bytes = 1.2 KiB), held twice (the rows and their copy
    # for Python).
    expected = r"sampling 200 rows needs about 2\.3 KiB \(sampled rows 1\.2 KiB, their copy"
    with pytest.raises(MemoryLimitError, match=expected):
        model.sample(200, random_state=0)
    assert model.sample(50, random_state=0).num_rows == 50


def test_the_cli_takes_memory_limit(tmp_path: Path) -> None:
    data = tmp_path / "t.parquet"
    pq.write_table(table_2_3_4(), data)

    def run(*args: str) -> subprocess.CompletedProcess[str]:
        return subprocess.run(
            [sys.executable, "-m", "treewise.cli", *args],
            capture_output=True,
            text=True,
            check=False,
            timeout=120,
        )

    out = str(tmp_path / "m.treewise")
    refused = run("fit", str(data), "-o", out, "--memory-limit", "1kB")
    assert refused.returncode == 1, refused.stderr
    assert "memory limit of 1000 bytes" in refused.stderr
    assert not Path(out).exists()
    unreadable = run("fit", str(data), "-o", out, "--memory-limit", "4 gigs")
    assert unreadable.returncode == 2
    assert "cannot read '4 gigs' as a size" in unreadable.stderr
    fitted = run("fit", str(data), "-o", out, "--memory-limit", "50%")
    assert fitted.returncode == 0, fitted.stderr
    sampled = run(
        "sample", out, "-n", "10", "-o", str(tmp_path / "s.parquet"), "--memory-limit", "100"
    )
    assert sampled.returncode == 1
    assert "sampling 10 rows" in sampled.stderr
