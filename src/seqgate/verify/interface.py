"""Does an ONNX file take and give what its source model takes and gives? Checked before comparing.

A file that does not fit its source (made by hand, by another tool, or exported from another
model) is bad input (exit 2), not a model seqgate cannot export. The message lists every
difference at once:

- inputs, by name: every ONNX input must be a source input (Keras: the model's input tensors;
  PyTorch: a ``forward`` parameter, ``NAME_0``/``NAME_1`` for a ``(h0, c0)`` pair, or a tensor of
  a dict/dataclass parameter that ``seqgate.input_structure`` lists) and every
  required source input must be an ONNX input;
- Keras inputs and outputs, statically: the rank, and every dim both sides fix, must agree;
  the number of outputs must agree;
- PyTorch outputs, by one run on one window: the module is called on the same window as ONNX
  Runtime, and the number and shapes of the returned tensors must agree with the graph outputs.
"""

from __future__ import annotations

import inspect
from typing import Any

import numpy as np

from seqgate.errors import BadInputError
from seqgate.onnxfile.load import value_dims
from seqgate.util.outputs import flatten_outputs
from seqgate.util.text import first_line


def _dims(dims: Any) -> str:
    return "[" + ", ".join("?" if d is None else str(d) for d in dims) + "]"


def _fail(label: str, src_text: str, problems: list[str]) -> BadInputError:
    lines = "\n".join(f"  - {p}" for p in problems)
    return BadInputError(
        f"the ONNX file {label} does not fit the source {src_text}: {len(problems)} difference"
        f"{'s' if len(problems) != 1 else ''} in its inputs or outputs:\n{lines}\n"
        f"Check the file against the model it was exported from, or export it again from this source."
    )


def _compare_dims(role: str, name: str, onnx_dims: list[Any], src_dims: tuple[Any, ...]) -> str | None:
    if len(onnx_dims) != len(src_dims):
        return (f"{role} {name!r}: rank {len(onnx_dims)} {_dims(onnx_dims)} in the ONNX file, "
                f"rank {len(src_dims)} {_dims(src_dims)} in the source")
    for a, b in zip(onnx_dims, src_dims, strict=True):
        if isinstance(a, int) and isinstance(b, int) and a != b:
            return f"{role} {name!r}: dims {_dims(onnx_dims)} in the ONNX file, {_dims(src_dims)} in the source"
    return None


def check_keras(model: Any, keras_model: Any, label: str, src_text: str) -> None:
    """Compare the ONNX graph's inputs and outputs with a loaded Keras model's (statically)."""
    # a Sequential's graph is its functional twin, as the Keras runner reads it
    graph = keras_model._functional if type(keras_model).__name__ == "Sequential" else keras_model
    src_in = {t.name: tuple(t.shape) for t in graph.inputs}
    onnx_in = {vi.name: value_dims(vi) for vi in model.graph.input}
    problems = _name_problems(list(onnx_in), list(src_in), set(src_in))
    for name in sorted(set(onnx_in) & set(src_in)):
        p = _compare_dims("input", name, onnx_in[name], src_in[name])
        if p:
            problems.append(p)
    outs = list(model.graph.output)
    if len(outs) != len(graph.outputs):
        problems.append(f"outputs: the ONNX file has {len(outs)} ({', '.join(o.name for o in outs)}), "
                        f"the source {len(graph.outputs)}")
    else:
        for o, t in zip(outs, graph.outputs, strict=True):
            p = _compare_dims("output", o.name, value_dims(o), tuple(t.shape))
            if p:
                problems.append(p)
    if problems:
        raise _fail(label, src_text, problems)


def _name_problems(onnx_names: list[str], src_names: list[str], required: set[str]) -> list[str]:
    def known(n: str) -> bool:
        base, _, k = n.rpartition("_")
        return n in src_names or (k.isdigit() and base in src_names)

    problems = [f"input {n!r} is in the ONNX file but the source takes no such input "
                f"(it takes {', '.join(src_names) or 'none'})" for n in onnx_names if not known(n)]
    fed = {n.rpartition("_")[0] if n not in src_names else n for n in onnx_names}
    has = ", ".join(onnx_names) or "none"
    problems += [f"input {n!r} is required by the source but the ONNX file has no such input (it has {has})"
                 for n in src_names if n in required and n not in fed]
    return problems


def torch_params(module: Any) -> tuple[list[str], set[str]]:
    """``forward``'s parameter names and the required ones (no default, not ``*args``/``**kwargs``)."""
    params = [p for p in inspect.signature(module.forward).parameters.values()
              if p.kind not in (p.VAR_POSITIONAL, p.VAR_KEYWORD)]
    return [p.name for p in params], {p.name for p in params if p.default is p.empty}


def check_torch(model: Any, module: Any, feeds: dict[str, np.ndarray[Any, Any]] | None,
                onnx_runner: Any, label: str, src_text: str) -> None:
    """Compare input names with ``forward``'s; then outputs by one run on ``feeds`` (one window)."""
    from seqgate.onnxfile.input_meta import read_structure

    names, required = torch_params(module)
    structure = read_structure(model)
    param_of = {onnx: param for param, e in structure.items() for onnx in e.get("keys", {}).values()}
    onnx_names = list(dict.fromkeys(param_of.get(vi.name, vi.name) for vi in model.graph.input))
    problems = _name_problems(onnx_names, names, required)
    if problems or feeds is None:
        if problems:
            raise _fail(label, src_text, problems)
        return
    got = _run_torch(module, structure, feeds, label, src_text)
    onnx_out = onnx_runner.run(feeds)
    outs = [o.name for o in model.graph.output]
    if len(got) != len(outs):
        problems.append(f"outputs: the ONNX file has {len(outs)} ({', '.join(outs)}), the source's forward "
                        f"returns {len(got)} tensor{'s' if len(got) != 1 else ''}")
    else:
        for name, s in zip(outs, got, strict=True):
            a, b = tuple(np.shape(onnx_out[name])), tuple(getattr(s, "shape", ()))
            if a != b:
                problems.append(f"output {name!r}: shape {list(a)} from ONNX Runtime, {list(b)} from the "
                                f"source, on the same window")
    if problems:
        raise _fail(label, src_text, problems)


def _run_torch(module: Any, structure: dict[str, Any], feeds: dict[str, np.ndarray[Any, Any]], label: str,
               src_text: str) -> list[Any]:
    import torch

    from seqgate.runtimes.torch_args import forward_kwargs

    kwargs = forward_kwargs(module, feeds, structure) or {}
    try:
        with torch.inference_mode():
            res = module(**kwargs)
    except Exception as e:  # the user's forward refusing the ONNX file's inputs
        shapes = ", ".join(f"{k} {list(v.shape)}" for k, v in feeds.items())
        raise _fail(label, src_text, [f"the source's forward fails on the ONNX file's inputs ({shapes}): "
                                      f"{type(e).__name__}: {first_line(e)}"]) from None
    return flatten_outputs(res)



def shape_error(tensor: str, onnx_shape: tuple[int, ...], src_shape: tuple[int, ...], label: str,
                src_text: str) -> BadInputError:
    """A compared tensor whose shape differs between ONNX Runtime and the source."""
    return _fail(label, src_text, [f"tensor {tensor!r}: shape {list(onnx_shape)} from ONNX Runtime, "
                                   f"{list(src_shape)} from the source"])
