"""CLI basics: help text, version, and that --help imports no heavy framework."""

from __future__ import annotations

import subprocess
import sys

from typer.testing import CliRunner

from seqgate import __version__
from seqgate.cli.app import app

runner = CliRunner()


def test_help_lists_commands() -> None:
    r = runner.invoke(app, ["--help"])
    assert r.exit_code == 0
    for cmd in ("export", "inspect"):
        assert cmd in r.output


def test_version() -> None:
    r = runner.invoke(app, ["--version"])
    assert r.exit_code == 0
    assert __version__ in r.output


def test_help_imports_no_framework() -> None:
    code = (
        "import sys\n"
        "from seqgate.cli.app import app\n"
        "from typer.testing import CliRunner\n"
        "CliRunner().invoke(app, ['--help'])\n"
        "CliRunner().invoke(app, ['export', '--help'])\n"
        "heavy = [m for m in ('tensorflow', 'keras', 'torch', 'matplotlib', 'onnxruntime') "
        "if m in sys.modules]\n"
        "print(','.join(heavy))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""


def test_unexpected_error_is_one_paragraph_exit_4(monkeypatch, capsys) -> None:  # type: ignore[no-untyped-def]
    import pytest

    import seqgate.cli.app as cli

    def boom() -> None:
        raise RuntimeError("simulated fault\nsecond line")

    monkeypatch.delenv("SEQGATE_DEBUG", raising=False)
    monkeypatch.setattr(cli, "app", boom)
    with pytest.raises(SystemExit) as ei:
        cli.main()
    err = capsys.readouterr().err
    assert ei.value.code == 4
    assert "internal error" in err and "RuntimeError: simulated fault" in err
    assert "Traceback" not in err and "second line" not in err
