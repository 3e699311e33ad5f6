"""Files on disk: atomic writes (temporary name, then rename) and reading model files."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

__all__ = ["read_model_file", "write_atomically"]


def write_atomically(path: str | os.PathLike[str], data: bytes) -> None:
    """Write ``data`` to ``path`` so that ``path`` never holds a partial file.

    The bytes go to a temporary file in the same directory, are flushed to disk, and the file is
    renamed over ``path`` in one step. On any failure the temporary file is removed.
    """
    target = Path(path)
    if target.is_dir():
        raise IsADirectoryError(f"{target} is a directory; give a file name to write the model to")
    directory = target.parent if str(target.parent) else Path(".")
    if not directory.is_dir():
        raise FileNotFoundError(f"the directory {directory} does not exist; create it first")
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=directory)
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def read_model_file(path: str | os.PathLike[str]) -> bytes:
    """The bytes of a model file, with clear errors for a missing path or a directory."""
    source = Path(path)
    if not source.exists():
        raise FileNotFoundError(f"no model file at {source}")
    if source.is_dir():
        raise IsADirectoryError(f"{source} is a directory, not a model file")
    return source.read_bytes()
