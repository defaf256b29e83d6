"""File helpers: output-path checks, atomic writes (temp file + rename, the user's umask) and content hashes.

Every command that writes calls :func:`check_output_path` (or :func:`check_writable`,
:func:`check_output_dir`) for each output before any heavy work, so a path the system will
refuse is exit 2 in a second, not after a long export or verify. The check creates and
removes a temp file beside the target: that is the only test that holds for every reason a
write can fail up front (permissions, also for root on read-only mounts; read-only or special
filesystems such as /proc; a parent that is a file). A full disk or a file-size limit shows
only while writing: :func:`write_atomic` turns those ``OSError`` exceptions into the same exit-2
message, naming the path and the system's reason, and leaves nothing half-written behind.
"""

from __future__ import annotations

import hashlib
import os
import tempfile
import threading
from pathlib import Path

from seqgate.errors import BadInputError, OutputPathError


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
    parent = path.parent
    if parent.exists() and not parent.is_dir():
        raise BadInputError(f"{option} {path}: {parent} is a file, not a directory; choose a path inside "
                            f"a directory.")
    if not parent.exists():
        raise BadInputError(f"{option} {path}: directory {parent} does not exist; create it first "
                            f"or choose another path.")
    _probe_directory(parent, path)


def check_output_dir(path: Path, option: str = "output directory") -> None:
    """Create the output directory ``path`` if needed and check that files can be written in it."""
    if path.exists() and not path.is_dir():
        raise BadInputError(f"{option} {path} is a file; give a directory.")
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise OutputPathError(path, e, doing="create the directory") from e
    _probe_directory(path, path)


def _probe_directory(directory: Path, target: Path) -> None:
    try:
        fd, tmp = tempfile.mkstemp(prefix=".seqgate-check.", dir=directory)
    except OSError as e:
        raise OutputPathError(target, e) from e
    os.close(fd)
    Path(tmp).unlink(missing_ok=True)


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
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    except OSError as e:
        raise OutputPathError(target, e) from e
    try:
        with os.fdopen(fd, "wb") as f:
            os.fchmod(f.fileno(), 0o666 & ~current_umask())
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, target)
    except OSError as e:  # no space, file too large, …: the system's reason, exit 2
        Path(tmp).unlink(missing_ok=True)
        raise OutputPathError(target, e) from e
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def write_text_atomic(path: str | os.PathLike[str], text: str) -> None:
    """Text form of :func:`write_atomic` (UTF-8)."""
    write_atomic(path, text.encode("utf-8"))
