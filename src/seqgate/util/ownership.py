"""Which existing files seqgate wrote: the test behind the one overwrite policy.

Policy, for every command that writes a file: a new path is written; an existing file that
seqgate wrote earlier is replaced (so a CI job reruns without extra flags); any other existing
file is refused unless the user passes ``--force``. (The gate's output folder follows the same
rule as a whole; see ``seqgate.gate.outdir``.)

"seqgate wrote it" is read from the file's own content, never from its name:

- ``.onnx``: ``ModelProto.producer_name == "seqgate"`` (field 2, serialized right after the IR
  version, so the first bytes carry it);
- ``.json``: a top-level ``"schema"`` starting with ``seqgate.``;
- ``.md``: a first line starting with ``# seqgate `` (every seqgate Markdown report's title);
- ``.xml``: a root ``<testsuites name="seqgate …">``;
- ``.csv``: the profile table's exact header row;
- ``.png``: a ``Software`` text chunk that says ``seqgate`` (PNG spec, tEXt chunk);
- ``.npz``: a ``seqgate_windows`` member (the recordings ``seqgate windows`` writes).
"""

from __future__ import annotations

import json
import zipfile
from pathlib import Path

_HEAD = 4096


def written_by_seqgate(path: Path) -> bool:
    """Whether the file at ``path`` carries seqgate's own mark (module docstring)."""
    try:
        suffix = path.suffix.lower()
        if suffix == ".json":
            data = json.loads(path.read_text(encoding="utf-8"))
            return isinstance(data, dict) and str(data.get("schema", "")).startswith("seqgate.")
        if suffix == ".npz":
            with zipfile.ZipFile(path) as zf:
                return "seqgate_windows.npy" in zf.namelist()
        with open(path, "rb") as f:
            head = f.read(_HEAD)
    except (OSError, ValueError, zipfile.BadZipFile):
        return False
    if suffix == ".onnx":
        return b"\x12\x07seqgate" in head[:32]
    if suffix == ".md":
        return head.startswith(b"# seqgate ")
    if suffix == ".xml":
        return b'<testsuites name="seqgate ' in head
    if suffix == ".csv":
        from seqgate.report.columns import CSV_COLUMNS

        return head.split(b"\n", 1)[0].decode("utf-8", "replace") == ",".join(CSV_COLUMNS)
    if suffix == ".png":
        return b"tEXtSoftware\x00seqgate" in head
    return False
