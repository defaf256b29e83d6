"""Built-in Keras cells as ONNX parts: which kind a cell is, its activation slots, its packed weights.

Shared by the recurrent layers (``recurrent``), cell lists (``stacked``) and custom cells
(``customcells``), which ``recurrent`` dispatches to: kept apart so none imports another back.
"""

from __future__ import annotations

from typing import Any

from seqgate.errors import Refusal
from seqgate.export.core.activations import cell_activation
from seqgate.export.core.recurrent import CellActivation, Packed, keras_weights
from seqgate.export.keras.activation import keras_activation

_CELL_KIND = {"SimpleRNNCell": "rnn", "GRUCell": "gru", "LSTMCell": "lstm"}


def builtin_cell(cell: Any, where: str) -> tuple[str, Any]:
    """(kind, cell) of a built-in Keras SimpleRNNCell/GRUCell/LSTMCell; Refusal for any other cell."""
    kind = _CELL_KIND.get(type(cell).__name__) if cell is not None else None
    if kind is None or not type(cell).__module__.startswith("keras."):
        raise Refusal(f"{where} uses cell {type(cell).__name__}",
                      "only the built-in SimpleRNNCell, GRUCell and LSTMCell map to ONNX ops")
    return kind, cell


def is_custom_cell(cell: Any) -> bool:
    """A cell class defined outside Keras (loaded only with the user's opt-in, ``--custom-code``)."""
    return cell is not None and not type(cell).__module__.startswith("keras.")


def check_options(layer: Any, bidirectional: bool = False) -> None:
    """``stateful=True`` is exported as a streaming file (``seqgate.export.streaming``), except
    in a Bidirectional wrapper: its backward direction starts from the window's last step."""
    if bidirectional and getattr(layer, "stateful", False):
        raise Refusal("Bidirectional with stateful=True: the backward direction starts from the window's "
                      "last step, so its state cannot be carried from one call to the next",
                      "use stateful=False, or a unidirectional stateful layer")


def stateful_mark(layer: Any) -> dict[str, bool]:
    """``{"stateful": True}`` for a ``stateful=True`` layer, else empty: merged into its probes'
    source record, which makes the export a streaming file by default (``export.run``)."""
    return {"stateful": True} if getattr(layer, "stateful", False) else {}


def cell_slots(kind: str, cell: Any) -> list[CellActivation]:
    act = cell_activation(*keras_activation(cell.activation))
    if kind == "rnn":
        return [act]
    rec = cell_activation(*keras_activation(cell.recurrent_activation))
    return [rec, act] if kind == "gru" else [rec, act, act]


def pack_cell(kind: str, cell: Any) -> Packed:
    bias = cell.bias.numpy() if getattr(cell, "use_bias", True) and cell.bias is not None else None
    return keras_weights(
        kind,
        cell.kernel.numpy(),
        cell.recurrent_kernel.numpy(),
        bias,
        reset_after=bool(getattr(cell, "reset_after", False)),
    )
