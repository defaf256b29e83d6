"""``seqgate profile``: the command. Parses, calls ``seqgate.profile.profile_model``, prints with rich.

Exit 0 when every budget holds (or none is given), 1 when one is missed, 2 for bad usage or input.
Progress goes to stderr while measuring; the tables go to stdout at the end. Report files are
replaced if they exist (a report is regenerated, not hand-edited); their directory must exist,
which is checked before anything is timed.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

import typer

from seqgate.errors import EXIT_CHECK_FAILED, SeqgateError
from seqgate.util.files import check_output_path


def profile_command(
    model: Annotated[Path, typer.Argument(help="ONNX file written by seqgate export.")],
    seq_lens: Annotated[str, typer.Option("--seq-lens", help="Sequence lengths, comma-separated.")] = (
        "1,8,32,128,512"),
    batch: Annotated[str, typer.Option("--batch", help="Batch sizes, comma-separated.")] = "1",
    threads: Annotated[str, typer.Option("--threads", help="Intra-op thread counts, comma-separated.")] = "1",
    warmup: Annotated[int, typer.Option(help="Untimed runs per point.")] = 10,
    min_runs: Annotated[int, typer.Option("--min-runs", help="At least this many timed runs per point.")] = 100,
    min_time: Annotated[float, typer.Option("--min-time", help="And at least this many seconds.")] = 1.0,
    budget: Annotated[list[str] | None, typer.Option(
        "--budget", help="T=MS: at length T the percentile must be <= MS ms (repeatable; "
        "lengths not in --seq-lens are measured too).")] = None,
    percentile: Annotated[int, typer.Option(help="Percentile judged by budgets: 50, 90 or 99.")] = 99,
    source: Annotated[str | None, typer.Option(
        help="Time the source too: a Keras file, or FILE.py:FACTORY for PyTorch.")] = None,
    weights: Annotated[str | None, typer.Option(help="PyTorch state dict for a factory source.")] = None,
    seed: Annotated[int, typer.Option(help="Seed of the generated inputs.")] = 0,
    report: Annotated[Path | None, typer.Option("--report", help="Write the JSON report here.")] = None,
    csv: Annotated[Path | None, typer.Option("--csv", help="Write one CSV row per point here.")] = None,
    plot: Annotated[Path | None, typer.Option("--plot", help="Write a PNG plot of latency vs T here.")] = None,
) -> None:
    """Measure CPU latency per sequence length with ONNX Runtime, against budgets and the source."""
    from seqgate.cli.app import _fail
    from seqgate.profile.run import profile_model
    from seqgate.report.profile_report import write_csv, write_json, write_plot

    try:
        for path, option in ((report, "--report"), (csv, "--csv"), (plot, "--plot")):
            if path is not None:
                check_output_path(path, option)
        with _progress() as progress:
            result = profile_model(
                model, seq_lens=seq_lens, batches=batch, threads=threads, warmup=warmup,
                min_runs=min_runs, min_time=min_time, budgets=budget or [], percentile=percentile,
                source=source, weights=weights, seed=seed, progress=progress,
            )
        data = result.to_dict()
        if report is not None:
            write_json(data, report)
        if csv is not None:
            write_csv(data, csv)
        if plot is not None:
            write_plot(data, plot)
    except SeqgateError as e:
        raise _fail(e) from None
    print_tables(data)
    if not data["passed"]:
        raise typer.Exit(EXIT_CHECK_FAILED)


class _progress:
    """Context manager: a rich progress bar on stderr, handed out as a ``(done, total, label)`` callback."""

    def __enter__(self) -> Any:
        from rich.console import Console
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

        # no auto-refresh: a render thread waking up 10 times a second would run during the timed
        # calls; the bar is redrawn between points only
        self._bar = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                             TimeElapsedColumn(), console=Console(stderr=True), transient=True,
                             auto_refresh=False)
        self._bar.__enter__()
        self._task = self._bar.add_task("loading", total=None)

        def update(done: int, total: int, label: str) -> None:
            self._bar.update(self._task, completed=done, total=total, description=f"profiling {label}",
                             refresh=True)

        return update

    def __exit__(self, *exc: object) -> None:
        self._bar.__exit__(*exc)  # type: ignore[arg-type]


def _f(x: float | None, digits: int = 3) -> str:
    if x is None:
        return "—"
    return f"{x:.{digits}f}" if abs(x) < 1000 else f"{x:,.0f}"


def print_tables(data: dict[str, Any]) -> None:
    """The points table, then fits, budgets and notes."""
    from rich.console import Console
    from rich.table import Table

    probe = Console()
    # piped output has no terminal width: rich would squeeze the table into 80 columns
    c = Console(highlight=False, width=None if probe.is_terminal else 150)
    q = data["options"]["percentile"]
    t = Table(title=f"latency per point (ms) — {Path(data['model']['path']).name}")
    cols = ("runtime", "threads", "batch", "T", "p50", "p90", "p99", "max", "mean", "std", "runs",
            "seq/s", "µs/step", "GFLOP/s", "speed-up")
    for col in cols:
        t.add_column(col, justify="left" if col == "runtime" else "right")
    for p in data["points"]:
        t.add_row(p["runtime"], str(p["threads"]), str(p["batch"]), str(p["seq_len"]), _f(p["p50_ms"]),
                  _f(p["p90_ms"]), _f(p["p99_ms"]), _f(p["max_ms"]), _f(p["mean_ms"]), _f(p["std_ms"]),
                  str(p["runs"]), _f(p["sequences_per_s"], 0), _f(p["us_per_step"], 2), _f(p["gflops"], 2),
                  "—" if p["speedup"] is None else f"{p['speedup']:.2f}×")
    c.print(t)
    if data["fits"]:
        ft = Table(title=f"fit p{q}(T) = a + b·T")
        for col in ("runtime", "threads", "batch", "a (ms)", "b (µs/step)", "R²", "longest T within budget"):
            ft.add_column(col, justify="left" if col in ("runtime", "longest T within budget") else "right")
        for f in data["fits"]:
            longest = ", ".join(f"{x['budget_ms']:g} ms → {longest_text(x)}" for x in f["longest_seq_len"])
            r2 = f"{f['r2']:.4f}" + (" (poor fit)" if f.get("quality") == "poor" else "")
            ft.add_row(f["runtime"], str(f["threads"]), str(f["batch"]), _f(f["a_ms"], 4),
                       _f(f["b_ms_per_step"] * 1e3, 3), r2, longest or "—")
        c.print(ft)
    if data["budgets"]:
        bt = Table(title=f"budgets (ONNX Runtime p{q})")
        for col in ("T", "threads", "batch", "budget (ms)", "measured (ms)", "margin (ms)", "verdict"):
            bt.add_column(col, justify="right")
        for b in data["budgets"]:
            bt.add_row(str(b["seq_len"]), str(b["threads"]), str(b["batch"]), f"{b['budget_ms']:g}",
                       _f(b["measured_ms"], 4), _f(b["margin_ms"], 4),
                       "[green]holds[/]" if b["passed"] else "[bold red]missed[/]")
        c.print(bt)
    timer, env = data["timer"], data["environment"]
    c.print(f"seed {data['seed']}; timer overhead {timer['overhead_median_ns']} ns per run (reported, "
            f"not subtracted); {env['cpu']}, {env['logical_cores']} logical cores")
    for note in data["notes"]:
        c.print(f"[yellow]note:[/] {note}")
    if data["budgets"]:
        c.print("[bold green]every budget holds[/]" if data["passed"] else "[bold red]a budget was missed[/]")


def longest_text(x: dict[str, Any]) -> str:
    """A fit's longest length within a budget, labelled when it lies outside the measured lengths."""
    t = "any" if x["seq_len"] is None else str(x["seq_len"])
    if not x.get("extrapolated"):
        return t
    measured = x.get("longest_measured_seq_len")
    return f"{t} (extrapolated; measured within budget up to {'none' if measured is None else measured})"


def register(app: typer.Typer) -> None:
    """Add ``seqgate profile`` to the app."""
    app.command("profile")(profile_command)
