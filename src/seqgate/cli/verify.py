"""``seqgate verify`` and ``seqgate windows`` (registered by ``seqgate.cli``).

Exit codes: 0 every tensor within tolerance; 1 anything outside; 2 bad input; 3 unsupported.
No framework is imported at module level.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

import typer

from seqgate.errors import SeqgateError
from seqgate.util.files import check_output_path

TOLERANCE_HELP = (
    "TOML file: top-level atol/rtol, plus \\[\\[tensor]] tables with match = \"fnmatch pattern\" and "
    "atol and/or rtol; the last matching table wins."
)


def _fail(e: SeqgateError) -> typer.Exit:
    from seqgate.cli.app import _fail as fail

    return fail(e)


def _split(text: str | None) -> list[str] | None:
    return [c.strip() for c in text.split(",") if c.strip()] if text else None


def verify(
    model: Annotated[Path, typer.Argument(help="ONNX file written by seqgate export.")],
    source: Annotated[str, typer.Option("--source", help="The trained model: .keras/.h5, or FILE.py:FACTORY.")],
    weights: Annotated[str | None, typer.Option("--weights", help="PyTorch state dict.")] = None,
    windows: Annotated[list[Path] | None, typer.Option(
        "--windows", help="Recorded windows (.npz/.npy); repeatable.")] = None,
    synthetic: Annotated[bool, typer.Option("--synthetic", help="Add seeded stress windows.")] = False,
    atol: Annotated[float | None, typer.Option("--atol", help="Absolute tolerance (default 1e-4).")] = None,
    rtol: Annotated[float | None, typer.Option("--rtol", help="Relative tolerance (default 1e-4).")] = None,
    tolerances: Annotated[Path | None, typer.Option("--tolerances", help=TOLERANCE_HELP)] = None,
    batch_size: Annotated[int, typer.Option("--batch-size", help="Windows per batch.")] = 64,
    no_states: Annotated[bool, typer.Option("--no-states", help="Compare the outputs only.")] = False,
    report: Annotated[Path | None, typer.Option("--report", help="Write the JSON report here.")] = None,
    junit: Annotated[Path | None, typer.Option("--junit", help="Write JUnit XML here.")] = None,
    summary: Annotated[Path | None, typer.Option("--summary", help="Write a Markdown summary here.")] = None,
    oracle: Annotated[bool, typer.Option("--oracle", help="Re-check worst windows, onnx.reference.")] = False,
    task: Annotated[str | None, typer.Option(
        "--task", help="classify: every output holds class scores; regress: none does "
        "(default: detect softmax/sigmoid outputs).")] = None,
    seed: Annotated[int, typer.Option("--seed", help="Seed of the synthetic windows.")] = 0,
    quiet: Annotated[bool, typer.Option("--quiet", help="No progress bar and no table.")] = False,
) -> None:
    """Replay windows through the source framework and ONNX Runtime; compare outputs and every hidden state."""
    from seqgate.verify.run import verify_model

    try:
        for p, option in ((report, "--report"), (junit, "--junit"), (summary, "--summary")):
            if p is not None:
                check_output_path(p, option)
        rep = verify_model(model, source, weights, [str(w) for w in windows or []], synthetic, atol, rtol,
                           str(tolerances) if tolerances else None, batch_size, not no_states, oracle,
                           progress=not quiet, task=task, seed=seed)
    except SeqgateError as e:
        raise _fail(e) from None
    _write_reports(rep, report, junit, summary)
    if not quiet:
        _print_table(rep)
    typer.echo(rep.headline())
    raise typer.Exit(rep.exit_code)


def _write_reports(rep: Any, report: Path | None, junit: Path | None, summary: Path | None) -> None:
    if report is not None:
        from seqgate.report.verify_json import write_verify_json

        write_verify_json(rep, report)
    if junit is not None:
        from seqgate.report.verify_junit import write_verify_junit

        write_verify_junit(rep, junit)
    if summary is not None:
        from seqgate.report.verify_markdown import write_verify_markdown

        write_verify_markdown(rep, summary)


def _print_table(rep: Any) -> None:
    from rich.console import Console
    from rich.table import Table

    st = rep.settings
    n_over = len(st["overrides"])
    caption = (f"pass: |onnx − source| ≤ atol + rtol·|source|, atol {st['atol']:g}, rtol {st['rtol']:g}"
               + (f", {n_over} per-tensor overrides" if n_over else ""))
    table = Table(title="verify", caption=caption)
    table.add_column("tensor", overflow="fold")
    table.add_column("kind")
    for col in ("max |Δ|", "p99 |Δ|", "outside"):
        table.add_column(col, justify="right")
    table.add_column("")
    first = (rep.first_divergence or {}).get("tensor")
    for t in rep.tensors:
        m = t["metrics"]
        fail = "[bold red]FIRST[/]" if t["name"] == first else "[red]fail[/]"
        mark = "[green]ok[/]" if t["passed"] else fail
        table.add_row(t["name"], t["kind"], f"{m['max_abs']:.2e}", f"{m['p99_abs']:.2e}", str(m["outside"]),
                      mark)
    c = Console(highlight=False)
    c.print(table)
    for w in rep.warnings:
        c.print(f"[yellow]warning:[/] {w}")
    if rep.oracle is not None and not rep.oracle.get("ran"):
        c.print(f"[yellow]oracle:[/] {rep.oracle['reason']}")


def windows(
    data: Annotated[Path, typer.Argument(help="Time-series CSV with a header row.")],
    out: Annotated[Path, typer.Option("-o", "--out", help="The NPZ recording to write.")],
    window: Annotated[int, typer.Option("--window", help="Steps per window (T).")],
    stride: Annotated[int, typer.Option("--stride", help="Rows between window starts.")] = 1,
    horizon: Annotated[int, typer.Option(
        "--horizon", help="Target this many rows after the window's last row (0: one target per step).")] = 0,
    columns: Annotated[str | None, typer.Option("--columns", help="Feature columns a,b,… (default: all "
                                                "but the targets).")] = None,
    targets: Annotated[str | None, typer.Option("--targets", help="Target columns c,….")] = None,
    force: Annotated[bool, typer.Option("--force", help="Overwrite OUT if it exists.")] = False,
) -> None:
    """Build sliding windows (samples × steps × features, plus targets) from a CSV into an NPZ recording."""
    from seqgate.verify.csv_windows import build_recording

    try:
        meta = build_recording(data, out, window, stride, horizon, _split(columns), _split(targets), force)
    except SeqgateError as e:
        raise _fail(e) from None
    tshape = f", targets {meta['targets_shape']}" if meta["targets_shape"] else ""
    typer.echo(f"wrote {out}: windows {meta['windows_shape']}{tshape} from {meta['rows']} rows")
    typer.echo(f"features: {', '.join(meta['columns'])}")
    if meta["targets"]:
        typer.echo(f"targets: {', '.join(meta['targets'])}")


def register(app: typer.Typer) -> None:
    app.command("verify")(verify)
    app.command("windows")(windows)
