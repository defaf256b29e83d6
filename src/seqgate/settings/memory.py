"""Would the inputs of the largest profile point fit in memory? Checked before anything is timed.

Estimate: ``bytes = batch × T × features × 4`` (float32 elements) for the largest batch size
and the longest sequence, ``features`` being the elements per time step summed over the
inputs. It counts the inputs alone — the model's activations need more — so a point it refuses
would certainly not run. Before the model is known (a gate config) ``features = 1``, a lower bound.
"""

from __future__ import annotations

import os

from seqgate.errors import BadInputError
from seqgate.settings.defaults import BYTES_PER_ELEMENT


def available_memory() -> int | None:
    """Bytes the machine can still hand out: ``MemAvailable`` from /proc/meminfo, else free pages."""
    try:
        with open("/proc/meminfo", encoding="ascii") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024  # the file counts kB (1024 bytes)
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):
        return None


def input_bytes(batch: int, seq_len: int, features: int) -> int:
    """``batch × seq_len × features × 4``: the float32 inputs of one point."""
    return batch * seq_len * features * BYTES_PER_ELEMENT


def _size(n: float) -> str:
    for unit in ("bytes", "KiB", "MiB", "GiB", "TiB", "PiB"):
        if n < 1024 or unit == "PiB":
            return f"{n:.0f} {unit}" if unit == "bytes" else f"{n:.1f} {unit}"
        n /= 1024
    return f"{n:.1f} PiB"  # pragma: no cover - the loop always returns


def check_input_memory(batch: int, seq_len: int, features: int, where: str,
                       available: int | None = None) -> None:
    """Refuse a point whose inputs alone exceed the available memory (exit 2), saying the estimate."""
    free = available_memory() if available is None else available
    need = input_bytes(batch, seq_len, features)
    if free is None or need <= free:
        return
    raise BadInputError(
        f"{where}: at T={seq_len}, batch size {batch}, the inputs alone would take about {_size(need)} "
        f"({batch} × {seq_len} × {features} feature{'s' if features != 1 else ''} × "
        f"{BYTES_PER_ELEMENT} bytes), "
        f"more than the {_size(free)} of memory available; lower the sequence length or the batch size.")
