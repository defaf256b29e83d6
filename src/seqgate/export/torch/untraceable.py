"""Why torch.fx could not trace a forward, as one refusal naming the user's line and what to change."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from seqgate.errors import Unsupported, UnsupportedModelError
from seqgate.util.text import first_line


def untraceable(module: Any, e: BaseException) -> Unsupported:
    import traceback

    import torch

    torch_dir = str(Path(torch.__file__).parent)
    own_dir = str(Path(__file__).parents[2])  # src/seqgate
    frames = [f for f in traceback.extract_tb(e.__traceback__)
              if not f.filename.startswith((torch_dir, own_dir))]
    at = ""
    code = ""
    if frames:
        f = frames[-1]
        code = (f.line or "").strip()
        at = f" at {Path(f.filename).name}:{f.lineno}: `{code}`"
    msg = first_line(e)
    return Unsupported(f"{type(module).__name__}.forward{at}",
                       f"torch.fx cannot trace it ({type(e).__name__}: {msg})", _trace_hint(msg, code))


def _trace_hint(msg: str, code: str) -> str:
    if "PackedSequence" in code or "pack_sequence" in code:
        return ("pack_sequence and hand-built PackedSequence objects are not supported; use "
                "pack_padded_sequence(x, lengths, ...) with the lengths as a forward() input")
    if "takes 1 positional argument" in msg and ("zeros" in code or "ones" in code or "empty" in code):
        return ("torch.zeros/ones with a traced size as the first of several arguments cannot be traced; "
                "pass the sizes as one tuple: torch.zeros((layers, x.size(0), hidden))")
    if "does not support item assignment" in msg:
        return "build the tensor with torch.cat/torch.stack/torch.where instead of assigning into it"
    if "'len' is not supported" in msg:
        return "use x.size(0) instead of len(x)"
    if "control flow" in msg:
        return ("a tensor (or a size read from it) decides a Python if/while/for/assert or bool(); "
                "decide on a constructor argument instead, or express it with tensor operations")
    if "Proxy" in msg and ("int" in msg or "integer" in msg or "index" in msg):
        return ("a tensor size is turned into a Python int (int(x.size(1)), range(x.size(0)), "
                "a Python loop over time); keep sizes as x.size(d) values passed to view/reshape, "
                "and let the recurrent module loop over time")
    if "indices" in msg and ("Long" in msg or "Int" in msg):
        return ("an input used as an index (an Embedding's ids, a gather index) was sampled as float32; "
                "declare its dtype and value range, --input NAME:DIM,...:int64=0..N-1")
    return "rewrite that line with tensor operations on the forward() inputs"


class SampleRunFailed(UnsupportedModelError):
    """Tracing on sample values failed inside the model's own computation (a shape check, a
    matmul of the wrong size): ``error`` is the original exception. Exit 3 as it stands; exit 2
    (``inputs.guessed_shape_error``) when seqgate guessed an input's shape."""

    def __init__(self, source: str, problems: list[Unsupported], error: BaseException) -> None:
        super().__init__(source, problems)
        self.error = error


def run_failure(e: BaseException) -> bool:
    """Did ``e`` come from running an operation on sample values (not from fx's own limits)?"""
    from torch.fx.proxy import TraceError

    if isinstance(e, TraceError) or not isinstance(e, RuntimeError | IndexError | ValueError):
        return False
    return not any(w in str(e) for w in ("Proxy", "symbolically traced", "control flow"))

