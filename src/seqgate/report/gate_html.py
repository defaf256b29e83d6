"""The gate's self-contained HTML report: inline CSS, charts as inline PNG data URIs, no network.

Order, for a release reviewer: the verdict and the table of checks; the first divergence if
verification failed; a chart of per-step error for each time-indexed probe; the tensor table
and verify's warnings; for a model taking lengths or a mask, the mask chart
(``report.mask_chart``); the latency-vs-sequence-length chart with budgets (padded batches as
dotted lines of their own) and the latency tables; the reduced-precision variants (table of
accuracy cost, speed-up, size and verdict, then each variant's checks and per-step error
curves); provenance (hashes, versions, CPU). Input is
the gate report dict (``schema: "seqgate.gate/1"``).
"""

from __future__ import annotations

import html
from typing import Any

from seqgate.report.charts import png_data_uri
from seqgate.report.long_stream import long_stream_html
from seqgate.report.mask_chart import mask_section
from seqgate.report.profile_report import padded_label
from seqgate.report.streaming import streaming_html

_CSS = """
body{font-family:system-ui,-apple-system,Segoe UI,Roboto,sans-serif;margin:2rem auto;max-width:72rem;
color:#1d232a;line-height:1.45;padding:0 1rem}
h1{font-size:1.6rem;margin-bottom:.2rem}h2{font-size:1.2rem;margin-top:2rem;border-bottom:1px solid #dde}
.verdict{display:inline-block;padding:.35rem .9rem;border-radius:.4rem;font-weight:700;font-size:1.3rem}
.pass{background:#dcf5e3;color:#0d5b26}.fail{background:#fde2e1;color:#8a1610}
table{border-collapse:collapse;margin:.6rem 0;font-size:.9rem}
th,td{border:1px solid #d6d9de;padding:.25rem .55rem;text-align:left;vertical-align:top}
th{background:#f3f5f7}td.num{text-align:right;font-variant-numeric:tabular-nums}
.ok{color:#0d5b26;font-weight:600}.bad{color:#8a1610;font-weight:600}
.note{color:#555;font-size:.9rem}img{max-width:100%;border:1px solid #e3e5e8}
code{background:#f3f5f7;padding:0 .25rem;border-radius:.2rem}
pre{background:#fdf3f2;padding:.6rem;white-space:pre-wrap}
.untrained{background:#fff1c2;border:2px solid #b07d00;padding:.6rem .9rem;border-radius:.4rem;font-weight:600}
"""


def _e(x: Any) -> str:
    return html.escape(str(x), quote=True)


def _fmt(x: Any) -> str:
    if isinstance(x, float):
        return f"{x:.3g}"
    return _e(x)


def _mark(ok: bool | None) -> str:
    if ok is None:
        return '<span class="note">not run</span>'
    return '<span class="ok">pass</span>' if ok else '<span class="bad">fail</span>'


def _pyplot() -> Any:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def drift_chart(tensors: list[dict[str, Any]], title: str) -> str | None:
    """Per-step max |error| for every time-indexed tensor of one recording (log scale)."""
    curves = [t for t in tensors if t.get("per_step_max_abs")]
    if not curves:
        return None
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(8.5, 3.6))
    for t in curves:
        ys = [max(float(v), 1e-12) for v in t["per_step_max_abs"]]
        ax.plot(range(len(ys)), ys, lw=1.2, label=t["name"])
    atol = min(float(t.get("atol", 0) or 0) for t in curves)
    if atol > 0:
        ax.axhline(atol, color="#8a1610", ls="--", lw=1, label=f"atol {atol:g}")
    ax.set_yscale("log")
    ax.set_xlabel("time step")
    ax.set_ylabel("max |onnx − source|")
    ax.set_title(title)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7, ncol=1 + len(curves) // 14, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    return png_data_uri(fig)


def latency_chart(profile: dict[str, Any], percentile: int) -> str | None:
    """Latency at the budget percentile against sequence length, one line per series."""
    points = profile.get("points") or []
    if not points:
        return None
    plt = _pyplot()
    key = f"p{percentile}_ms"
    series: dict[tuple[Any, ...], list[tuple[int, float]]] = {}
    for p in points:
        at = (p["runtime"], p["threads"], p["batch"], p.get("lengths", "full"))
        series.setdefault(at, []).append((p["seq_len"], p[key]))
    fig, ax = plt.subplots(figsize=(8.5, 3.8))
    for (rt, th, bs, lengths), pts in sorted(series.items()):
        pts.sort()
        ax.plot(
            [a for a, _ in pts],
            [b for _, b in pts],
            marker="o" if lengths == "full" else "s",
            ls="-" if lengths == "full" else ":",
            lw=1.4,
            label=f"{rt}, {th} thread{'s' if th != 1 else ''}, batch {bs}{padded_label(lengths)}",
        )
    for b in profile.get("budgets") or []:
        ax.scatter([b["seq_len"]], [b["budget_ms"]], marker="_", s=500, color="#8a1610", zorder=5)
        ax.annotate(
            f"budget {b['budget_ms']:g} ms",
            (b["seq_len"], b["budget_ms"]),
            textcoords="offset points",
            xytext=(6, 4),
            fontsize=8,
            color="#8a1610",
        )
    ax.set_xscale("log", base=2)
    ax.set_yscale("log")
    ax.set_xlabel("sequence length (steps)")
    ax.set_ylabel(f"p{percentile} latency (ms)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    return png_data_uri(fig)


def _table(headers: list[str], rows: list[list[str]], numeric: set[int] | None = None) -> str:
    numeric = numeric or set()
    head = "".join(f"<th>{_e(h)}</th>" for h in headers)
    body = "".join(
        "<tr>"
        + "".join(f'<td class="num">{c}</td>' if i in numeric else f"<td>{c}</td>" for i, c in enumerate(r))
        + "</tr>"
        for r in rows
    )
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _checks(report: dict[str, Any]) -> str:
    rows = [
        [_e(c["name"]), _mark(c.get("passed")), _e(c.get("detail", ""))] for c in report.get("checks", [])
    ]
    return _table(["check", "verdict", "detail"], rows)


def _stopped(error: dict[str, Any] | None) -> str:
    if not error:
        return ""
    return (f"<h2>Why the gate stopped</h2><p>The {_e(error.get('stage', ''))} step could not run to the end "
            f"(exit {_e(error.get('exit_code'))}):</p><pre>{_e(error.get('message', ''))}</pre>")


def _divergence(verify: dict[str, Any] | None) -> str:
    fd = (verify or {}).get("first_divergence")
    if not fd:
        return ""
    items = "".join(f"<tr><th>{_e(k)}</th><td>{_fmt(v)}</td></tr>" for k, v in fd.items())
    return (
        "<h2>First divergence</h2><p>The earliest tensor, in graph order, that leaves tolerance. "
        "Later tensors usually diverge because this one did.</p>"
        f"<table>{items}</table>"
    )


def _verify_section(verify: dict[str, Any] | None) -> str:
    if not verify:
        return ""
    parts = ["<h2>Verification</h2>", f"<p>{_e(verify.get('headline', ''))}</p>"]
    for rec in verify.get("recordings", []):
        label = rec["label"]
        curves = [
            {"name": t["name"], "atol": t["atol"], **t["by_recording"][label]}
            for t in verify.get("tensors", [])
            if label in t.get("by_recording", {})
        ]
        chart = drift_chart(curves, f"per-step error — {label}")
        parts.append(
            f"<h3>{_e(label)} <span class='note'>({_e(rec.get('kind', ''))}, "
            f"{_e(rec.get('windows', ''))} windows)</span></h3>"
        )
        if chart:
            parts.append(f'<p><img alt="per-step error, {_e(label)}" src="{chart}"></p>')
    rows = []
    for t in verify.get("tensors", []):
        m = t.get("metrics", {})
        top1 = m.get("top1_agreement")
        rows.append(
            [
                _e(t["name"]),
                _e(t.get("kind", "")),
                _e(t.get("layer") or ""),
                _fmt(m.get("max_abs")),
                _fmt(m.get("max_rel")),
                _fmt(m.get("p99_abs")),
                _fmt(m.get("outside")),
                _fmt(top1) if top1 is not None else "",
                _fmt(t.get("atol")),
                _fmt(t.get("rtol")),
                _mark(t.get("passed")),
            ]
        )
    parts.append("<h3>Every tensor, all recordings</h3>")
    parts.append(
        _table(
            [
                "tensor",
                "kind",
                "layer",
                "max abs",
                "max rel",
                "p99 abs",
                "outside",
                "top-1",
                "atol",
                "rtol",
                "verdict",
            ],
            rows,
            {3, 4, 5, 6, 7, 8, 9},
        )
    )
    for w in verify.get("warnings", []):
        parts.append(f"<p class='note'>warning: {_e(w)}</p>")
    return "".join(parts)


def _longest_cell(b: dict[str, Any]) -> str:
    """Longest length within the budget: measured, and the line's prediction labelled when extrapolated."""
    measured = b.get("longest_measured_seq_len")
    out = f"measured: {_e('none' if measured is None else measured)}"
    pred = b.get("predicted_longest_seq_len")
    if b.get("predicted_extrapolated") is None:
        return out
    label = "extrapolated, not measured" if b.get("predicted_extrapolated") else "within measured lengths"
    pred_text = "any" if pred is None else pred
    poor = ", poor fit" if b.get("fit_quality") == "poor" else ""
    return f"{out}<br><span class='note'>line predicts {_e(pred_text)} ({label}{poor})</span>"


def _profile_section(profile: dict[str, Any] | None, percentile: int) -> str:
    if not profile:
        return ""
    parts = ["<h2>Latency</h2>"]
    chart = latency_chart(profile, percentile)
    if chart:
        parts.append(f'<p><img alt="latency against sequence length" src="{chart}"></p>')
    brows = [
        [
            _e(b["seq_len"]),
            _e(b["batch"]),
            _e(b["threads"]),
            _fmt(b["budget_ms"]),
            _fmt(b.get("measured_ms")),
            _longest_cell(b),
            _mark(b.get("passed")),
        ]
        for b in profile.get("budgets") or []
    ]
    if brows:
        heads = [
            "seq len",
            "batch",
            "threads",
            "budget ms",
            f"p{percentile} ms",
            "longest T within budget",
            "verdict",
        ]
        parts.append(_table(heads, brows, {0, 1, 2, 3, 4}))
        parts.append("<p class='note'>Every verdict is from the measured percentile at the budget's length. "
                     "A length predicted by the latency line outside the measured lengths is an "
                     "extrapolation and never decides a verdict.</p>")
    for n in profile.get("notes") or []:
        parts.append(f"<p class='note'>{_e(n)}</p>")
    rows = [
        [
            _e(p["runtime"]),
            _e(p["seq_len"]),
            _e(p["batch"]),
            _e(p["threads"]),
            _e(padded_label(p.get("lengths", "full")).removeprefix(", ") or "full"),
            _fmt(p.get("p50_ms")),
            _fmt(p.get("p90_ms")),
            _fmt(p.get("p99_ms")),
            _e(p.get("runs")),
            _fmt(p.get("speedup", "")),
        ]
        for p in profile.get("points") or []
    ]
    parts.append(
        _table(
            ["runtime", "seq len", "batch", "threads", "rows", "p50 ms", "p90 ms", "p99 ms", "runs",
             "speed-up"],
            rows,
            {1, 2, 3, 5, 6, 7, 8, 9},
        )
    )
    return "".join(parts)


def _untrained(report: dict[str, Any]) -> str:
    from seqgate.report.gate_text import provenance_entry

    check = provenance_entry(report)
    if not check or not check.get("untrained"):
        return ""
    return ("<p class='untrained'>UNTRAINED MODEL — the ONNX file was exported from the factory's initial "
            "parameters without weights, on purpose (untrained). It is not a trained release.</p>")


def _provenance_check(report: dict[str, Any]) -> str:
    """Given source/weights files against those the ONNX file records, and any accepted reason."""
    from seqgate.report.gate_text import provenance_entry

    check = provenance_entry(report)
    if not check:
        return ""
    accepted = " — accepted" if check["passed"] and check["status"] != "match" else ""
    status = _e(check["status"])
    parts = [f"<p>Source and weights against the ONNX file's record: <b>{status}</b>{accepted}.</p>"]
    if check.get("expected_other_source"):
        parts.append(f"<p>The config expects another source: <i>{_e(check['expected_other_source'])}</i></p>")
    same = {True: _mark(True).replace("pass", "same"), False: _mark(False).replace("FAIL", "DIFFERS"),
            None: '<span class="note">not recorded</span>'}
    rows = [[_e(f["role"]), f"<code>{_e(f.get('path') or f.get('text') or '—')}</code>",
             f"<code>{_e(f.get('sha256') or '—')}</code>", _e(f.get("recorded_name") or "—"),
             f"<code>{_e(f.get('recorded_sha256') or '—')}</code>", same[f["matches"]]] for f in check["files"]]
    heads = ["role", "given file", "sha256", "recorded in the ONNX file", "recorded sha256", "same"]
    parts.append(_table(heads, rows))
    return "".join(parts)


def _provenance(report: dict[str, Any]) -> str:
    prov = report.get("provenance", {})
    env = report.get("environment", {})
    rows = [[_e(k), f"<code>{_e(v)}</code>"] for k, v in sorted(prov.get("files", {}).items())]
    parts = ["<h2>Provenance</h2>", _provenance_check(report), _table(["file", "sha256"], rows)]
    erows = [[_e(k), _e(v)] for k, v in env.items() if k != "libraries"]
    erows += [[_e(k), _e(v)] for k, v in sorted((env.get("libraries") or {}).items())]
    parts.append(_table(["environment", "value"], erows))
    return "".join(parts)


def _variant_row(v: dict[str, Any]) -> list[str]:
    f = v.get("figures") or {}
    fc = f.get("forecast") or {}
    int8 = sum(n["precision"] == "int8" for n in v.get("nodes", []))
    size = v.get("size_bytes")
    verdict = ("not made" if not v.get("made") else "<b>accepted, chosen</b>" if v.get("chosen")
               else _mark(bool(v.get("accepted"))).replace("pass", "accepted").replace("fail", "rejected"))
    return [_e(v["kind"]), verdict, f"{int8} of {len(v.get('nodes', []))}", _fmt(f.get("max_abs")),
            "" if f.get("top1_agreement") is None else f"{f['top1_agreement']:.4%}",
            _fmt(f.get("label_flips", "")),
            "" if not fc else f"{fc['relative_increase']:+.3%}", _fmt(v.get("speedup")),
            _fmt(v.get("speedup_vs_source")),
            "" if size is None else f"{size / 1024:.1f} KiB ({size / v['float32_size_bytes']:.0%})"]


def _precisions(v: dict[str, Any]) -> list[str]:
    """``int8: node, node`` / ``float32: node`` lines: what the quantizer changed and what it left."""
    by: dict[str, list[str]] = {}
    for n in v.get("nodes", []):
        by.setdefault(n["precision"], []).append(f"{n['node']} ({n['op']})")
    return [f"{p}: {', '.join(names)}" for p, names in sorted(by.items())]


def _variants_section(variants: list[dict[str, Any]] | None) -> str:
    """The variant table, then each variant's checks, notes and per-step error curves."""
    if not variants:
        return ""
    head = ["variant", "verdict", "int8 nodes", "max |Δ|", "top-1 agreement", "label flips",
            "forecast MAE change", "speed-up vs float32", "vs source", "size (of float32)"]
    parts = ["<h2>Reduced-precision variants</h2><p class='note'>Accuracy cost against the source "
             "framework on the recorded windows; speed-up = float32 ONNX Runtime (or source) p50 / variant "
             "p50, geometric mean over the profile points. Accepted files are in the output folder.</p>",
             _table(head, [_variant_row(v) for v in variants], {3, 5, 6, 7, 8})]
    for v in variants:
        notes = [*v.get("notes", []), *_precisions(v)]
        parts.append(f"<h3>{_e(v['kind'])}</h3><ul>" + "".join(
            f"<li>{_mark(c['passed'])} {_e(c['name'])}: {_e(c['detail'])}</li>" for c in v.get("checks", []))
            + "".join(f"<li class='note'>{_e(n)}</li>" for n in notes) + "</ul>")
        tensors = [{"name": k, "per_step_max_abs": c, "atol": v["rule"].get("atol") or 0}
                   for k, c in ((v.get("figures") or {}).get("drift") or {}).items()]
        img = drift_chart(tensors, f"{v['kind']}: per-step max |variant − source|") if tensors else None
        if img:
            parts.append(f"<img alt='per-step error of {_e(v['kind'])}' src='{img}'>")
    return "".join(parts)


def render_gate_html(report: dict[str, Any]) -> str:
    """The whole HTML document for a gate report dict."""
    passed = bool(report.get("passed"))
    verdict = (
        f'<span class="verdict {"pass" if passed else "fail"}">{"PASSED" if passed else "FAILED"}</span>'
    )
    title = f"seqgate release gate — {report.get('model_name', '')}"
    pct = int((report.get("config") or {}).get("percentile", 99))
    body = [
        f"<h1>{_e(title)}</h1>",
        f"<p>{verdict} <span class='note'>config {_e(report.get('config_path', ''))} · "
        f"seqgate {_e(report.get('seqgate_version', ''))} · {_e(report.get('created', ''))}</span></p>",
        _untrained(report),
        _checks(report),
        _stopped(report.get("error")),
        _divergence(report.get("verify")),
        _verify_section(report.get("verify")),
        streaming_html((report.get("verify") or {}).get("streaming")),
        long_stream_html((report.get("verify") or {}).get("long_stream")),
        mask_section(report.get("verify")),
        _profile_section(report.get("profile"), pct),
        _variants_section(report.get("variants")),
        _provenance(report),
        "<h2>What this report shows</h2><p class='note'>Passing shows that the exported ONNX graph computes "
        "what the trained model computes within the stated tolerances on the windows checked, and that it "
        "met the stated latency budgets on the machine measured. It does not show that the model is fit "
        "for any purpose, in particular a safety-relevant one: follow the applicable standards and get "
        "qualified review. Measure latency on the target hardware.</p>",
    ]
    return (
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>" + "".join(body) + "</body></html>"
    )
