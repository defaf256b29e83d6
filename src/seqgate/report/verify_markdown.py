"""A Markdown summary of a verify report: headline, first divergence, one row per tensor."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from seqgate.util.files import write_text_atomic


def _g(x: Any) -> str:
    return "—" if x is None else (f"{x:.3g}" if isinstance(x, float) else str(x))


def verify_markdown(report: Any) -> str:
    doc = report.to_json()
    lines = ["# seqgate verify", "", f"**{report.headline()}**", ""]
    lines += [f"- model: `{doc['model']['path']}` (sha256 `{doc['model']['sha256'][:16]}…`)",
              f"- source: `{doc['source']['text']}` ({doc['source']['framework']})",
              f"- tolerance: atol {doc['settings']['atol']:g}, rtol {doc['settings']['rtol']:g}; "
              f"seed {doc['seed']}",
              ""]
    lines += ["## Window sets", "", "| set | kind | windows | sha256 |", "|---|---|---:|---|"]
    for r in doc["recordings"]:
        lines.append(f"| {r['label']} | {r['kind']} | {r['windows']} | {(r['sha256'] or '')[:16]} |")
    lines += ["", "## Tensors", "",
              "| tensor | kind | max abs | p99 abs | max rel | outside | drift first→last | top-1 | status |",
              "|---|---|---:|---:|---:|---:|---|---:|---|"]
    for t in doc["tensors"]:
        m = t["metrics"]
        drift = f"{_g(m.get('drift_first'))} → {_g(m.get('drift_last'))}" if "drift_first" in m else "—"
        top1 = f"{m['top1_agreement']:.4f}" if "top1_agreement" in m else "—"
        status = "pass" if t["passed"] else "**fail**"
        lines.append(f"| `{t['name']}` | {t['kind']} | {_g(m['max_abs'])} | {_g(m['p99_abs'])} | "
                     f"{_g(m['max_rel'])} | {m['outside']} | {drift} | {top1} | {status} |")
    if doc.get("oracle"):
        o = doc["oracle"]
        lines += ["", "## Oracle (onnx.reference)", ""]
        if not o["ran"]:
            lines.append(f"Not run: {o['reason']}")
        for w in o.get("windows", []):
            bad = [f"`{t['name']}`: {t['verdict']}" for t in w["tensors"] if t["verdict"] != "agree"]
            lines.append(f"- {w['recording']} window {w['window']}: {', '.join(bad) or 'all agree'}")
    for w in doc["warnings"]:
        lines.append(f"\n> warning: {w}")
    return "\n".join(lines) + "\n"


def write_verify_markdown(report: Any, path: str | Path) -> None:
    write_text_atomic(path, verify_markdown(report))
