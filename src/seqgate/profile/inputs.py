"""What the profiler feeds a model: one plan per graph input, and seeded realistic arrays.

Dims: axis 0 (symbolic) is the batch, a symbolic dim named ``*time*`` or sitting at axis 1 is the
time axis (``seqgate.costs.time_dim_names``); fixed dims keep their size. Any other symbolic dim
is refused, since the profiler cannot pick a size the product would send.

Values, drawn from ``numpy.random.default_rng([seed, T, batch])`` so a point's inputs do not
depend on the order of the sweep and are the same for every thread count and runtime:

- floating inputs: standard normal N(0, 1), the scale of normalised features;
- integer inputs that reach the index slot of a ``Gather`` on an initializer (an embedding
  table), possibly through Cast/Identity/Reshape/Squeeze/Unsqueeze/Transpose/Flatten: uniform
  token ids in ``[0, rows)``, ``rows`` being the smallest such table's size on the gathered axis;
- integer or boolean inputs with a declared range (``seqgate.input_ranges``, from
  ``--input NAME:DIMS:int64=LOW..HIGH`` at export): uniform in that range, a bound that names
  ``time`` taken at the point's T;
- other integer or boolean inputs are refused: there is no realistic value to invent for them,
  except the lengths input of a padded model (below).

A dim ``time+K``/``time-K`` (``seqgate.util.dims``) is T plus/minus K at every point.

Padded models (ONNX metadata ``seqgate.padding``, see ``verify.synthetic``): in a full-length
batch a lengths input holds T for every row and a token input never holds its padding id (ids
are uniform over the other ``rows − 1``). A padded batch (:func:`pad_batch`) takes the same
arrays and, for row n of length ``L[n]``, sets steps ``t ≥ L[n]`` to the padding value (a
``value`` entry) or to zeros with the lengths input = ``L`` (a ``lengths`` entry): right
padding, the pattern lengths express. A Keras mask of any other pattern costs the same: its
graph first gathers the valid steps of each row to the front (``export.core.masked_steps``),
so the work depends on how many steps are valid, not where. The lengths come from
:func:`draw_lengths`: uniform in ``1..T``, or drawn from a recording's valid-step counts.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import onnx

from seqgate.errors import BadInputError
from seqgate.onnxfile.costs import time_dim_names
from seqgate.onnxfile.input_meta import read_ranges
from seqgate.util.dims import dim_text, resolve, split_dim
from seqgate.verify.synthetic import read_padding

_PASS_THROUGH = {"Cast", "Identity", "Reshape", "Squeeze", "Unsqueeze", "Transpose", "Flatten"}


@dataclass(frozen=True)
class InputPlan:
    """One graph input: its dims as ``int`` (fixed), ``"batch"`` or ``"time"``; id range if any."""

    name: str
    dtype: str  # numpy dtype name
    dims: tuple[int | str, ...]
    vocab: int | None = None
    role: str = ""  # "lengths": the lengths input of a padded model
    pad_value: float | None = None  # a step holding only this value is padding

    low: int | str | None = None  # a declared value range (seqgate.input_ranges), bounds may name time
    high: int | str | None = None

    def shape(self, batch: int, t: int) -> tuple[int, ...]:
        sizes = {"batch": batch, "time": t}
        return tuple(int(d) if isinstance(d, int) else int(resolve(d, sizes) or 1) for d in self.dims)


@dataclass(frozen=True)
class ModelAxes:
    """Whether the model fixes its time or batch size (``None`` = free)."""

    fixed_time: int | None
    fixed_batch: int | None
    has_time: bool


def plan_inputs(model: onnx.ModelProto) -> list[InputPlan]:
    """The plan of every graph input that is not also an initializer."""
    inits = {i.name for i in model.graph.initializer}
    time_names = time_dim_names(model)
    vocab = _embedding_sizes(model)
    padding = read_padding(model)
    ranges = read_ranges(model)
    lengths_inputs = {e["lengths"] for e in padding if e.get("kind") == "lengths"}
    pad_values = {e["input"]: float(e["value"]) for e in padding if e.get("kind") == "value"}
    plans: list[InputPlan] = []
    for vi in model.graph.input:
        if vi.name in inits:
            continue
        tt = vi.type.tensor_type
        dtype = onnx.helper.tensor_dtype_to_np_dtype(tt.elem_type)
        dims: list[int | str] = []
        for axis, d in enumerate(tt.shape.dim):
            base, offset = split_dim(d.dim_param)
            if d.HasField("dim_value"):
                dims.append(int(d.dim_value))
            elif d.dim_param in time_names or base in time_names:
                dims.append(dim_text("time", offset))  # time+6: six steps more than the time axis
            elif axis == 0 and d.HasField("dim_param"):
                dims.append("batch")
            else:
                shown = d.dim_param or "(unnamed)"
                raise BadInputError(
                    f"input {vi.name!r}: axis {axis} has the symbolic size {shown!r}, which is "
                    f"neither the batch (axis 0) nor the time axis (axis 1 or a name containing "
                    f"'time'), so the profiler cannot choose a size for it. Export the model with "
                    f"that dim fixed."
                )
        role = "lengths" if vi.name in lengths_inputs else ""
        declared = ranges.get(vi.name, {})
        if dtype.kind in "iub" and vocab.get(vi.name) is None and not role and not declared:
            raise BadInputError(
                f"input {vi.name!r} is {dtype.name} but feeds no embedding table, so the profiler "
                f"has no realistic value range for it. Export it with a declared range "
                f"(--input {vi.name}:DIMS:{dtype.name}=LOW..HIGH), or profile a model whose integer "
                f"inputs are token ids (they reach a Gather on an initializer)."
            )
        plans.append(InputPlan(vi.name, dtype.name, tuple(dims), vocab.get(vi.name), role,
                               pad_values.get(vi.name), declared.get("low"), declared.get("high")))
    return plans


def model_axes(model: onnx.ModelProto, plans: list[InputPlan]) -> ModelAxes:
    """Fixed time = axis 1 of a rank ≥ 2 input that has no symbolic time; fixed batch = axis 0."""
    has_time = any("time" in p.dims for p in plans)
    fixed_time = None
    if not has_time:
        fixed_time = next((int(p.dims[1]) for p in plans if len(p.dims) >= 2), None)
    fixed_batch = None
    if not any(p.dims and p.dims[0] == "batch" for p in plans):
        fixed_batch = next((int(p.dims[0]) for p in plans if p.dims), None)
    return ModelAxes(fixed_time, fixed_batch, has_time or fixed_time is not None)


def make_inputs(plans: list[InputPlan], batch: int, t: int, seed: int) -> dict[str, np.ndarray[Any, Any]]:
    """Seeded arrays for one (T, batch) point (see the module docstring)."""
    rng = np.random.default_rng([seed, t, batch])
    out: dict[str, np.ndarray[Any, Any]] = {}
    for p in plans:
        shape = p.shape(batch, t)
        if p.role == "lengths":
            out[p.name] = np.full(shape, t, dtype=p.dtype)
        elif p.low is not None and p.high is not None:
            sizes = {"batch": batch, "time": t}
            low, high = resolve(p.low, sizes), resolve(p.high, sizes)
            out[p.name] = rng.integers(low or 0, max(low or 0, high or 0) + 1, size=shape).astype(p.dtype)
        elif p.vocab is not None and p.pad_value is not None and 0 <= p.pad_value < p.vocab and p.vocab > 1:
            ids = rng.integers(0, p.vocab - 1, size=shape)  # every id but the padding id, uniformly
            out[p.name] = (ids + (ids >= p.pad_value)).astype(p.dtype)
        elif p.vocab is not None:
            out[p.name] = rng.integers(0, p.vocab, size=shape).astype(p.dtype)
        else:
            out[p.name] = rng.standard_normal(shape).astype(p.dtype)
    return out


def padded_model(plans: list[InputPlan]) -> bool:
    """Whether the model takes lengths or a mask (its ``seqgate.padding`` record names an input)."""
    return any(p.role == "lengths" or p.pad_value is not None for p in plans)


def draw_lengths(recorded: np.ndarray[Any, Any] | None, batch: int, t: int, seed: int,
                 min_length: int = 1) -> np.ndarray[Any, Any]:
    """Row lengths of one padded batch, from ``default_rng([seed, T, batch, 1])``.

    ``recorded`` ``None``: uniform in ``1..T`` (``integers(1, T + 1)``). Otherwise a recording's
    valid-step counts, drawn with replacement (``choice``) and clipped to ``min_length..T``: a
    recorded window longer than T is cut to the batch's length.
    """
    rng = np.random.default_rng([seed, t, batch, 1])
    if recorded is None:
        return rng.integers(1, t + 1, size=batch).astype(np.int64)
    return np.clip(rng.choice(np.asarray(recorded, np.int64), size=batch), min(min_length, t), t)


def pad_batch(plans: list[InputPlan], feeds: dict[str, np.ndarray[Any, Any]],
              lengths: np.ndarray[Any, Any]) -> dict[str, np.ndarray[Any, Any]]:
    """A full-length batch made padded: steps ``t ≥ lengths[n]`` of row n hold the padding (module doc)."""
    has_lengths = any(p.role == "lengths" for p in plans)
    out = dict(feeds)
    for p in plans:
        if p.role == "lengths":
            out[p.name] = np.asarray(lengths).astype(p.dtype)
            continue
        time_axis = p.dims.index("time") if "time" in p.dims else None
        if time_axis is None or (p.pad_value is None and not has_lengths):
            continue
        x = out[p.name]
        steps = np.arange(x.shape[time_axis]).reshape([-1 if a == time_axis else 1 for a in range(x.ndim)])
        batch_axis = p.dims.index("batch") if "batch" in p.dims else 0
        rows = np.asarray(lengths).reshape([-1 if a == batch_axis else 1 for a in range(x.ndim)])
        value = np.asarray(p.pad_value or 0, dtype=x.dtype)
        out[p.name] = np.where(steps < rows, x, value).astype(x.dtype)
    return out


def _embedding_sizes(model: onnx.ModelProto) -> dict[str, int]:
    """Graph input name → rows of the smallest embedding table its values index."""
    inits = {i.name: i for i in model.graph.initializer}
    consumers: dict[str, list[onnx.NodeProto]] = {}
    for n in model.graph.node:
        for i in n.input:
            consumers.setdefault(i, []).append(n)
    out: dict[str, int] = {}
    for vi in model.graph.input:
        sizes: list[int] = []
        frontier, seen = [vi.name], set()
        while frontier:
            value = frontier.pop()
            if value in seen:
                continue
            seen.add(value)
            for n in consumers.get(value, []):
                if n.op_type == "Gather" and len(n.input) > 1 and n.input[1] == value and n.input[0] in inits:
                    axis = next((a.i for a in n.attribute if a.name == "axis"), 0)
                    sizes.append(int(inits[n.input[0]].dims[axis]))
                elif n.op_type in _PASS_THROUGH and n.input[0] == value:
                    frontier.extend(o for o in n.output if o)
        if sizes:
            out[vi.name] = min(sizes)
    return out
