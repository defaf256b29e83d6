"""The gate's output folder under faults, with real processes: interrupt, termination, crash,
a second gate on the same folder, a full disk, files seqgate did not write.

Invariant checked after every case (the reason the gate exists): the folder never holds a report
whose verdict differs from the exit code of the run that wrote it, nor a report beside a
``model.onnx`` whose sha256 differs from the one the report records.
"""

from __future__ import annotations

import hashlib
import json
import os
import resource
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

DEMO = Path(__file__).resolve().parents[2] / "fixtures" / "demo"
GATE_FILES = {"model.onnx", "report.json", "report.md", "junit.xml", "report.html"}


def _config(tmp: Path, name: str = "gate.toml", synthetic: bool = True) -> Path:
    text = f"""
[model]
source = "{DEMO / "vibration" / "vibration_model.py"}:build_model"
weights = "{DEMO / "vibration" / "vibration_model.pt"}"
[verify]
recordings = ["{DEMO / "vibration" / "pump_windows.npz"}"]
synthetic = {"true" if synthetic else "false"}
"""
    p = tmp / name
    p.write_text(text, encoding="utf-8")
    return p


def _start(config: Path, out: Path, **kw: object) -> subprocess.Popen[str]:
    return subprocess.Popen(
        [sys.executable, "-m", "seqgate.cli.app", "gate", str(config), "--out-dir", str(out)],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, **kw,  # type: ignore[call-overload]
    )


def _run(config: Path, out: Path) -> subprocess.CompletedProcess[str]:
    p = _start(config, out)
    stdout, stderr = p.communicate(timeout=300)
    return subprocess.CompletedProcess(p.args, p.returncode, stdout, stderr)


def _snapshot(folder: Path) -> dict[str, str]:
    if not folder.exists():
        return {}
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.iterdir())}


def _check_invariant(folder: Path, exit_code: int | None = None) -> None:
    """No report that lies: verdict == exit code, recorded model sha == model on disk."""
    if not (folder / "report.json").exists():
        assert not folder.exists() or not any(folder.iterdir()), sorted(p.name for p in folder.iterdir())
        return
    rep = json.loads((folder / "report.json").read_text())
    assert rep["passed"] == (rep["exit_code"] == 0)
    if exit_code is not None:
        assert rep["exit_code"] == exit_code
    model = folder / "model.onnx"
    recorded = rep["provenance"]["model_sha256"]
    assert recorded == hashlib.sha256(model.read_bytes()).hexdigest()
    assert set(p.name for p in folder.iterdir()) <= GATE_FILES


def _no_leftovers(folder: Path) -> None:
    stray = [p.name for p in folder.parent.iterdir() if p.name.startswith(f".{folder.name}.")]
    assert stray == [], stray


def _wait_for(pred: object, timeout: float = 120.0) -> None:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if pred():  # type: ignore[operator]
            return
        time.sleep(0.02)
    raise AssertionError("condition not reached in time")


def _build_has_model(out: Path) -> bool:
    return any((b / "model.onnx").exists() for b in out.parent.glob(f".{out.name}.build-*"))


@pytest.fixture(scope="module")
def passed_once(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path, dict[str, str]]:
    """A folder holding one complete, passing gate run (the 'previous set')."""
    tmp = tmp_path_factory.mktemp("gate_outputs")
    cfg = _config(tmp)
    out = tmp / "out"
    r = _run(cfg, out)
    assert r.returncode == 0, r.stderr
    _check_invariant(out, 0)
    return cfg, out, _snapshot(out)


def _copy_of(src: Path, dst: Path) -> Path:
    dst.mkdir()
    for p in src.iterdir():
        (dst / p.name).write_bytes(p.read_bytes())
    return dst


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM])
def test_interrupt_after_export_leaves_previous_set(sig: int, passed_once: tuple, tmp_path: Path) -> None:
    cfg, done, _ = passed_once
    out = _copy_of(done, tmp_path / f"out-{int(sig)}")
    before = _snapshot(out)
    p = _start(cfg, out)
    _wait_for(lambda: _build_has_model(out))
    p.send_signal(sig)
    _, stderr = p.communicate(timeout=120)
    assert p.returncode == 130, stderr
    assert f"interrupted; nothing written to {out}" in stderr
    assert "Traceback" not in stderr
    assert _snapshot(out) == before
    _check_invariant(out)
    _no_leftovers(out)


def test_interrupt_into_new_folder_leaves_nothing(passed_once: tuple, tmp_path: Path) -> None:
    cfg = passed_once[0]
    out = tmp_path / "fresh"
    p = _start(cfg, out)
    _wait_for(lambda: _build_has_model(out))
    p.send_signal(signal.SIGINT)
    _, stderr = p.communicate(timeout=120)
    assert p.returncode == 130, stderr
    assert not out.exists()
    _no_leftovers(out)


def test_second_gate_on_same_folder_is_refused(passed_once: tuple, tmp_path: Path) -> None:
    cfg = passed_once[0]
    out = tmp_path / "shared"
    first = _start(cfg, out)
    _wait_for(lambda: (tmp_path / ".shared.lock").exists())
    second = _run(_config(tmp_path, "other.toml", synthetic=False), out)
    assert second.returncode == 2, second.stderr
    assert f"pid {first.pid}" in second.stderr and "another seqgate gate" in second.stderr
    _, stderr = first.communicate(timeout=300)
    assert first.returncode == 0, stderr
    _check_invariant(out, 0)
    _no_leftovers(out)


def test_killed_gate_leaves_no_stuck_lock(passed_once: tuple, tmp_path: Path) -> None:
    cfg, done, _ = passed_once
    out = _copy_of(done, tmp_path / "killed")
    before = _snapshot(out)
    p = _start(cfg, out)
    _wait_for(lambda: _build_has_model(out))
    p.send_signal(signal.SIGKILL)  # no cleanup runs: the kernel drops the flock
    p.communicate(timeout=60)
    assert _snapshot(out) == before
    _check_invariant(out)
    r = _run(cfg, out)  # the next run is not blocked, and clears what the killed one left
    assert r.returncode == 0, r.stderr
    _check_invariant(out, 0)
    _no_leftovers(out)


def _limit_file_size(limit: int) -> None:
    # Without ignoring SIGXFSZ the kernel kills the writer; ignored, write() fails with EFBIG,
    # the nearest stand-in for a full disk that needs no mount (POSIX setrlimit(2)).
    signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))


def test_full_disk_while_writing_reports(passed_once: tuple, tmp_path: Path) -> None:
    cfg, done, _ = passed_once
    out = _copy_of(done, tmp_path / "full")
    before = _snapshot(out)
    sizes = {p.name: p.stat().st_size for p in done.iterdir()}
    limit = sizes["model.onnx"] + 1024  # the export fits, the HTML report (charts inline) does not
    assert sizes["report.html"] > limit
    p = _start(cfg, out, preexec_fn=lambda: _limit_file_size(limit))
    _, stderr = p.communicate(timeout=300)
    assert p.returncode == 2, stderr
    assert "nothing was written to" in stderr and "Traceback" not in stderr
    assert _snapshot(out) == before
    _check_invariant(out)
    _no_leftovers(out)


def test_folder_with_foreign_files_is_refused(passed_once: tuple, tmp_path: Path) -> None:
    cfg = passed_once[0]
    out = tmp_path / "mine"
    out.mkdir()
    (out / "notes.txt").write_text("not seqgate's")
    r = _run(cfg, out)
    assert r.returncode == 2
    assert "notes.txt" in r.stderr
    assert (out / "notes.txt").read_text() == "not seqgate's"
    _no_leftovers(out)


def test_rerun_replaces_the_whole_set_with_users_umask(passed_once: tuple, tmp_path: Path) -> None:
    cfg, done, _ = passed_once
    out = _copy_of(done, tmp_path / "rerun")
    (out / "junit.xml").unlink()  # the new run's set replaces the old one as a whole
    r = _run(cfg, out)
    assert r.returncode == 0, r.stderr
    assert set(p.name for p in out.iterdir()) == GATE_FILES
    _check_invariant(out, 0)
    umask = os.umask(0)
    os.umask(umask)
    assert out.stat().st_mode & 0o777 == 0o777 & ~umask
