"""File helpers: atomic writes (temp file + rename) and content hashes."""

from __future__ import annotations

import hashlib
import os
import tempfile
from pathlib import Path

from seqgate.errors import BadInputError


def sha256_file(path: str | os.PathLike[str]) -> str:
    """Hex sha256 of a file's bytes, read in 1 MiB chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def check_output_path(path: Path, option: str = "output file") -> None:
    """Refuse an output path that is a directory or whose directory is missing (named by ``option``)."""
    if path.is_dir():
        raise BadInputError(f"{option} {path} is a directory; give a file name inside it.")
    if not path.parent.exists():
        raise BadInputError(f"{option} {path}: directory {path.parent} does not exist; create it first "
                            f"or choose another path.")


def check_writable(path: Path, force: bool, option: str = "output file") -> None:
    """The one overwrite policy (``seqgate.util.ownership``), then :func:`check_output_path`.

    A file seqgate wrote earlier is replaced; any other existing file only with ``force``.
    """
    from seqgate.util.ownership import written_by_seqgate

    if path.exists() and not path.is_dir() and not force and not written_by_seqgate(path):
        raise BadInputError(
            f"{option} {path} already exists and was not written by seqgate; seqgate replaces only "
            f"files it wrote itself. Pass --force to replace it, or choose another path."
        )
    check_output_path(path, option)


def write_atomic(path: str | os.PathLike[str], data: bytes) -> None:
    """Write ``data`` to ``path`` so that readers see the old file or the whole new one.

    The bytes go to a temp file in the same directory, are flushed and fsynced, then renamed
    over the target (atomic on POSIX). On any failure the temp file is removed.
    """
    target = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def write_text_atomic(path: str | os.PathLike[str], text: str) -> None:
    """Text form of :func:`write_atomic` (UTF-8)."""
    write_atomic(path, text.encode("utf-8"))
