"""File helpers: atomic writes (temp file + rename) with the user's umask, and content hashes."""

from __future__ import annotations

import hashlib
import os
import tempfile
import threading
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


def check_writable(path: Path, force: bool) -> None:
    """Refuse to overwrite an existing file unless ``force``; then :func:`check_output_path`."""
    if path.exists() and not path.is_dir() and not force:
        raise BadInputError(
            f"output file {path} already exists; seqgate does not overwrite files unless asked. "
            f"Pass --force to replace it, or choose another path with -o."
        )
    check_output_path(path, "output file")


_UMASK_LOCK = threading.Lock()


def current_umask() -> int:
    """The process umask, read without changing it where the system allows.

    Linux ≥ 4.7 shows it in ``/proc/self/status`` (``Umask:`` line). Elsewhere the only way is
    ``os.umask`` (set, then restore at once), done under a lock so two seqgate threads cannot
    interleave; another library changing the umask in that instant is the remaining risk.
    """
    try:
        with open("/proc/self/status", encoding="utf-8", errors="replace") as f:
            for line in f:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    with _UMASK_LOCK:
        mask = os.umask(0o022)
        os.umask(mask)
    return mask


def write_atomic(path: str | os.PathLike[str], data: bytes) -> None:
    """Write ``data`` to ``path`` so that readers see the old file or the whole new one.

    The bytes go to a temp file in the same directory, are flushed and fsynced, then renamed
    over the target (atomic on POSIX). On any failure the temp file is removed. The file gets
    the mode a plain ``open(path, "w")`` would give, ``0o666 & ~umask`` (``mkstemp`` makes
    ``0o600``, which a CI uploader or another account could not read).
    """
    target = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        with os.fdopen(fd, "wb") as f:
            os.fchmod(f.fileno(), 0o666 & ~current_umask())
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
