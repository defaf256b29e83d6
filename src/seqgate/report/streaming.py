"""The streaming section of reports: the gate's ``streaming`` check, its HTML table and chart.

Input: the ``streaming`` dict of a verify report (``seqgate.verify.streaming``). The chart draws,
per chunk size, the max |Δ| after each call along the stream (against the whole-window run,
solid; against the source framework, dashed), log scale, with atol as a line.
"""

from __future__ import annotations

import html
from typing import Any

from seqgate.report.charts import finish_error_axes, new_axes, png_data_uri


def streaming_check_entry(section: dict[str, Any]) -> dict[str, Any]:
    """The gate check ``streaming``: passed, and one line of detail."""
    runs = section.get("runs", [])
    fails = [f for r in runs for f in r["failures"]]
    if fails:
        detail = f"{len(fails)} problem{'s' if len(fails) != 1 else ''}; first: {fails[0]}"
    else:
        sizes = ", ".join(str(r["chunk"]) for r in runs)
        worst = max((r["max_abs"] for r in runs), default=0.0)
        worst_src = max((r["max_abs_source"] or 0.0 for r in runs), default=0.0)
        detail = (f"chunks of {sizes} steps on {section.get('windows', 0)} windows equal the whole window "
                  f"(max |Δ| {worst:.3g}; vs source {worst_src:.3g}); {len(section.get('states', []))} "
                  f"state pairs fed forward")
    return {"name": "streaming", "passed": bool(section.get("passed")), "detail": detail}


def streaming_chart(section: dict[str, Any]) -> str | None:
    """PNG data URI of the per-call max |Δ| along each stream (module docstring)."""
    runs = [r for r in section.get("runs", []) if r.get("per_chunk_max_abs")]
    if not runs:
        return None
    fig, ax = new_axes()
    for r in runs:
        xs = [min((k + 1) * r["chunk"], 10**9) for k in range(len(r["per_chunk_max_abs"]))]
        line = ax.plot(xs, [max(float(v), 1e-12) for v in r["per_chunk_max_abs"]], lw=1.2,
                       label=f"chunk {r['chunk']} vs whole window")
        if r.get("per_chunk_source_max_abs"):
            ax.plot(xs, [max(float(v), 1e-12) for v in r["per_chunk_source_max_abs"]], lw=1, ls="--",
                    color=line[0].get_color(), label=f"chunk {r['chunk']} vs source")
    finish_error_axes(ax, section.get("atol"), "steps streamed (end of call)", "max |Δ| after the call",
                      "streaming: drift along the stream")
    return png_data_uri(fig)


def streaming_html(section: dict[str, Any] | None) -> str:
    """The HTML section: one row per chunk size, the first problems, and the chart."""
    if not section:
        return ""
    e = html.escape
    rows = []
    for r in section.get("runs", []):
        src = "—" if r.get("max_abs_source") is None else f"{r['max_abs_source']:.3g}"
        mark = '<span class="ok">pass</span>' if r["passed"] else '<span class="bad">fail</span>'
        rows.append(f"<tr><td class='num'>{r['chunk']}</td><td class='num'>{r['calls']}</td>"
                    f"<td class='num'>{r['max_abs']:.3g}</td><td class='num'>{src}</td><td>{mark}</td></tr>")
    fails = [f for r in section.get("runs", []) for f in r["failures"]][:5]
    problems = "".join(f"<li>{e(f)}</li>" for f in fails)
    chart = streaming_chart(section)
    states = ", ".join(f"{s['output']} → {s['input']}" for s in section.get("states", []))
    return (
        "<h2>Streaming</h2><p class='note'>Each window streamed in chunks, state outputs fed back as the "
        f"next call's state inputs ({e(states)}); compared with the whole-window run and the source "
        f"framework on {section.get('windows', 0)} windows.</p>"
        "<table><tr><th>chunk (steps per call)</th><th>calls</th><th>max |Δ| vs whole window</th>"
        "<th>max |Δ| vs source</th><th></th></tr>" + "".join(rows) + "</table>"
        + (f"<ul>{problems}</ul>" if problems else "")
        + (f"<img alt='streaming drift chart' src='{chart}'>" if chart else "")
    )
