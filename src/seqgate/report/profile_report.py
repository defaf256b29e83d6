"""Writers for a profile report (``schema: "seqgate.profile/1"``): JSON, CSV of points, PNG plot.

Every writer takes the report dict (``ProfileReport.to_dict()``), so other reports (the gate's)
can reuse them on the profile section they embed. Files are written atomically.

The plot: latency (the report's percentile, p50 dashed beside it) against sequence length on
log–log axes, one line per runtime/threads/batch (padded batches, ``--lengths``, a dotted line of
their own labelled "padded batches"), each budget a red cross at (T, MS) with a
short horizontal bar. matplotlib (Agg backend) is imported only here.
"""

from __future__ import annotations

import csv
import io
import os
from typing import Any

from seqgate.report.columns import CSV_COLUMNS
from seqgate.util.files import write_atomic, write_text_atomic


def write_json(report: dict[str, Any], path: str | os.PathLike[str]) -> None:
    """The report as sorted, indented JSON."""
    import json

    write_text_atomic(path, json.dumps(report, indent=2, sort_keys=True) + "\n")


def points_csv(report: dict[str, Any]) -> str:
    """One CSV row per point, columns ``CSV_COLUMNS``; empty cells for absent figures."""
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=CSV_COLUMNS, extrasaction="ignore", lineterminator="\n")
    w.writeheader()
    for p in report["points"]:
        w.writerow({k: ("" if p.get(k) is None else p.get(k)) for k in CSV_COLUMNS})
    return buf.getvalue()


def write_csv(report: dict[str, Any], path: str | os.PathLike[str]) -> None:
    write_text_atomic(path, points_csv(report))


def plot_png(report: dict[str, Any]) -> bytes:
    """PNG bytes of latency against sequence length (see the module docstring)."""
    import matplotlib

    matplotlib.use("Agg", force=True)
    from matplotlib.figure import Figure

    q = report["options"]["percentile"]
    fig = Figure(figsize=(7.5, 4.8), dpi=110)
    ax = fig.add_subplot(1, 1, 1)
    series: dict[tuple[str, int, int, str], list[dict[str, Any]]] = {}
    for p in report["points"]:
        series.setdefault((p["runtime"], p["threads"], p["batch"], p.get("lengths", "full")), []).append(p)
    for (runtime, threads, batch, lengths), pts in sorted(series.items()):
        pts = sorted(pts, key=lambda p: p["seq_len"])
        ts = [p["seq_len"] for p in pts]
        padded = lengths != "full"
        line = ax.plot(ts, [p[f"p{q}_ms"] for p in pts], marker="s" if padded else "o",
                       linestyle=":" if padded else "-",
                       label=f"{runtime} threads={threads} batch={batch}{padded_label(lengths)} (p{q})")[0]
        if q != 50:
            ax.plot(ts, [p["p50_ms"] for p in pts], linestyle="--", color=line.get_color(), alpha=0.6)
    seen: set[tuple[int, float]] = set()
    for b in report["budgets"]:
        key = (b["seq_len"], b["budget_ms"])
        if key in seen:
            continue
        seen.add(key)
        ax.plot([b["seq_len"]], [b["budget_ms"]], marker="x", color="red", markersize=10, linestyle="")
        ax.hlines(b["budget_ms"], b["seq_len"] / 1.4, b["seq_len"] * 1.4, colors="red", linewidth=1.5)
        ax.annotate(f"budget {b['budget_ms']:g} ms", (b["seq_len"], b["budget_ms"]),
                    textcoords="offset points", xytext=(6, 6), color="red", fontsize=8)
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("sequence length T (steps)")
    ax.set_ylabel("latency (ms)")
    verdict = "" if not report["budgets"] else (" — budgets: pass" if report["passed"] else " — budgets: fail")
    ax.set_title(f"latency vs sequence length (p{q}; dashed p50){verdict}", fontsize=10)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=7, loc="upper left")
    fig.tight_layout()
    out = io.BytesIO()
    fig.savefig(out, format="png", metadata={"Software": "seqgate"})  # the mark util.ownership reads
    return out.getvalue()


def padded_label(lengths: str) -> str:
    """How a series of padded points is named in a legend ('' for full-length batches)."""
    return "" if lengths == "full" else f", padded batches ({lengths} lengths)"


def write_plot(report: dict[str, Any], path: str | os.PathLike[str]) -> None:
    write_atomic(path, plot_png(report))
