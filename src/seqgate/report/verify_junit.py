"""JUnit XML for CI: one test suite per recording, one test case per tensor.

A failing case carries a ``<failure>`` whose message is the metric summary (max |Δ|, elements
outside tolerance, worst window/step, tolerance).
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from pathlib import Path
from typing import Any

from seqgate.util.files import write_atomic


def _summary(name: str, res: dict[str, Any], atol: float, rtol: float) -> str:
    m = res["metrics"]
    w = m.get("worst") or {}
    step = f", step {w.get('step')}" if w.get("step") is not None else ""
    return (f"{name}: max |Δ| {m['max_abs']:.3g}, p99 {m['p99_abs']:.3g}, {m['outside']} of {m['elements']} "
            f"elements outside |Δ| ≤ {atol:g} + {rtol:g}·|source|; worst at window {w.get('window')}{step}")


def verify_junit(report: Any) -> bytes:
    doc = report.to_json()
    root = ET.Element("testsuites", name="seqgate verify")
    for rec in doc["recordings"]:
        label = rec["label"]
        cases = [(t, t["by_recording"][label]) for t in doc["tensors"] if label in t["by_recording"]]
        failures = sum(1 for _, r in cases if not r["passed"])
        suite = ET.SubElement(root, "testsuite", name=label, tests=str(len(cases)), failures=str(failures),
                              errors="0")
        for t, r in cases:
            case = ET.SubElement(suite, "testcase", classname=label, name=t["name"])
            if not r["passed"]:
                msg = _summary(t["name"], r, t["atol"], t["rtol"])
                fail = ET.SubElement(case, "failure", message=msg, type="OutOfTolerance")
                fail.text = msg
    ET.indent(root)
    return ET.tostring(root, encoding="utf-8", xml_declaration=True)


def write_verify_junit(report: Any, path: str | Path) -> None:
    write_atomic(path, verify_junit(report))
