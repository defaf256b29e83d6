"""Provenance: is an ONNX file made from the source and weights files it is checked against?

``seqgate export`` records in the file's metadata the source file's name and sha256
(``seqgate.source.file`` / ``seqgate.source.sha256``), the weights file's
(``seqgate.source.weights`` / ``seqgate.source.weights_sha256``) and, for a PyTorch factory
exported without weights on purpose, ``seqgate.source.untrained = "true"``.

:func:`compare_provenance` hashes the files it is given and compares, one entry per role:

- ``source``: the source file's sha256 against the recorded one. A ``package.module:FACTORY``
  source has no file: it is compared by its text only, and the entry says so.
- ``weights`` (PyTorch only): the weights file's sha256 against the recorded one; a file given
  where none was recorded (an untrained export), or none given where one was, differs.
- ``custom_code`` (Keras, when the export recorded one or one is given): the custom-code file's
  sha256 against the recorded one (``seqgate.source.custom_code_sha256``). Its code builds the
  model's custom layers, so a changed file differs exactly as a changed model file does; a file
  given where none was recorded, or none given where one was, differs too.

``status`` is ``"match"`` when every entry matches, ``"differs"`` when one does not, and
``"not recorded"`` when the file holds no seqgate provenance (made by another tool or by hand)
and nothing differs. :func:`provenance_check` turns that into the gate's ``provenance`` check:
it passes on ``"match"``, or when the config states that another source is expected (with the
reason, which the reports show).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from seqgate.onnxfile.probes import read_metadata
from seqgate.sources.spec import Source, parse_source
from seqgate.util.files import sha256_file

SOURCE_SHA = "seqgate.source.sha256"
WEIGHTS_SHA = "seqgate.source.weights_sha256"
UNTRAINED = "seqgate.source.untrained"
CUSTOM_CODE_SHA = "seqgate.source.custom_code_sha256"


def _source_entry(meta: dict[str, str], src: Source) -> dict[str, Any]:
    if src.path is None:
        recorded = meta.get("seqgate.source.text")
        return {"role": "source", "path": None, "text": src.text, "sha256": None,
                "recorded_name": recorded, "recorded_sha256": None,
                "matches": None if recorded is None else recorded == src.text,
                "note": "a module source is compared by its name only; its code is not hashed"}
    want = meta.get(SOURCE_SHA)
    have = sha256_file(src.path)
    return {"role": "source", "path": str(src.path), "sha256": have,
            "recorded_name": meta.get("seqgate.source.file"), "recorded_sha256": want,
            "matches": None if want is None else want == have}


def _weights_entry(meta: dict[str, str], src: Source) -> dict[str, Any]:
    want = meta.get(WEIGHTS_SHA)
    untrained = meta.get(UNTRAINED) == "true"
    have = sha256_file(src.weights) if src.weights is not None else None
    entry: dict[str, Any] = {"role": "weights", "path": str(src.weights) if src.weights else None,
                             "sha256": have, "recorded_name": meta.get("seqgate.source.weights"),
                             "recorded_sha256": want}
    if want is not None:
        entry["matches"] = have == want
        if have is None:
            entry["note"] = "the file was exported with weights, but none were given"
    elif untrained:
        entry["matches"] = have is None
        entry["note"] = "the file was exported untrained (no weights)" + (
            "" if have is None else ", but weights were given")
    else:
        entry["matches"] = None
    return entry


def _custom_code_entry(meta: dict[str, str], src: Source) -> dict[str, Any]:
    want = meta.get(CUSTOM_CODE_SHA)
    have = sha256_file(src.custom_code) if src.custom_code is not None else None
    entry: dict[str, Any] = {"role": "custom_code", "path": str(src.custom_code) if src.custom_code else None,
                             "sha256": have, "recorded_name": meta.get("seqgate.source.custom_code"),
                             "recorded_sha256": want, "matches": have == want}
    if have is None:
        entry["note"] = f"the file was exported with custom code {entry['recorded_name']}, but none was given"
    elif want is None:
        entry["note"] = f"the file was exported without custom code, but {src.custom_code} was given"
    return entry


def compare_provenance(model: Any, src: Source) -> dict[str, Any]:
    """Compare ``src``'s files with the provenance recorded in ``model`` (see the module docstring)."""
    meta = read_metadata(model)
    entries = [_source_entry(meta, src)]
    if src.framework == "torch":
        entries.append(_weights_entry(meta, src))
    if src.framework == "keras" and (CUSTOM_CODE_SHA in meta or (src.custom_code and SOURCE_SHA in meta)):
        entries.append(_custom_code_entry(meta, src))
    fw = meta.get("seqgate.source.framework")
    if fw is not None and fw != src.framework:
        entries[0]["matches"] = False
        entries[0]["note"] = f"the file was exported from a {fw} model, this source is {src.framework}"
    verdicts = [e["matches"] for e in entries]
    if any(v is False for v in verdicts):
        status = "differs"
    elif all(v is True for v in verdicts):
        status = "match"
    else:
        status = "not recorded"
    return {"status": status, "untrained": meta.get(UNTRAINED) == "true", "files": entries,
            "detail": _detail(status, entries)}


def _detail(status: str, entries: list[dict[str, Any]]) -> str:
    if status == "match":
        roles = [e["role"] for e in entries]
        if "custom_code" in roles:
            return "the source and its custom code are the files the ONNX file records (sha256)"
        if len(entries) > 1 and entries[1]["sha256"] is not None:
            return "the source and weights are the files the ONNX file records (sha256)"
        tail = "; no weights, as recorded (untrained)" if len(entries) > 1 else ""
        return f"the source is the file the ONNX file records (sha256){tail}"
    if status == "not recorded":
        return ("the ONNX file does not record what it was exported from (not written by seqgate export?); "
                "it cannot be tied to the given files")
    parts = []
    for e in entries:
        if e["matches"] is False:
            what = e.get("note") or (f"{e['path']} (sha256 {str(e['sha256'])[:12]}…) is not the recorded "
                                     f"{e['recorded_name']} (sha256 {str(e['recorded_sha256'])[:12]}…)")
            parts.append(f"{e['role']}: {what}")
    return "differs from what the ONNX file records — " + "; ".join(parts)


def provenance_check(model: Any, source: str | Source, weights: str | None,
                     expected_other: str | None = None,
                     custom_code: str | Path | None = None) -> dict[str, Any]:
    """The gate's ``provenance`` check entry: name, passed, detail, plus the comparison itself."""
    src = source if isinstance(source, Source) else parse_source(source, weights, custom_code)
    prov = compare_provenance(model, src)
    passed = prov["status"] == "match"
    detail = prov["detail"]
    if not passed and expected_other:
        passed = True
        detail = f"{detail}; accepted: the config expects another source ({expected_other})"
    elif not passed:
        detail += (". Gate the ONNX file with the source and weights it was exported from, or state "
                   "[model] expect_other_source = \"reason\" in the config.")
    if prov["untrained"]:
        detail = "UNTRAINED model (exported without weights on purpose); " + detail
    return {"name": "provenance", "passed": passed, "detail": detail, "status": prov["status"],
            "untrained": prov["untrained"], "expected_other_source": expected_other, "files": prov["files"]}
