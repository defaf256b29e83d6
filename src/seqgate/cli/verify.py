"""``seqgate verify`` and ``seqgate windows`` (registered by ``seqgate.cli``).

Exit codes: 0 every tensor within tolerance; 1 anything outside; 2 bad input; 3 unsupported.
No framework is imported at module level.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

import typer

from seqgate.cli.errors import exits_on_error
from seqgate.cli.progress import stage_display
from seqgate.settings import defaults as d
from seqgate.util.files import check_writable

PASSED = ("synthetic", "batch_size", "states", "oracle", "task", "seed", "chunk", "workers", "cluster",
          "long_stream_factor")  # parsed options handed to verify_model as they are
TOLERANCE_HELP = (
    "TOML file: top-level atol/rtol, plus \\[\\[tolerance]] tables with match = \"fnmatch pattern\" and "
    "atol and/or rtol; the last matching table wins."
)


def _split(text: str | None) -> list[str] | None:
    return [c.strip() for c in text.split(",") if c.strip()] if text else None


@exits_on_error
def verify(
    model: Annotated[Path, typer.Argument(help="ONNX file written by seqgate export.")],
    source: Annotated[str, typer.Option(
        "--source", help="The trained model: .keras/.h5, or FILE.py:FACTORY.")],
    weights: Annotated[str | None, typer.Option("--weights", help="PyTorch state dict.")] = None,
    recordings: Annotated[list[Path] | None, typer.Option(
        "--recording", help="Recorded windows (.npz/.npy); repeatable.")] = None,
    old_windows: Annotated[list[Path] | None, typer.Option("--windows", hidden=True)] = None,
    synthetic: Annotated[bool, typer.Option(
        "--synthetic/--no-synthetic", help="Add seeded stress windows.")] = d.SYNTHETIC,
    atol: Annotated[float | None, typer.Option("--atol", help=f"Absolute tolerance (default {d.ATOL:g}).")] = (
        None),
    rtol: Annotated[float | None, typer.Option("--rtol", help=f"Relative tolerance (default {d.RTOL:g}).")] = (
        None),
    tolerances: Annotated[Path | None, typer.Option("--tolerances", help=TOLERANCE_HELP)] = None,
    batch_size: Annotated[int, typer.Option("--batch-size", help="Windows per runtime call.")] = d.BATCH_SIZE,
    states: Annotated[bool, typer.Option("--states/--no-states", help="Compare every hidden state "
                                         "(--no-states: the outputs only).")] = d.STATES,
    report: Annotated[Path | None, typer.Option("--report", help="Write the JSON report here.")] = None,
    junit: Annotated[Path | None, typer.Option("--junit", help="Write JUnit XML here.")] = None,
    summary: Annotated[Path | None, typer.Option("--summary", help="Write a Markdown summary here.")] = None,
    oracle: Annotated[bool, typer.Option("--oracle", help="Re-check worst windows, onnx.reference.")] = (
        d.ORACLE),
    task: Annotated[str, typer.Option(
        "--task", help="auto: detect softmax/sigmoid outputs; classify: every output holds class scores; "
        "regress: none does.")] = d.TASK,
    seed: Annotated[int, typer.Option("--seed", help="Seed of the synthetic windows.")] = d.SEED,
    chunk: Annotated[int, typer.Option("--chunk", help="Streaming files: the chunk size streamed besides "
                                       "1 and 7.")] = d.CHUNK,
    long_stream_factor: Annotated[int, typer.Option(
        "--long-stream-factor", help="Streaming files: the long-stream check runs streams this many window "
        "lengths long through the file and the source (0: off).")] = d.LONG_STREAM_FACTOR,
    workers: Annotated[int, typer.Option("--workers", help="Check the windows on N Ray workers (a local Ray "
                                         "unless --cluster; 0: in this process).")] = d.WORKERS,
    cluster: Annotated[str, typer.Option("--cluster", help="A running Ray cluster, HOST:PORT.")] = d.CLUSTER,
    quiet: Annotated[bool, typer.Option("--quiet", help="No progress display and no table.")] = False,
    force: Annotated[bool, typer.Option(
        "--force", help="Replace report files that seqgate did not write.")] = False,
    custom_code: Annotated[Path | None, typer.Option(
        "--custom-code", help="Keras: run this Python file first; it defines and registers the model's "
        "custom classes. Without it such models are refused.")] = None,
) -> None:
    """Replay windows through the source framework and ONNX Runtime; compare outputs and every hidden state."""
    from seqgate.verify.run import verify_model

    opts = _parse_options(custom_code, synthetic, seed, batch_size, states, task, oracle, chunk, workers,
                          cluster, tolerances, atol, rtol, long_stream_factor)
    for p, option in ((report, "--report"), (junit, "--junit"), (summary, "--summary")):
        if p is not None:
            check_writable(p, force, option)
    with stage_display(quiet) as progress:
        rep = verify_model(model, source, weights, recordings=[*(recordings or []), *(old_windows or [])],
                           atol=atol, rtol=rtol, tolerances=str(tolerances) if tolerances else None,
                           progress=progress, custom_code=custom_code, **{k: opts[k] for k in PASSED})
    _write_reports(rep, report, junit, summary)
    if not quiet:
        _print_table(rep)
    typer.echo(rep.headline())
    raise typer.Exit(rep.exit_code)


def _parse_options(custom_code: Path | None, synthetic: bool, seed: int, batch_size: int, states: bool,
                   task: str, oracle: bool, chunk: int, workers: int, cluster: str, tolerances: Path | None,
                   atol: float | None, rtol: float | None, long_stream_factor: int = d.LONG_STREAM_FACTOR
                   ) -> dict[str, Any]:
    """Every option through ``seqgate.settings``, all problems in one error (exit 2); custom code loaded."""
    if custom_code is not None:
        from seqgate.sources.keras import load_custom_code

        load_custom_code(custom_code)
    from seqgate.settings import CLI, Problems, parse_settings
    from seqgate.verify.tolerances import read_tolerances

    problems = Problems()
    raw = {"synthetic": synthetic, "seed": seed, "batch_size": batch_size, "states": states, "task": task,
           "oracle": oracle, "chunk": chunk, "workers": workers, "cluster": cluster,
           "long_stream_factor": long_stream_factor}
    opts = parse_settings("verify", raw, CLI, problems)
    read_tolerances(tolerances, atol, rtol, problems)  # --atol/--rtol with the file they override
    problems.raise_if_any()
    return opts


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
    from rich.text import Text

    st = rep.settings
    n_over = len(st["tolerance"])
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
        fail = Text("fail (first)", "bold red") if t["name"] == first else Text("fail", "red")
        mark = Text("pass", "green") if t["passed"] else fail
        # tensor names are user text (layer names may hold brackets): Text, never markup
        table.add_row(Text(t["name"]), t["kind"], f"{m['max_abs']:.2e}", f"{m['p99_abs']:.2e}",
                      str(m["outside"]), mark)
    c = Console(highlight=False)
    c.print(table)
    for w in rep.warnings:
        c.print(Text.assemble(("warning:", "yellow"), " ", w))
    if rep.oracle is not None and not rep.oracle.get("ran"):
        c.print(Text.assemble(("oracle:", "yellow"), " ", rep.oracle["reason"]))
    for r in (rep.streaming or {}).get("runs", []):
        mark = ("pass", "green") if r["passed"] else ("fail", "red")
        c.print(Text.assemble(("streaming:", "cyan"), f" chunk {r['chunk']}: {r['calls']} calls, max |Δ| "
                              f"{r['max_abs']:.2e} vs whole window ", mark))
    for r in (rep.long_stream or {}).get("sets", []):
        mark = ("pass", "green") if r["passed"] else ("fail", "red")
        c.print(Text.assemble(("long stream:", "cyan"), " ", Text(r["label"]),
                              f": {r['rows']} × {r['steps']} steps in {r['calls']} calls, max |Δ| outputs "
                              f"{r['max_abs_outputs']:.2e}, states {r['max_abs_states']:.2e} vs source ", mark))


@exits_on_error
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

    meta = build_recording(data, out, window, stride, horizon, _split(columns), _split(targets), force)
    tshape = f", targets {meta['targets_shape']}" if meta["targets_shape"] else ""
    typer.echo(f"wrote {out}: windows {meta['windows_shape']}{tshape} from {meta['rows']} rows")
    typer.echo(f"features: {', '.join(meta['columns'])}")
    if meta["targets"]:
        typer.echo(f"targets: {', '.join(meta['targets'])}")


def register(app: typer.Typer) -> None:
    app.command("verify")(verify)
    app.command("windows")(windows)
