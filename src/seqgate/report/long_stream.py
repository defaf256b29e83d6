"""The long-stream section of reports: the gate's ``long_stream`` check, its HTML table and chart.

Input: the ``long_stream`` dict of a verify report (``seqgate.verify.long_stream``). The chart
draws, per set, the per-step error growth curve along the stream — max |Δ| against the source
framework per (binned) step, outputs solid and states dashed — log scale, with atol as a line
and the call boundaries of the first set as faint vertical lines.
"""

from __future__ import annotations

import html
from typing import Any

from seqgate.report.charts import finish_error_axes, new_axes, png_data_uri


def long_stream_check_entry(section: dict[str, Any]) -> dict[str, Any]:
    """The gate check ``long_stream``: passed, and one line of detail."""
    sets = section.get("sets", [])
    first = section.get("first_failure")
    if first:
        detail = first["message"]
    elif not sets:
        detail = "no window set with a time axis to make long streams from"
    else:
        worst = max(max(s["max_abs_outputs"], s["max_abs_states"]) for s in sets)
        growth = [s["growth"] for s in sets if s.get("growth") is not None]
        detail = (f"{len(sets)} sets of {sets[0]['rows']} streams, {section.get('factor')}× the window "
                  f"({sets[0]['steps']} steps), equal the source at every step (max |Δ| {worst:.3g}"
                  + (f"; last window / first window {max(growth):.3g}" if growth else "") + ")")
    return {"name": "long_stream", "passed": bool(section.get("passed")), "detail": detail}


def _points(values: list[float | None]) -> list[float]:
    """Log-scale points: 0 drawn at 1e-12, a bin where nothing was compared (None) left out (NaN)."""
    return [float("nan") if v is None else max(float(v), 1e-12) for v in values]


def long_stream_chart(section: dict[str, Any]) -> str | None:
    """PNG data URI of the per-step growth curves (module docstring)."""
    sets = [s for s in section.get("sets", []) if s.get("outputs_max_abs")]
    if not sets:
        return None
    fig, ax = new_axes()
    for s in sets:
        xs = [i * s["step_bin"] for i in range(len(s["outputs_max_abs"]))]
        line = ax.plot(xs, _points(s["outputs_max_abs"]), lw=1.2, marker=".", ms=2,
                       label=f"{s['label']} outputs")
        ax.plot(xs, _points(s["states_max_abs"]), lw=1, ls="--", color=line[0].get_color(),
                label=f"{s['label']} states")
    for k in range(1, sets[0]["calls"]):
        ax.axvline(k * sets[0]["chunk"], color="#999999", lw=0.4, alpha=0.4)
    finish_error_axes(ax, section.get("atol"), "step of the long stream", "max |Δ| vs source",
                      f"long stream ({section.get('factor')}× the window): error growth per step")
    return png_data_uri(fig)


def long_stream_html(section: dict[str, Any] | None) -> str:
    """The HTML section: one row per set, how its rows were formed, the first problems, the chart."""
    if not section:
        return ""
    e = html.escape
    rows = []
    for s in section.get("sets", []):
        mark = '<span class="ok">pass</span>' if s["passed"] else '<span class="bad">fail</span>'
        growth = "—" if s.get("growth") is None else f"{s['growth']:.3g}"
        rows.append(f"<tr><td>{e(s['label'])}</td><td class='num'>{s['rows']} × {s['steps']}</td>"
                    f"<td class='num'>{s['calls']}</td><td class='num'>{s['max_abs_outputs']:.3g}</td>"
                    f"<td class='num'>{s['max_abs_states']:.3g}</td><td class='num'>{growth}</td>"
                    f"<td>{mark}</td></tr>")
    how = "".join(f"<li>{e(s['label'])}: {e(s['how'])}; source: {e(s['source_run'])}</li>"
                  for s in section.get("sets", []))
    fails = [f for s in section.get("sets", []) for f in s["failures"]][:5]
    problems = "".join(f"<li>{e(f)}</li>" for f in fails)
    chart = long_stream_chart(section)
    return (
        f"<h2>Long stream</h2><p class='note'>Streams {section.get('factor')}× the window length, run "
        "through the streaming file one window per call (states fed forward) and through the source "
        "framework; every output and hidden state compared at every step.</p>"
        "<table><tr><th>set</th><th>streams × steps</th><th>calls</th><th>max |Δ| outputs</th>"
        "<th>max |Δ| states</th><th>last / first window</th><th></th></tr>" + "".join(rows) + "</table>"
        + f"<ul>{how}</ul>" + (f"<ul>{problems}</ul>" if problems else "")
        + (f"<img alt='long-stream error growth chart' src='{chart}'>" if chart else "")
    )
