"""The gate's output folder: one lock, a private build folder, one swap at the end.

Contract (what a reviewer can rely on after any run, finished or not):

- The folder ``D`` only ever holds one complete set of outputs of one finished run, or what it
  held before, or nothing. A run builds every file in a private sibling ``.D.build-XXXX`` and
  replaces ``D`` with it in one step at the end (Linux ``renameat2(RENAME_EXCHANGE)``, an atomic
  swap; elsewhere two renames, between which ``D`` briefly does not exist). A run that stops
  early (a crash, an interrupt, a full disk) removes its build folder and leaves ``D`` untouched.
- One run per folder: the run holds an exclusive ``flock`` on ``.D.lock`` beside ``D``. The
  kernel releases it when the process ends, however it ends, so a crashed run cannot leave it
  stuck. A second run on the same folder is refused at once, naming the running one (its pid,
  config and start time, read from the lock file).
- Overwrite policy: ``D`` is replaced only when everything in it is a file the gate writes
  (:data:`GATE_FILES`) and its ``report.json`` is a seqgate gate report; a folder holding
  anything else is refused, listing what seqgate did not write. An empty or new folder is used.
"""

from __future__ import annotations

import contextlib
import ctypes
import datetime as _dt
import errno
import json
import os
import shutil
import tempfile
from collections.abc import Iterator
from pathlib import Path

from seqgate.errors import BadInputError
from seqgate.settings.variants import VARIANT_KINDS, variant_file_name
from seqgate.util.files import current_umask

GATE_FILES = frozenset({"model.onnx", "report.json", "report.md", "junit.xml", "report.html",
                        *(variant_file_name(k) for k in VARIANT_KINDS)})  # + accepted variants
_RENAME_EXCHANGE = 2  # linux/fs.h


def lock_path(out_dir: Path) -> Path:
    return out_dir.parent / f".{out_dir.name}.lock"


def check_replaceable(out_dir: Path) -> None:
    """Refuse an output folder that holds files seqgate did not write (module docstring)."""
    if not out_dir.exists():
        return
    if not out_dir.is_dir():
        raise BadInputError(f"gate output {out_dir} is a file, not a folder; choose a folder with --out-dir.")
    entries = sorted(p.name for p in out_dir.iterdir())
    foreign = [n for n in entries if n not in GATE_FILES]
    if not foreign and "report.json" in entries and not _is_gate_report(out_dir / "report.json"):
        foreign = ["report.json (not a seqgate gate report)"]
    if not foreign and entries and "report.json" not in entries:
        foreign = entries  # gate files without the report that marks them as one run's: not ours to judge
    if foreign:
        shown = ", ".join(foreign[:8]) + (f" and {len(foreign) - 8} more" if len(foreign) > 8 else "")
        raise BadInputError(
            f"gate output folder {out_dir} holds files that seqgate did not write ({shown}); the gate "
            f"replaces its output folder as a whole, so it uses only an empty folder or one written by "
            f"an earlier gate. Choose another folder with --out-dir, or move those files away."
        )


def _is_gate_report(path: Path) -> bool:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(data, dict) and str(data.get("schema", "")).startswith("seqgate.gate/")


@contextlib.contextmanager
def folder_lock(out_dir: Path, config: Path) -> Iterator[None]:
    """Hold the exclusive lock of ``out_dir`` for the duration (module docstring)."""
    import fcntl

    path = lock_path(out_dir)
    while True:
        fd = _open_lock(path)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as e:
            holder = _read_holder(fd)
            os.close(fd)
            if e.errno in (errno.EAGAIN, errno.EACCES):
                raise BadInputError(
                    f"another seqgate gate is writing to {out_dir} ({holder}); two gates on one output "
                    f"folder would mix their files. Wait for it to finish, or give this one another "
                    f"folder with --out-dir."
                ) from None
            raise
        # The file may have been unlinked by the previous holder between our open and our lock.
        if _same_file(fd, path):
            break
        os.close(fd)
    try:
        os.ftruncate(fd, 0)
        started = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
        os.write(fd, json.dumps({"pid": os.getpid(), "config": str(config), "started": started}).encode())
        yield
    finally:
        with contextlib.suppress(OSError):
            path.unlink()
        os.close(fd)  # closing releases the flock


def _open_lock(path: Path) -> int:
    try:
        return os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    except OSError as e:
        raise BadInputError(f"cannot create the lock file {path} beside the gate output folder "
                            f"({e.strerror}); choose a writable place with --out-dir.") from e


def _same_file(fd: int, path: Path) -> bool:
    try:
        a, b = os.fstat(fd), os.stat(path)
    except OSError:
        return False
    return (a.st_dev, a.st_ino) == (b.st_dev, b.st_ino)


def _read_holder(fd: int) -> str:
    try:
        os.lseek(fd, 0, os.SEEK_SET)
        info = json.loads(os.read(fd, 4096).decode("utf-8"))
        return f"pid {info['pid']}, config {info['config']}, started {info['started']}"
    except (OSError, ValueError, KeyError, TypeError):
        return "its details could not be read"


def clear_stale(out_dir: Path) -> None:
    """Remove build/old folders that a killed run left beside ``out_dir`` (call under the lock)."""
    for pattern in (f".{out_dir.name}.build-*", f".{out_dir.name}.old-*"):
        for stale in out_dir.parent.glob(pattern):
            shutil.rmtree(stale, ignore_errors=True)


def make_build_dir(out_dir: Path) -> Path:
    """A private, empty sibling of ``out_dir`` that the run writes into."""
    try:
        return Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.build-", dir=out_dir.parent))
    except OSError as e:
        raise BadInputError(f"cannot create a folder beside {out_dir} ({e.strerror}); "
                            f"choose a writable place with --out-dir.") from e


def commit(build_dir: Path, out_dir: Path) -> None:
    """Make ``build_dir`` the new ``out_dir`` in one step; the previous set is removed after."""
    build_dir.chmod(0o777 & ~current_umask())  # mkdtemp makes 0700; the folder is for the user's readers too
    if not out_dir.exists():
        os.rename(build_dir, out_dir)
        return
    if _exchange(build_dir, out_dir):
        shutil.rmtree(build_dir, ignore_errors=True)  # now holds the previous set
        return
    old = Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.old-", dir=out_dir.parent))
    os.rename(out_dir, old / "set")
    os.rename(build_dir, out_dir)
    shutil.rmtree(old, ignore_errors=True)


def discard(build_dir: Path) -> None:
    shutil.rmtree(build_dir, ignore_errors=True)


def _exchange(a: Path, b: Path) -> bool:
    """Atomically swap two paths with renameat2(RENAME_EXCHANGE); False where unavailable."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        fn = libc.renameat2
    except (OSError, AttributeError):
        return False
    at_fdcwd = -100
    rc = fn(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), _RENAME_EXCHANGE)
    return rc == 0
