"""``seqgate profile``: the command. Parses, calls ``seqgate.profile.profile_model``, prints with rich.

Exit 0 when every budget passes (or none is given), 1 when one fails, 2 for bad usage or input.
Progress goes to stderr while measuring; the tables go to stdout at the end. Report files are
replaced if they exist (a report is regenerated, not hand-edited); their directory must exist,
which is checked before anything is timed.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

import typer

from seqgate.cli.errors import exits_on_error
from seqgate.cli.progress import stage_display
from seqgate.errors import EXIT_CHECK_FAILED
from seqgate.settings import defaults as d
from seqgate.util.files import check_writable


def _csv(values: tuple[int, ...]) -> str:
    return ",".join(map(str, values))


@exits_on_error
def profile_command(
    model: Annotated[Path, typer.Argument(help="ONNX file written by seqgate export.")],
    seq_lens: Annotated[str, typer.Option("--seq-lens", help="Sequence lengths, comma-separated.")] = (
        _csv(d.SEQ_LENS)),
    batch_sizes: Annotated[str, typer.Option("--batch-sizes", help="Batch sizes, comma-separated.")] = (
        _csv(d.BATCH_SIZES)),
    old_batch: Annotated[str | None, typer.Option("--batch", hidden=True)] = None,
    threads: Annotated[str, typer.Option("--threads", help="Intra-op thread counts, comma-separated.")] = (
        _csv(d.THREADS)),
    warmup: Annotated[int, typer.Option("--warmup", help="Untimed runs per point.")] = d.WARMUP,
    min_runs: Annotated[int, typer.Option("--min-runs", help="At least this many timed runs per point.")] = (
        d.MIN_RUNS),
    min_time: Annotated[float, typer.Option("--min-time", help="And at least this many seconds.")] = d.MIN_TIME,
    budget: Annotated[list[str] | None, typer.Option(
        "--budget", help="T=MS: at length T the percentile must be <= MS ms (repeatable; "
        "lengths not in --seq-lens are measured too).")] = None,
    percentile: Annotated[int, typer.Option(
        "--percentile", help="Percentile judged by budgets: 50, 90 or 99.")] = d.PERCENTILE,
    source: Annotated[str | None, typer.Option(
        help="Time the source too: a Keras file, or FILE.py:FACTORY for PyTorch.")] = None,
    weights: Annotated[str | None, typer.Option(help="PyTorch state dict for a factory source.")] = None,
    custom_code: Annotated[Path | None, typer.Option(
        "--custom-code", help="Keras source: run this Python file first; it defines and registers the model's "
        "custom classes. Without it such models are refused.")] = None,
    seed: Annotated[int, typer.Option("--seed", help="Seed of the generated inputs.")] = d.SEED,
    lengths: Annotated[str, typer.Option(
        "--lengths", help="Rows of a timed batch: full (every row T steps), uniform (also padded "
        "batches, lengths uniform in 1..T) or REC.npz (padded batches with that recording's lengths); "
        "for models that take lengths or a mask.")] = d.LENGTHS,
    report: Annotated[Path | None, typer.Option("--report", help="Write the JSON report here.")] = None,
    csv: Annotated[Path | None, typer.Option("--csv", help="Write one CSV row per point here.")] = None,
    plot: Annotated[Path | None, typer.Option("--plot", help="Write a PNG plot of latency vs T here.")] = None,
    quiet: Annotated[bool, typer.Option("--quiet", help="No progress display.")] = False,
    force: Annotated[bool, typer.Option(
        "--force", help="Replace report files that seqgate did not write.")] = False,
    chunks: Annotated[str, typer.Option("--chunks", help="Streaming files: steps per call to time, "
                                        "comma-separated.")] = _csv(d.CHUNKS),
    call_budget: Annotated[list[str] | None, typer.Option(
        "--call-budget", help="Streaming files, N=MS: a call carrying N new steps must take <= MS ms at "
        "the percentile (repeatable).")] = None,
) -> None:
    """Measure CPU latency per sequence length with ONNX Runtime, against budgets and the source."""
    from seqgate.profile.run import profile_model
    from seqgate.report.profile_report import write_csv, write_json, write_plot

    opts = _parse_options(seq_lens, old_batch or batch_sizes, threads, warmup, min_runs, min_time,
                          budget or [], percentile, seed, chunks, call_budget or [], lengths)
    for path, option in ((report, "--report"), (csv, "--csv"), (plot, "--plot")):
        if path is not None:
            check_writable(path, force, option)
    with stage_display(quiet) as progress:
        result = profile_model(model, source=source, weights=weights, progress=progress,
                               custom_code=custom_code, **opts)
    data = result.to_dict()
    for path, write in ((report, write_json), (csv, write_csv), (plot, write_plot)):
        if path is not None:
            write(data, path)
    print_tables(data)
    if not data["passed"]:
        raise typer.Exit(EXIT_CHECK_FAILED)


def _parse_options(seq_lens: str, batch_sizes: str, threads: str, warmup: int, min_runs: int, min_time: float,
                   budgets: list[str], percentile: int, seed: int, chunks: str = _csv(d.CHUNKS),
                   call_budgets: list[str] | None = None, lengths: str = d.LENGTHS) -> dict[str, Any]:
    """Every option through its parser in ``seqgate.settings``; all problems in one error (exit 2)."""
    from seqgate.settings import CLI, Problems, parse_seed, parse_settings

    problems = Problems()
    opts = parse_settings("profile", {
        "seq_lens": seq_lens, "batch_sizes": batch_sizes, "threads": threads, "warmup": warmup,
        "min_runs": min_runs, "min_time": min_time, "budget": budgets, "percentile": percentile,
        "chunks": chunks, "call_budget": call_budgets or [], "lengths": lengths,
    }, CLI, problems)
    checked_seed = problems.take(parse_seed, seed, "--seed")
    problems.raise_if_any()
    return {"seq_lens": opts["seq_lens"], "batch_sizes": opts["batch_sizes"], "threads": opts["threads"],
            "warmup": opts["warmup"], "min_runs": opts["min_runs"], "min_time": opts["min_time"],
            "budgets": opts["budget"], "percentile": opts["percentile"], "seed": checked_seed,
            "chunks": opts["chunks"], "call_budgets": opts["call_budget"], "lengths": opts["lengths"]}


def _f(x: float | None, digits: int = 3) -> str:
    if x is None:
        return "—"
    return f"{x:.{digits}f}" if abs(x) < 1000 else f"{x:,.0f}"


def print_tables(data: dict[str, Any]) -> None:
    """The points table, then fits, budgets and notes."""
    from rich.console import Console
    from rich.table import Table
    from rich.text import Text

    from seqgate.report.profile_report import padded_label

    probe = Console()
    # piped output has no terminal width: rich would squeeze the table into 80 columns
    c = Console(highlight=False, width=None if probe.is_terminal else 150)
    q = data["options"]["percentile"]
    t = Table(title=Text(f"latency per point (ms) — {Path(data['model']['path']).name}"))
    cols = ("runtime", "threads", "batch", "T", "p50", "p90", "p99", "max", "mean", "std", "runs",
            "seq/s", "µs/step", "GFLOP/s", "speed-up")
    for col in cols:
        t.add_column(col, justify="left" if col == "runtime" else "right")
    for p in data["points"]:
        t.add_row(p["runtime"], str(p["threads"]), str(p["batch"]), _t_cell(p), _f(p["p50_ms"]),
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
            ft.add_row(f["runtime"] + padded_label(f.get("lengths", "full")), str(f["threads"]),
                       str(f["batch"]), _f(f["a_ms"], 4), _f(f["b_ms_per_step"] * 1e3, 3), r2, longest or "—")
        c.print(ft)
    if data["budgets"]:
        bt = Table(title=f"budgets (ONNX Runtime p{q})")
        for col in ("T", "threads", "batch", "budget (ms)", "measured (ms)", "margin (ms)", "verdict"):
            bt.add_column(col, justify="right")
        for b in data["budgets"]:
            bt.add_row(str(b["seq_len"]), str(b["threads"]), str(b["batch"]), f"{b['budget_ms']:g}",
                       _f(b["measured_ms"], 4), _f(b["margin_ms"], 4),
                       Text("pass", "green") if b["passed"] else Text("fail", "bold red"))
        c.print(bt)
    _print_streaming(c, data.get("streaming"))
    timer, env = data["timer"], data["environment"]
    c.print(Text(f"seed {data['seed']}; timer overhead {timer['overhead_median_ns']} ns per run (reported, "
                 f"not subtracted); {env['cpu']}, {env['logical_cores']} logical cores"))
    for note in data["notes"]:
        c.print(Text.assemble(("note:", "yellow"), " ", note))
    if data["budgets"]:
        over = sum(not b["passed"] for b in data["budgets"])
        c.print(Text(f"PASSED: every budget met at p{q}", "bold green") if data["passed"] else
                Text(f"FAILED: {over} of {len(data['budgets'])} budget verdicts over budget at p{q}",
                     "bold red"))


def _print_streaming(c: Any, st: dict[str, Any] | None) -> None:
    """Per-call latency of a streaming file, then its per-call budgets."""
    if not st:
        return
    from rich.table import Table
    from rich.text import Text

    q = st["percentile"]
    t = Table(title=f"streaming: per-call latency ({st['states']} state inputs fed)")
    cols = ("steps per call", "threads", "batch", "p50 (ms)", "p90 (ms)", "p99 (ms)", f"p{q} µs/sample", "runs")
    for col in cols:
        t.add_column(col, justify="right")
    for p in st["points"]:
        t.add_row(str(p["chunk"]), str(p["threads"]), str(p["batch"]), _f(p["p50_ms"], 4), _f(p["p90_ms"], 4),
                  _f(p["p99_ms"], 4), _f(p["us_per_sample"][f"p{q}"], 1), str(p["runs"]))
    c.print(t)
    for b in st["call_budgets"]:
        mark = Text("pass", "green") if b["passed"] else Text("fail", "bold red")
        c.print(Text.assemble(f"call budget: {b['chunk']} steps per call ≤ {b['budget_ms']:g} ms at p{q}: "
                              f"measured {b['measured_ms']:.4g} ms ", mark))


def _t_cell(p: dict[str, Any]) -> str:
    """T, marked when the point is a padded batch (its valid share of the steps beside it)."""
    if not p.get("padded"):
        return str(p["seq_len"])
    share = p["valid_steps"] / (p["batch"] * p["seq_len"])
    return f"{p['seq_len']} padded ({p['lengths']}, {share:.0%} valid)"


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
