"""The gate report's mask chart: valid against padded steps of every window set that has padding.

Input is the verify report dict (``schema: "seqgate.verify/1"``): each recording whose
``notes`` carry ``padding_steps`` and ``steps`` (a padded model's recordings, counted by
``verify.padded_steps``, and the padded synthetic sets) gets one horizontal bar, split into
its valid steps (``steps − padding_steps``) and its padded steps, beside a table of the same
counts. Every step, padded or not, was compared: the chart says how much of the comparison was
about padding. matplotlib (Agg) is imported only when there is something to draw.
"""

from __future__ import annotations

import base64
import html
import io
from typing import Any


def mask_counts(verify: dict[str, Any] | None) -> list[tuple[str, int, int]]:
    """``(label, valid steps, padded steps)`` of each set with padding counts, in report order."""
    out = []
    for rec in (verify or {}).get("recordings", []):
        notes = rec.get("notes") or {}
        if "padding_steps" in notes and "steps" in notes:
            padded = int(notes["padding_steps"])
            out.append((str(rec["label"]), int(notes["steps"]) - padded, padded))
    return out


def mask_chart(counts: list[tuple[str, int, int]]) -> str:
    """A data-URI PNG: one stacked bar per set, valid steps then padded steps."""
    import matplotlib

    matplotlib.use("Agg", force=True)
    from matplotlib.figure import Figure

    fig = Figure(figsize=(8.5, 0.6 + 0.42 * len(counts)), dpi=110)
    ax = fig.add_subplot(1, 1, 1)
    labels = [c[0] for c in counts]
    valid = [c[1] for c in counts]
    padded = [c[2] for c in counts]
    rows = range(len(counts))
    ax.barh(rows, valid, color="#2f7d4f", label="valid steps")
    ax.barh(rows, padded, left=valid, color="#c9ced6", hatch="//", edgecolor="#8a939e", label="padded steps")
    ax.set_yticks(list(rows), labels, fontsize=8)
    ax.invert_yaxis()
    ax.set_xlabel("time steps compared (all windows of the set)")
    ax.legend(fontsize=8, loc="lower right")
    ax.grid(axis="x", alpha=0.3)
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def mask_section(verify: dict[str, Any] | None) -> str:
    """The HTML of the mask chart and its table ('' when no set has padding counts)."""
    counts = mask_counts(verify)
    if not counts:
        return ""
    e = html.escape
    rows = "".join(
        f"<tr><td>{e(label)}</td><td class='num'>{v}</td><td class='num'>{p}</td>"
        f"<td class='num'>{p / max(v + p, 1):.1%}</td></tr>" for label, v, p in counts)
    table = ("<table class='mask'><thead><tr><th>window set</th><th>valid steps</th><th>padded steps</th>"
             f"<th>padded share</th></tr></thead><tbody>{rows}</tbody></table>")
    return ("<h3>Masks: valid and padded steps</h3><p class='note'>The model takes lengths or a mask. Every "
            "step was compared, padded ones included (their values are defined by the masking rules); "
            "this is how many of them were padding in each window set.</p>"
            f'<p><img alt="valid and padded steps per window set" src="{mask_chart(counts)}"></p>{table}')
