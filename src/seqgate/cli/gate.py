"""``seqgate gate GATE.toml [--out-dir DIR]``: the release gate as one command."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from seqgate.cli.errors import exits_on_error
from seqgate.cli.progress import stage_display


@exits_on_error
def gate(
    config: Annotated[Path, typer.Argument(help="The gate config (TOML); see fixtures/gate_example.toml.")],
    out_dir: Annotated[Path | None, typer.Option("--out-dir", help="Directory for model.onnx and the reports "
                                                 "(default: CONFIG-report/ next to the config).")] = None,
    old_out: Annotated[Path | None, typer.Option("--out", hidden=True)] = None,
    quiet: Annotated[bool, typer.Option("--quiet", help="No progress display.")] = False,
) -> None:
    """Export, verify and profile as the config declares; exit 0 only when every check passes."""
    from seqgate.gate.run import run_gate

    with stage_display(quiet) as progress:
        report = run_gate(config, out_dir or old_out, progress=progress)
    try:
        _print_summary(report)
    except KeyboardInterrupt:
        pass  # the outputs are complete and in place: the exit code must stay the report's verdict
    raise typer.Exit(report.exit_code)


def _print_summary(report: object) -> None:
    from rich.console import Console
    from rich.table import Table
    from rich.text import Text

    from seqgate.cli.errors import print_error

    # every name, path and message below is user text: Text objects, never markup
    r = report  # GateReport
    c = Console(highlight=False)
    t = Table(title=Text(f"seqgate gate — {r.model_name}"))  # type: ignore[attr-defined]
    for col in ("check", "verdict", "detail"):
        t.add_column(col, overflow="fold")
    for ch in r.checks:  # type: ignore[attr-defined]
        t.add_row(Text(ch["name"]), Text("pass", "green") if ch["passed"] else Text("fail", "bold red"),
                  Text(ch["detail"]))
    c.print(t)
    if r.error:  # type: ignore[attr-defined]
        print_error(r.error["message"])  # type: ignore[attr-defined]
    verdict = Text("PASSED", "bold green") if r.passed else Text("FAILED", "bold red")  # type: ignore[attr-defined]
    names = [n for n in ("report.html", "report.json", "report.md", "junit.xml", "model.onnx")
             if (r.out_dir / n).is_file()]  # type: ignore[attr-defined]
    names += [v["file"].rsplit("/", 1)[-1] for v in r.variants or [] if v.get("file")]  # type: ignore[attr-defined]
    c.print(Text.assemble(verdict, f"  reports in {r.out_dir}: {' '.join(names)}"))  # type: ignore[attr-defined]


def register(app: typer.Typer) -> None:
    app.command(name="gate")(gate)
