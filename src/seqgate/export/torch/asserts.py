"""``assert`` statements on traced tensors: traced past, each one recorded.

``assert lengths.min() > 0, "..."`` in a ``forward`` asks ``bool()`` of a traced value, which
``torch.fx`` refuses. An assertion does not change what is computed when it holds, so the
export may go on as if it held — but only for an ``assert`` statement: any other ``if``,
``while`` or ``bool()`` on tensor data still changes the graph with the numbers and stays
refused (``branches``).

Contract:

- :func:`assertion_outcome` looks at the bytecode of the frame that asked ``bool()`` (the
  caller of ``Proxy.__bool__``). The conversion belongs to an ``assert`` statement when the
  conditional jump being executed either falls through into ``LOAD_ASSERTION_ERROR`` (so the
  assertion holds when the jump is taken) or jumps to it (the assertion holds when it is not):
  that is how CPython compiles ``assert c``, ``assert not c`` and ``assert a and b``. It returns
  the truth value that keeps clear of the assertion error, or None for anything else
  (``assert a or b`` too: its first jump skips the error only on one side, so it is refused).
- The trace takes that value; :class:`SkippedAsserts` records ``file.py:LINE: `code``` once per
  statement. The export writes the list to ``seqgate.skipped_asserts`` (JSON) and
  ``seqgate export`` prints each one as a note: the ONNX graph does not check them.
"""

from __future__ import annotations

import dis
import json
import linecache
from dataclasses import dataclass, field
from pathlib import Path
from types import CodeType, FrameType
from typing import Any

METADATA_KEY = "seqgate.skipped_asserts"
SKIPPED = "seqgate_skipped_asserts"  # key of the list in a traced GraphModule's ``meta``
_IF_TRUE = ("POP_JUMP_FORWARD_IF_TRUE", "POP_JUMP_BACKWARD_IF_TRUE", "POP_JUMP_IF_TRUE")
_IF_FALSE = ("POP_JUMP_FORWARD_IF_FALSE", "POP_JUMP_BACKWARD_IF_FALSE", "POP_JUMP_IF_FALSE")


@dataclass
class SkippedAsserts:
    """Assertions the trace went past, ``file.py:LINE: `code```, in first-met order."""

    lines: list[str] = field(default_factory=list)

    def add(self, line: str) -> None:
        if line not in self.lines:
            self.lines.append(line)


def _instructions(code: CodeType) -> list[dis.Instruction]:
    return list(dis.get_instructions(code))


def _outcome_at(code: CodeType, offset: int) -> bool | None:
    """The truth value of the jump at ``offset`` that avoids ``LOAD_ASSERTION_ERROR`` (module docstring)."""
    ins = _instructions(code)
    at = {i.offset: k for k, i in enumerate(ins)}
    k = at.get(offset)
    if k is None:
        return None
    if ins[k].opname == "TO_BOOL" and k + 1 < len(ins):  # CPython 3.13+: bool() before the jump
        k += 1
    jump = ins[k]
    if jump.opname not in _IF_TRUE + _IF_FALSE:
        return None
    if_true = jump.opname in _IF_TRUE
    after = ins[k + 1].opname if k + 1 < len(ins) else ""
    target = ins[at[jump.argval]].opname if jump.argval in at else ""
    if after == "LOAD_ASSERTION_ERROR":
        return if_true  # must jump over the error
    if target == "LOAD_ASSERTION_ERROR":
        return not if_true  # must not jump to the error
    return None


def _asking_frame() -> FrameType | None:
    """The frame that called ``Proxy.__bool__`` (the user's code), if any."""
    import sys

    from torch.fx.proxy import Proxy

    bool_code = Proxy.__bool__.__code__
    f: FrameType | None = sys._getframe(1)
    while f is not None and f.f_code is not bool_code:
        f = f.f_back
    return f.f_back if f is not None else None


def assertion_outcome(skipped: SkippedAsserts) -> bool | None:
    """The value that makes the ``assert`` being traced hold (recorded), or None when the
    ``bool()`` being asked does not come from an ``assert`` statement."""
    frame = _asking_frame()
    if frame is None:
        return None
    outcome = _outcome_at(frame.f_code, frame.f_lasti)
    if outcome is not None:
        code = linecache.getline(frame.f_code.co_filename, frame.f_lineno).strip()
        skipped.add(f"{Path(frame.f_code.co_filename).name}:{frame.f_lineno}: `{code}`")
    return outcome


def skipped_metadata(lines: list[str]) -> dict[str, str]:
    """``{METADATA_KEY: JSON list}`` when assertions were skipped, else nothing."""
    return {METADATA_KEY: json.dumps(lines)} if lines else {}


def read_skipped(model: Any) -> list[str]:
    """The skipped assertions an exported ModelProto records (empty when none)."""
    for p in model.metadata_props:
        if p.key == METADATA_KEY:
            return [str(x) for x in json.loads(p.value)]
    return []
