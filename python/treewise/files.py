"""Files on disk: atomic writes (temporary name, then rename) and reading model files."""

from __future__ import annotations

import os
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

__all__ = ["atomic_path", "read_model_file", "write_atomically"]


@contextmanager
def atomic_path(path: str | os.PathLike[str]) -> Iterator[Path]:
    """A temporary file beside ``path`` to write; renamed over ``path`` when the block succeeds.

    ``path`` therefore never holds a partial file: on any failure (or Ctrl-C) the temporary file
    is removed and ``path`` keeps whatever it held before.
    """
    target = Path(path)
    if target.is_dir():
        raise IsADirectoryError(f"{target} is a directory; give a file name to write to")
    directory = target.parent if str(target.parent) else Path(".")
    if not directory.is_dir():
        raise FileNotFoundError(f"the directory {directory} does not exist; create it first")
    fd, name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=directory)
    tmp = Path(name)
    try:
        # mkstemp creates the file 0600; give it the mode an ordinary write would: the old
        # file's mode when overwriting, else what the umask allows.
        os.fchmod(fd, _mode_for(target))
    finally:
        os.close(fd)
    try:
        yield tmp
        os.replace(tmp, target)
    finally:
        tmp.unlink(missing_ok=True)


def _mode_for(target: Path) -> int:
    try:
        return target.stat().st_mode & 0o7777
    except FileNotFoundError:
        return 0o666 & ~_umask()


def _umask() -> int:
    # The umask can only be read by setting it; set it straight back.
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def write_atomically(path: str | os.PathLike[str], data: bytes) -> None:
    """Write ``data`` to ``path`` atomically, flushed to disk before the rename."""
    with atomic_path(path) as tmp, open(tmp, "wb") as f:
        f.write(data)
        f.flush()
        os.fsync(f.fileno())


def read_model_file(path: str | os.PathLike[str]) -> bytes:
    """The bytes of a model file, with clear errors for a missing path or a directory."""
    source = Path(path)
    if not source.exists():
        raise FileNotFoundError(f"no model file at {source}")
    if source.is_dir():
        raise IsADirectoryError(f"{source} is a directory, not a model file")
    return source.read_bytes()
