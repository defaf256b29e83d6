"""A Markdown summary of a verify report: headline, provenance, window sets, one row per tensor.

An untrained export is announced right under the headline; the provenance section compares the
given source and weights files with those the ONNX file records (``seqgate.verify.provenance``).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from seqgate.util.files import write_text_atomic


def _g(x: Any) -> str:
    return "—" if x is None else (f"{x:.3g}" if isinstance(x, float) else str(x))


UNTRAINED_BANNER = ("> **UNTRAINED MODEL** — the ONNX file was exported from the factory's initial "
                    "parameters without weights, on purpose (`--untrained`). It is not a trained release.")


def provenance_markdown(prov: dict[str, Any]) -> list[str]:
    """The provenance section: status, then one row per file role (given vs recorded sha256)."""
    if not prov:
        return []
    lines = ["## Provenance", "", f"**{prov['status']}**: {prov['detail']}", "",
             "| role | given file | sha256 | recorded in the ONNX file | recorded sha256 | same |",
             "|---|---|---|---|---|---|"]
    for e in prov["files"]:
        same = {True: "yes", False: "**NO**", None: "not recorded"}[e["matches"]]
        lines.append(f"| {e['role']} | `{e.get('path') or e.get('text') or '—'}` | `{_g(e.get('sha256'))}` | "
                     f"{_g(e.get('recorded_name'))} | `{_g(e.get('recorded_sha256'))}` | {same} |")
    notes = [f"- {e['role']}: {e['note']}" for e in prov["files"] if e.get("note")]
    return lines + (["", *notes] if notes else []) + [""]


def verify_markdown(report: Any) -> str:
    doc = report.to_json()
    lines = ["# seqgate verify", "", f"**{report.headline()}**", ""]
    prov = doc.get("provenance") or {}
    if prov.get("untrained"):
        lines += [UNTRAINED_BANNER, ""]
    lines += [f"- model: `{doc['model']['path']}` (sha256 `{doc['model']['sha256'][:16]}…`)",
              f"- source: `{doc['source']['text']}` ({doc['source']['framework']})",
              f"- tolerance: atol {doc['settings']['atol']:g}, rtol {doc['settings']['rtol']:g}; "
              f"seed {doc['seed']}",
              ""]
    lines += provenance_markdown(prov)
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
