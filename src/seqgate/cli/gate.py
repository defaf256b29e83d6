"""``seqgate gate GATE.toml [--out DIR]``: the release gate as one command."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from seqgate.errors import SeqgateError


def gate(
    config: Annotated[Path, typer.Argument(help="The gate config (TOML); see fixtures/gate_example.toml.")],
    out: Annotated[Path | None, typer.Option("--out", help="Directory for model.onnx and the reports "
                                             "(default: CONFIG-report/ next to the config).")] = None,
    quiet: Annotated[bool, typer.Option("--quiet", help="No progress display.")] = False,
) -> None:
    """Export, verify and profile as the config declares; exit 0 only when every check passes."""
    from seqgate.cli.app import _fail
    from seqgate.errors import InterruptedRun
    from seqgate.gate.run import run_gate

    try:
        report = run_gate(config, out, progress=not quiet)
    except InterruptedRun as e:
        typer.echo(str(e), err=True)
        raise typer.Exit(e.exit_code) from None
    except SeqgateError as e:
        raise _fail(e) from None
    try:
        _print_summary(report)
    except KeyboardInterrupt:
        pass  # the outputs are complete and in place: the exit code must stay the report's verdict
    raise typer.Exit(report.exit_code)


def _print_summary(report: object) -> None:
    from rich.console import Console
    from rich.table import Table

    r = report  # GateReport
    c = Console(highlight=False)
    t = Table(title=f"seqgate gate — {r.model_name}")  # type: ignore[attr-defined]
    for col in ("check", "verdict", "detail"):
        t.add_column(col, overflow="fold")
    for ch in r.checks:  # type: ignore[attr-defined]
        t.add_row(ch["name"], "[green]pass[/]" if ch["passed"] else "[bold red]FAIL[/]", ch["detail"])
    c.print(t)
    if r.error:  # type: ignore[attr-defined]
        Console(stderr=True, highlight=False).print(f"[bold red]error:[/] {r.error['message']}")  # type: ignore[attr-defined]
    verdict = "[bold green]PASSED[/]" if r.passed else "[bold red]FAILED[/]"  # type: ignore[attr-defined]
    names = [n for n in ("report.html", "report.json", "report.md", "junit.xml", "model.onnx")
             if (r.out_dir / n).is_file()]  # type: ignore[attr-defined]
    c.print(f"{verdict}  reports in {r.out_dir}: {' '.join(names)}")  # type: ignore[attr-defined]


def register(app: typer.Typer) -> None:
    app.command(name="gate")(gate)
