"""A config is code: a ``module:factory`` source must be a function or ``nn.Module`` class defined
outside the Python standard library and builtins, checked before it is called; importing a factory
file writes no ``__pycache__/`` beside it.

``os.abort`` raises SIGABRT (POSIX abort(3)): were it called, the process would die with signal 6
instead of exiting 2, so the subprocess test tells the two apart by the return code.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from cli_helpers import invoke as _invoke
from torch_models import FACTORY_FILE

REPO = Path(__file__).resolve().parents[2]

EXTRA = """
import functools
import os
import shutil

boom = os.abort
remove_tree = shutil.rmtree
later = functools.partial(build)


class NotAModule:
    pass
"""


@pytest.fixture
def factory_file(tmp_path: Path) -> Path:
    py = tmp_path / "net.py"
    py.write_text(textwrap.dedent(FACTORY_FILE) + EXTRA)
    return py


def test_stdlib_module_source_is_refused_in_a_real_process(tmp_path: Path) -> None:
    out = tmp_path / "o.onnx"
    env = {**os.environ, "PYTHONPATH": str(REPO / "src"), "TF_CPP_MIN_LOG_LEVEL": "3"}
    proc = subprocess.run([sys.executable, "-m", "seqgate.cli.app", "export", "os:abort", "--untrained",
                           "-o", str(out)], capture_output=True, text=True, env=env, timeout=120)
    assert proc.returncode == 2, (proc.returncode, proc.stderr)  # not −6 (SIGABRT)
    assert "standard library" in proc.stderr and "Traceback" not in proc.stderr
    assert not out.exists()


def test_gate_config_naming_stdlib_code_is_refused(tmp_path: Path) -> None:
    cfg = tmp_path / "gate.toml"
    cfg.write_text('[model]\nsource = "os:abort"\nuntrained = true\n[verify]\nsynthetic = true\n')
    r = _invoke("gate", str(cfg), "--out", str(tmp_path / "out"), "--quiet")
    assert r.exit_code == 2 and "standard library" in r.output, r.output


@pytest.mark.parametrize(("name", "needle"), [
    ("boom", "builtin_function_or_method object, not a Python function"),
    ("remove_tree", "shutil.rmtree, defined in the Python standard library"),
    ("later", "partial object, not a Python function"),
    ("NotAModule", "(not an nn.Module)"),
])
def test_factory_that_is_not_model_code_is_not_called(name: str, needle: str, factory_file: Path) -> None:
    victim = factory_file.parent / "keep"
    victim.mkdir()
    out = factory_file.parent / "o.onnx"
    r = _invoke("export", f"{factory_file}:{name}", "--untrained", "-o", str(out))
    assert r.exit_code == 2 and needle in r.output and "did not call it" in r.output, r.output
    assert victim.is_dir() and not out.exists()


@pytest.mark.parametrize("name", ["build", "Net"])
def test_function_and_module_class_factories_still_export(name: str, factory_file: Path) -> None:
    r = _invoke("export", f"{factory_file}:{name}", "--untrained", "-o", str(factory_file.parent / "o.onnx"))
    assert r.exit_code == 0, r.output


def test_importing_a_factory_file_writes_no_pycache(factory_file: Path,
                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(sys, "dont_write_bytecode", False)  # as in a plain interpreter
    r = _invoke("export", f"{factory_file}:build", "--untrained", "-o", str(factory_file.parent / "o.onnx"))
    assert r.exit_code == 0, r.output
    assert not (factory_file.parent / "__pycache__").exists()
    assert sys.dont_write_bytecode is False  # restored
