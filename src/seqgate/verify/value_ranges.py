"""Recorded windows must lie inside the value ranges the export declared (``seqgate.input_ranges``).

An integer input exported with ``--input lengths:batch:int64=1..time`` was traced on values in
that range, and Python branches on its data may have been decided by it
(``seqgate.range_decided_branches``): the ONNX graph is right only inside the range. So before
any window is compared, every recorded integer input with a declared range is read once and
checked; the first window holding a value outside it is refused (exit 2), naming the recording,
the input, the declared range (and its value at the recording's sizes), the window, the position
and the value, and what to do. A bound that names a dim (``time``, ``time-1``) is taken at the
size the recording gives that dim, as synthetic sets do (``synthetic.value_bounds``).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from seqgate.errors import BadInputError
from seqgate.util.dims import split_dim
from seqgate.verify.recordings import InputSpec, Recording
from seqgate.verify.synthetic import value_bounds

CHUNK = 65536  # windows read at a time: an integer input is small per window


def recording_sizes(rec: Recording, specs: list[InputSpec]) -> dict[str, int]:
    """The size the recording gives each plain symbolic dim (``time`` from ``time-1``'s size + 1)."""
    sizes: dict[str, int] = {}
    for spec in specs:
        shape = rec.arrays[spec.name].shape
        for axis, d in enumerate(spec.window_dims):
            if axis and isinstance(d, str):
                base, offset = split_dim(d)
                sizes.setdefault(base, int(shape[axis]) - offset)
    return sizes


def check_value_ranges(rec: Recording, specs: list[InputSpec], ranges: dict[str, dict[str, Any]]) -> None:
    """Refuse (exit 2) the first window of ``rec`` whose integer input leaves its declared range."""
    if not ranges or rec.kind != "recorded":
        return
    sizes = recording_sizes(rec, specs)
    for spec in specs:
        entry = ranges.get(spec.name)
        if entry is None or spec.name not in rec.arrays:
            continue
        declared = f"{entry['low']}..{entry['high']}"
        bounds = value_bounds(ranges, spec.name, sizes)
        if bounds is None:
            raise BadInputError(
                f"recording {rec.label}, input {spec.name!r}: the value range {declared} declared at export "
                f"is empty or names a dim this recording does not give (sizes {sizes}); record windows "
                f"whose sizes make the range hold values, or export again with another range.")
        _scan(rec, spec.name, declared, bounds, sizes)


def _scan(rec: Recording, name: str, declared: str, bounds: tuple[int, int], sizes: dict[str, int]) -> None:
    low, high = bounds
    arr = rec.arrays[name]
    for start in range(0, rec.windows, CHUNK):
        x = np.asarray(arr.read(start, min(start + CHUNK, rec.windows)))
        outside = (x < low) | (x > high)
        if not outside.any():
            continue
        bad = np.argwhere(outside)[0]
        value = x[tuple(bad)].item()
        where = f" at position {tuple(int(i) for i in bad[1:])}" if len(bad) > 1 else ""
        at = "" if declared == f"{low}..{high}" else (
            f" ({low}..{high} at this recording's sizes "
            f"{', '.join(f'{k}={v}' for k, v in sorted(sizes.items()))})")
        raise BadInputError(
            f"recording {rec.label}, input {name!r}: window {start + int(bad[0])} holds {value}{where}, "
            f"outside the value range {declared}{at} declared when the model was exported "
            f"(--input {name}:...=LOW..HIGH, metadata seqgate.input_ranges). The ONNX graph is right "
            f"only inside that range (the export was traced in it, and branches may have been decided "
            f"by it), so these windows cannot be compared. Drop or repair the windows outside the "
            f"range, or export again with a range that holds them.")
