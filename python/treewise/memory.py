"""The machine's memory and sizes in bytes: "4GiB", "500MB", "50%" for ``memory_limit``."""

from __future__ import annotations

import os
import re
from pathlib import Path

__all__ = ["DEFAULT_SHARE", "machine_memory", "parse_size"]

#: The share of the machine's memory that ``memory_limit`` allows by default.
DEFAULT_SHARE = 0.5

#: Bytes per unit: decimal (kB, MB, GB, TB) and binary (KiB, MiB, GiB, TiB); case-insensitive.
_UNITS = {
    "": 1,
    "b": 1,
    "k": 1000,
    "kb": 1000,
    "m": 1000**2,
    "mb": 1000**2,
    "g": 1000**3,
    "gb": 1000**3,
    "t": 1000**4,
    "tb": 1000**4,
    "kib": 1024,
    "mib": 1024**2,
    "gib": 1024**3,
    "tib": 1024**4,
}
_SIZE = re.compile(r"\s*(\d+(?:\.\d*)?|\.\d+)\s*([a-z]*|%)\s*", re.IGNORECASE)

#: cgroup v2, then v1: the memory limit of the container the process runs in.
_CGROUP_FILES = (
    Path("/sys/fs/cgroup/memory.max"),
    Path("/sys/fs/cgroup/memory/memory.limit_in_bytes"),
)


def _physical_memory() -> int | None:
    try:
        pages, page_size = os.sysconf("SC_PHYS_PAGES"), os.sysconf("SC_PAGE_SIZE")
    except (AttributeError, ValueError, OSError):
        return None
    return pages * page_size if pages > 0 and page_size > 0 else None


def _cgroup_limit() -> int | None:
    for path in _CGROUP_FILES:
        try:
            text = path.read_text().strip()
        except OSError:
            continue
        # "max" (v2) or a huge number (v1) means no limit.
        if text.isdigit() and int(text) < 2**60:
            return int(text)
    return None


def machine_memory() -> int | None:
    """The memory this process may use: physical RAM, or the cgroup's limit when lower.

    None when neither can be read (then ``memory_limit`` has no default bound).
    """
    known = [m for m in (_physical_memory(), _cgroup_limit()) if m is not None]
    return min(known) if known else None


def parse_size(text: str, whole: int | None) -> int:
    """Bytes from ``"4GiB"``, ``"500MB"``, a plain number of bytes, or ``"50%"`` of ``whole``.

    Raises ValueError on anything else, and on a share when ``whole`` is None.
    """
    found = _SIZE.fullmatch(text)
    unit = found.group(2).lower() if found else None
    if found is None or (unit not in _UNITS and unit != "%"):
        raise ValueError(
            f"cannot read {text!r} as a size; use bytes with a unit ('4GiB', '500MB', '2TB') "
            "or a share of the machine's memory ('50%')"
        )
    number = float(found.group(1))
    if unit == "%":
        if whole is None:
            raise ValueError(
                f"memory_limit={text!r} is a share, but this machine's memory cannot be read; "
                "give bytes instead ('4GiB')"
            )
        if not 0 < number <= 100:
            raise ValueError(f"a memory share must be in (0%, 100%], got {text!r}")
        return int(whole * number / 100)
    return int(number * _UNITS[unit])
