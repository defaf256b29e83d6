"""Sample inputs of the two runs that give a traced module its static shapes (``inputs.py``).

Symbolic dims take different sizes in the two runs (batch 3/2, time 13/17, others from two
disjoint pools); a dim ``NAME+K``/``NAME-K`` follows NAME. Values: float inputs standard normal,
integer inputs uniform in their declared range (``--input ...=LOW..HIGH``, bounds that name a
dim taken at the run's size), Embedding ids below the table size, bool 0/1; a
``pack_padded_sequence`` lengths input holds the full time size.
"""

from __future__ import annotations

from typing import Any

from seqgate.errors import BadInputError
from seqgate.util.dims import resolve, split_dim

SAMPLE_A = {"batch": 3, "time": 13}
SAMPLE_B = {"batch": 2, "time": 17}
_POOL_A = [5, 6, 8, 9, 10, 11, 12, 14, 15, 16]
_POOL_B = [4, 7, 18, 19, 20, 21, 22, 23, 24, 25]

InputSpec = Any  # seqgate.export.torch.inputs.InputSpec (that module imports this one)
Plan = Any


def symbol_values(inputs: list[InputSpec]) -> tuple[dict[str, int], dict[str, int]]:
    """Sample sizes for every symbolic dim in the two runs (module docstring).

    A dim ``NAME+K``/``NAME-K`` is NAME's size plus/minus K in both runs (and has its own entry,
    so a graph output of that length is named after it); NAME's two sizes are raised when
    needed so that every ``NAME-K`` is at least 2."""
    a, b = dict(SAMPLE_A), dict(SAMPLE_B)
    k = 0
    exprs: dict[str, tuple[str, int]] = {}
    for spec in inputs:
        for d in spec.dims:
            if not isinstance(d, str):
                continue
            base, offset = split_dim(d)
            if offset:
                exprs[d] = (base, offset)
            if base not in a:
                if k >= len(_POOL_A):
                    raise BadInputError("too many different symbolic dims in --input (at most 12).")
                a[base], b[base] = _POOL_A[k], _POOL_B[k]
                k += 1
    for base, offset in exprs.values():
        lift = max(0, 2 - offset - min(a[base], b[base]))
        a[base], b[base] = a[base] + lift, b[base] + lift
    for d, (base, offset) in exprs.items():
        a[d], b[d] = a[base] + offset, b[base] + offset
    return a, b


def sample_args(plan: Plan, sizes: dict[str, int], seed: int) -> list[Any]:
    """Positional arguments for one run: random tensors, fixed defaults, None for unused."""
    import torch

    g = torch.Generator().manual_seed(seed)
    by_name = {s.name: s for s in plan.inputs}
    args: list[Any] = []
    for name in plan.params:
        spec = by_name.get(name)
        if spec is None:
            args.append(plan.concrete.get(name))
            continue
        shape = [sizes[d] if isinstance(d, str) else d for d in spec.dims]
        if spec.fill == "lengths":
            args.append(torch.full(shape, sizes["time"], dtype=torch.int64))
        elif spec.dtype in ("int64", "int32", "bool"):
            low, high = _value_range(spec, sizes)
            ints = torch.randint(low, high + 1, shape, generator=g)
            args.append(ints.to(getattr(torch, spec.dtype)))
        elif spec.parts:
            args.append(tuple(torch.randn(shape, generator=g) for _ in range(spec.parts)))
        else:
            args.append(torch.randn(shape, generator=g))
    return args


def _value_range(spec: InputSpec, sizes: dict[str, int]) -> tuple[int, int]:
    """The inclusive range an integer input is sampled from: ``--input ...=LOW..HIGH`` (dims
    resolved at this run's sizes), else 0..1 for bool, else ids below the Embedding's size."""
    if spec.dtype == "bool":
        return 0, 1
    if spec.low is None or spec.high is None:
        return 0, max(spec.id_limit or 2, 1) - 1
    low, high = resolve(spec.low, sizes), resolve(spec.high, sizes)
    if low is None or high is None or low > high:
        raise BadInputError(f"--input {spec.name}: the range {spec.low}..{spec.high} is empty or names "
                            f"an unknown dim at the sample sizes {sizes}; give a range that holds values.")
    return low, high
