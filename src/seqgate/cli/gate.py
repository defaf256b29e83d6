"""``seqgate gate GATE.toml [--out-dir DIR]``: the release gate as one command."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from seqgate.errors import SeqgateError


def gate(
    config: Annotated[Path, typer.Argument(help="The gate config (TOML); see fixtures/gate_example.toml.")],
    out_dir: Annotated[Path | None, typer.Option("--out-dir", help="Directory for model.onnx and the reports "
                                                 "(default: CONFIG-report/ next to the config).")] = None,
    old_out: Annotated[Path | None, typer.Option("--out", hidden=True)] = None,
    quiet: Annotated[bool, typer.Option("--quiet", help="No progress display.")] = False,
) -> None:
    """Export, verify and profile as the config declares; exit 0 only when every check passes."""
    from seqgate.cli.app import _fail
    from seqgate.gate.run import run_gate

    try:
        report = run_gate(config, out_dir or old_out, progress=not quiet)
    except SeqgateError as e:
        raise _fail(e) from None
    _print_summary(report)
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
        t.add_row(ch["name"], "[green]pass[/]" if ch["passed"] else "[bold red]fail[/]", ch["detail"])
    c.print(t)
    if r.error:  # type: ignore[attr-defined]
        Console(stderr=True, highlight=False).print(f"[bold red]error:[/] {r.error['message']}")  # type: ignore[attr-defined]
    verdict = "[bold green]PASSED[/]" if r.passed else "[bold red]FAILED[/]"  # type: ignore[attr-defined]
    names = [n for n in ("report.html", "report.json", "report.md", "junit.xml", "model.onnx")
             if (r.out_dir / n).is_file()]  # type: ignore[attr-defined]
    c.print(f"{verdict}  reports in {r.out_dir}: {' '.join(names)}")  # type: ignore[attr-defined]


def register(app: typer.Typer) -> None:
    app.command(name="gate")(gate)
