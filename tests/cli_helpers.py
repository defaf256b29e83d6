"""Test helper: run a seqgate command in-process the way a user runs it."""

from __future__ import annotations

from typing import Any

from typer.testing import CliRunner

_RUNNER = CliRunner()


def invoke(*args: str) -> Any:
    """``seqgate ARGS`` through typer's test runner; a traceback in the output, or an exception
    other than the command's own exit, fails the test (errors must be one clear paragraph)."""
    from seqgate.cli.app import app

    r = _RUNNER.invoke(app, list(args))
    assert "Traceback" not in r.output, r.output
    assert r.exception is None or isinstance(r.exception, SystemExit), repr(r.exception)
    return r
