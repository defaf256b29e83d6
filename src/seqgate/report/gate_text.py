"""The gate's Markdown summary and JUnit XML, from the gate report dict (``seqgate.gate/1``).

JUnit layout: a suite ``gate`` with one case per check (export, verify, latency), a suite
``latency budgets`` with one case per budget verdict, then the verify suites (one per window
set, one case per tensor) exactly as ``seqgate verify --junit`` writes them.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from typing import Any


def _cell(x: Any) -> str:
    """Text for a Markdown table cell: a literal | would end the cell."""
    return str(x).replace("|", "\\|").replace("\n", " ")


def _g(x: Any) -> str:
    return "—" if x is None else (f"{x:.3g}" if isinstance(x, float) else str(x))


def _longest(b: dict[str, Any]) -> str:
    """Measured longest length within the budget, then the line's prediction, labelled."""
    measured = b.get("longest_measured_seq_len")
    out = f"measured {'none' if measured is None else measured}"
    if b.get("predicted_extrapolated") is None:
        return out
    pred = b.get("predicted_longest_seq_len")
    label = "extrapolated, not measured" if b["predicted_extrapolated"] else "within measured lengths"
    poor = ", poor fit" if b.get("fit_quality") == "poor" else ""
    return f"{out}; line predicts {'any' if pred is None else pred} ({label}{poor})"


def provenance_entry(d: dict[str, Any]) -> dict[str, Any] | None:
    """The gate's ``provenance`` check (``seqgate.verify.provenance.provenance_check``), if it ran."""
    return next((c for c in d.get("checks", []) if c.get("name") == "provenance" and "files" in c), None)


def gate_markdown(d: dict[str, Any]) -> str:
    """A Markdown summary: verdict, checks, first divergence, tensors, latency, provenance."""
    from seqgate.report.verify_markdown import UNTRAINED_BANNER

    verdict = "PASSED" if d["passed"] else "FAILED"
    prov = provenance_entry(d)
    lines = [
        f"# seqgate release gate — {d.get('model_name', '')}",
        "",
        f"**{verdict}** (exit {d['exit_code']})",
        "",
        *([UNTRAINED_BANNER, ""] if prov and prov.get("untrained") else []),
        f"- config: `{d['config_path']}`",
        f"- seqgate {d['seqgate_version']}, {d['created']}",
        "",
        "## Checks",
        "",
        "| check | verdict | detail |",
        "|---|---|---|",
    ]
    for c in d["checks"]:
        lines.append(f"| {c['name']} | {'pass' if c['passed'] else '**fail**'} | {_cell(c['detail'])} |")
    if d.get("error"):
        lines += ["", "## Error", "", "```", d["error"]["message"], "```"]
    if d.get("verify"):
        lines += _verify_lines(d["verify"])
    if d.get("profile"):
        lines += _latency_lines(d["profile"])
    if d.get("variants"):
        lines += variant_lines(d["variants"])
    lines += ["", "## Provenance", ""]
    if prov:
        lines += _provenance_lines(prov)
    lines += ["| file | sha256 |", "|---|---|"]
    for f, h in sorted(d["provenance"]["files"].items()):
        lines.append(f"| `{f}` | `{h}` |")
    lines += [
        "",
        "Passing shows the export computes what the trained model computes within the stated "
        "tolerances and met the stated budgets on the machine measured; it does not show the model is "
        "fit for a safety-relevant use.",
    ]
    return "\n".join(lines) + "\n"


def variant_lines(variants: list[dict[str, Any]]) -> list[str]:
    """The variant table: accuracy cost on recorded windows, speed-up (geometric mean), size, verdict."""
    lines = ["", "## Reduced-precision variants", "",
             "| variant | verdict | max \\|Δ\\| | top-1 agreement | label flips | forecast MAE change | "
             "speed-up vs float32 | vs source | size (bytes) |", "|---|---|---|---|---|---|---|---|---|"]
    for v in variants:
        f = v.get("figures") or {}
        fc = f.get("forecast")
        verdict = ("not made" if not v.get("made") else "accepted, chosen" if v.get("chosen")
                   else "accepted" if v.get("accepted") else "rejected")
        top1 = f.get("top1_agreement")
        lines.append(f"| {v['kind']} | {verdict} | {_g(f.get('max_abs'))} | "
                     f"{'—' if top1 is None else f'{top1:.4%}'} | {_g(f.get('label_flips'))} | "
                     f"{'—' if not fc else format(fc['relative_increase'], '+.3%')} | {_g(v.get('speedup'))} | "
                     f"{_g(v.get('speedup_vs_source'))} | {_g(v.get('size_bytes'))} |")
    return lines


def _verify_lines(v: dict[str, Any]) -> list[str]:
    """First divergence (when there is one) and the table of tensors."""
    lines: list[str] = []
    fd = v.get("first_divergence")
    if fd:
        lines += [
            "",
            "## First divergence",
            "",
            f"`{fd['tensor']}` ({fd['kind']}, layer {fd.get('layer')}) "
            f"in {fd['recording']}, step {_g(fd.get('step'))}, window {_g(fd.get('window'))}: "
            f"max |Δ| {_g(fd.get('max_abs'))}, {fd.get('outside')} elements outside.",
        ]
    lines += [
        "",
        "## Tensors",
        "",
        "| tensor | kind | max abs | p99 abs | outside | verdict |",
        "|---|---|---:|---:|---:|---|",
    ]
    for t in v["tensors"]:
        m = t["metrics"]
        lines.append(
            f"| `{t['name']}` | {t['kind']} | {_g(m['max_abs'])} | {_g(m['p99_abs'])} | "
            f"{m['outside']} | {'pass' if t['passed'] else '**fail**'} |"
        )
    return lines


def _latency_lines(p: dict[str, Any]) -> list[str]:
    """Budget verdicts (measured lengths only) and the latency points."""
    lines = [
        "",
        "## Latency budgets",
        "",
        "| seq len | batch | threads | budget ms | measured ms | longest T within budget | verdict |",
        "|---:|---:|---:|---:|---:|---|---|",
    ]
    for b in p.get("budgets") or []:
        lines.append(
            f"| {b['seq_len']} | {b['batch']} | {b['threads']} | {_g(b['budget_ms'])} | "
            f"{_g(b['measured_ms'])} | {_longest(b)} | {'pass' if b['passed'] else '**fail**'} |"
        )
    lines += ["", "Verdicts come from the percentile measured at each budget's length; a length the "
                  "latency line predicts outside the measured lengths is marked extrapolated and decides "
                  "nothing."]
    lines += [
        "",
        "## Latency points",
        "",
        "| runtime | seq len | batch | threads | p50 ms | p99 ms | speed-up |",
        "|---|---:|---:|---:|---:|---:|---:|",
    ]
    for pt in p.get("points") or []:
        lines.append(
            f"| {pt['runtime']} | {pt['seq_len']} | {pt['batch']} | {pt['threads']} | "
            f"{_g(pt['p50_ms'])} | {_g(pt['p99_ms'])} | {_g(pt.get('speedup'))} |"
        )
    return lines


def _provenance_lines(prov: dict[str, Any]) -> list[str]:
    """Given vs recorded files, and the config's reason when another source is expected."""
    lines = [f"Source and weights against the ONNX file's record: **{prov['status']}**"
             f"{' — accepted' if prov['passed'] and prov['status'] != 'match' else ''}.", ""]
    if prov.get("expected_other_source"):
        lines += [f"The config expects another source: *{_cell(prov['expected_other_source'])}*", ""]
    lines += ["| role | given file | recorded in the ONNX file | same |", "|---|---|---|---|"]
    for e in prov["files"]:
        same = {True: "yes", False: "**NO**", None: "not recorded"}[e["matches"]]
        lines.append(f"| {e['role']} | `{_cell(e.get('path') or e.get('text') or '—')}` | "
                     f"{_cell(_g(e.get('recorded_name')))} | {same} |")
    return [*lines, ""]


def _case(suite: ET.Element, classname: str, name: str, passed: bool, message: str) -> None:
    case = ET.SubElement(suite, "testcase", classname=classname, name=name)
    if not passed:
        fail = ET.SubElement(case, "failure", message=message, type="GateCheckFailed")
        fail.text = message


def _suite(root: ET.Element, name: str, items: list[dict[str, Any]]) -> ET.Element:
    failures = sum(not i["passed"] for i in items)
    return ET.SubElement(root, "testsuite", name=name, tests=str(len(items)), failures=str(failures),
                         errors="0")


def gate_junit(d: dict[str, Any]) -> bytes:
    """JUnit XML bytes (see the module docstring)."""
    root = ET.Element("testsuites", name="seqgate gate")
    checks = d["checks"]
    suite = _suite(root, "gate", checks)
    for c in checks:
        _case(suite, "gate", c["name"], c["passed"], c["detail"])
    budgets = (d.get("profile") or {}).get("budgets") or []
    if budgets:
        bs = _suite(root, "latency budgets", budgets)
        for b in budgets:
            name = (f"T={b['seq_len']} batch={b['batch']} threads={b['threads']} "
                    f"p{b['percentile']}<={b['budget_ms']}ms")
            _case(bs, "latency", name, b["passed"], f"measured {b['measured_ms']:.4g} ms")
    if d.get("verify"):
        from seqgate.report.verify_junit import verify_junit

        class _Doc:
            def to_json(self) -> dict[str, Any]:
                return d["verify"]

        for s in ET.fromstring(verify_junit(_Doc())):
            root.append(s)
    ET.indent(root)
    return ET.tostring(root, encoding="utf-8", xml_declaration=True)
