"""Recorded windows: load (memory-mapped), validate against the ONNX inputs, iterate in batches.

A recording is a ``.npy`` file (one array) or a ``.npz`` archive (several). Arrays are
``[windows, ...]`` in the model's own input layout (``[windows, steps, features]`` for a
sequence input). Which array feeds which input:

- a key equal to a model input name feeds that input;
- a single-input model takes the only array whose key is not reserved (``targets``, and
  ``seqgate_windows`` which ``seqgate windows`` writes), whatever its key.

Memory stays flat for recordings far larger than a batch:

- ``.npy``: ``np.load(mmap_mode="r")``;
- ``.npz`` members stored without compression (``np.savez``, and ``seqgate windows``): NumPy
  cannot memory-map inside a zip, so the member's ``.npy`` header is parsed at its offset in
  the archive and the data is mapped with ``np.memmap`` directly;
- compressed members (``np.savez_compressed``): decompressed as a stream, one batch at a time
  (reading backwards re-opens the stream). Fortran-ordered compressed members are read whole.

Every batch is checked for NaN/Inf; the error names the array and the window index.
Object (pickled) arrays are refused: loading them would run code from the file.
"""

from __future__ import annotations

import zipfile
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from seqgate.errors import BadInputError
from seqgate.util.dims import split_dim
from seqgate.util.files import sha256_file

TARGETS_KEY = "targets"
META_KEY = "seqgate_windows"
RESERVED_KEYS = (TARGETS_KEY, META_KEY)


@dataclass(frozen=True)
class InputSpec:
    """One ONNX graph input: name, NumPy dtype and dims (int, symbolic name, or None)."""

    name: str
    dtype: np.dtype[Any]
    dims: tuple[int | str | None, ...]

    def describe(self) -> str:
        dims = ", ".join("?" if d is None else str(d) for d in self.window_dims)
        return f"{self.dtype.name} [{dims}]"

    @property
    def batch_axis(self) -> int:
        """The ONNX axis that holds the windows: the dim named like ``batch`` (else axis 0).

        PyTorch initial states ``[L·D, batch, H]`` and time-major inputs ``[time, batch, F]`` have it
        at axis 1.
        """
        for i, d in enumerate(self.dims):
            if isinstance(d, str) and "batch" in d:
                return i
        return 0

    @property
    def window_dims(self) -> tuple[int | str | None, ...]:
        """Dims as a recording stores them: the windows axis first, the rest in ONNX order."""
        dims = list(self.dims)
        b = self.batch_axis
        if b:
            dims.insert(0, dims.pop(b))
        return tuple(dims)

    @property
    def is_sequence(self) -> bool:
        """Axis 1 of the window layout is time: named ``*time*``, or a static sequence input."""
        d = self.window_dims
        if len(d) < 2:
            return False
        if isinstance(d[1], str):
            return "time" in d[1]
        if self.batch_axis != 0:
            return False
        return len(d) >= 3 or self.dtype.kind in "iu"

    @property
    def time_dynamic(self) -> bool:
        return self.is_sequence and not isinstance(self.window_dims[1], int)

    def to_model(self, x: np.ndarray[Any, Any]) -> np.ndarray[Any, Any]:
        """A window-first array in this input's ONNX layout (windows moved to the batch axis)."""
        b = self.batch_axis
        return x if b == 0 else np.ascontiguousarray(np.moveaxis(x, 0, b))


def to_model_layout(feeds: dict[str, np.ndarray[Any, Any]],
                    specs: list[InputSpec]) -> dict[str, np.ndarray[Any, Any]]:
    """Window-first arrays (as recordings hold them) → the model's input layouts."""
    by = {s.name: s for s in specs}
    return {k: by[k].to_model(v) if k in by else v for k, v in feeds.items()}


def input_specs(model: Any) -> list[InputSpec]:
    """The graph inputs of an ONNX ModelProto that are not initializers."""
    from onnx import helper

    from seqgate.onnxfile.load import value_dims

    inits = {i.name for i in model.graph.initializer}
    out = []
    for vi in model.graph.input:
        if vi.name in inits:
            continue
        tt = vi.type.tensor_type
        dims = tuple(value_dims(vi))
        out.append(InputSpec(vi.name, np.dtype(helper.tensor_dtype_to_np_dtype(tt.elem_type)), dims))
    return out


# ----- arrays read lazily ---------------------------------------------------------------------------
class LazyArray:
    """An on-disk array read one slice of windows at a time (see the module docstring)."""

    def __init__(self, shape: tuple[int, ...], dtype: np.dtype[Any], label: str) -> None:
        self.shape = shape
        self.dtype = dtype
        self.label = label

    def read(self, start: int, stop: int) -> np.ndarray[Any, Any]:
        raise NotImplementedError


class MappedArray(LazyArray):
    """A memory map (``.npy`` or a stored ``.npz`` member), or any in-memory array."""

    def __init__(self, array: np.ndarray[Any, Any], label: str) -> None:
        super().__init__(tuple(array.shape), array.dtype, label)
        self.array = array

    def read(self, start: int, stop: int) -> np.ndarray[Any, Any]:
        out = np.array(self.array[start:stop])
        _release(self.array, start, stop)
        return out


def _release(arr: np.ndarray[Any, Any], start: int, stop: int) -> None:
    """Drop the mapped pages of rows already read from this process's resident set.

    The pages stay in the OS page cache; without this a sequential pass over a mapped
    recording would count the whole file in the process's RSS although nothing holds it.
    """
    import mmap

    mm = getattr(arr, "_mmap", None)
    if mm is None or not arr.flags.c_contiguous or not hasattr(mm, "madvise") or arr.shape[0] == 0:
        return
    row = arr.nbytes // arr.shape[0]
    base = int(getattr(arr, "offset", 0)) % mmap.ALLOCATIONGRANULARITY
    lo = base + start * row
    hi = base + stop * row
    lo_page = lo - lo % mmap.PAGESIZE
    hi_page = hi - hi % mmap.PAGESIZE  # keep the partial last page: the next batch reads it
    if hi_page > lo_page:
        try:
            mm.madvise(mmap.MADV_DONTNEED, lo_page, hi_page - lo_page)
        except (OSError, ValueError):
            pass


class StreamedArray(LazyArray):
    """A compressed ``.npz`` member decompressed sequentially, one slice at a time."""

    def __init__(self, path: Path, member: str, shape: tuple[int, ...], dtype: np.dtype[Any],
                 label: str) -> None:
        super().__init__(shape, dtype, label)
        self.path, self.member = path, member
        self._row = int(np.prod(shape[1:], dtype=np.int64)) * dtype.itemsize
        self._stream: Any = None
        self._zip: Any = None
        self._pos = 0

    def _open(self) -> None:
        self.close()
        self._zip = zipfile.ZipFile(self.path)
        self._stream = self._zip.open(self.member)
        _read_header(self._stream)  # skip the header
        self._pos = 0

    def close(self) -> None:
        if self._stream is not None:
            self._stream.close()
            self._zip.close()
        self._stream = self._zip = None

    def read(self, start: int, stop: int) -> np.ndarray[Any, Any]:
        if self._stream is None or start < self._pos:
            self._open()
        while self._pos < start:
            n = min(start - self._pos, max(1, (1 << 24) // max(self._row, 1)))
            self._exact(n * self._row)
            self._pos += n
        data = self._exact((stop - start) * self._row)
        self._pos = stop
        return np.frombuffer(data, dtype=self.dtype).reshape((stop - start, *self.shape[1:])).copy()

    def _exact(self, n: int) -> bytes:
        data = self._stream.read(n)
        if len(data) != n:
            raise BadInputError(f"{self.label}: the archive member ends early (truncated file); "
                                f"write the recording again.")
        return bytes(data)


def _read_header(f: Any) -> tuple[Any, bool, Any]:
    """The ``.npy`` header at ``f``'s position (version 1 or 2/3 layout); leaves f at the data."""
    version = np.lib.format.read_magic(f)
    if version == (1, 0):
        return np.lib.format.read_array_header_1_0(f)  # type: ignore[no-any-return]
    return np.lib.format.read_array_header_2_0(f)  # type: ignore[no-any-return]


def _header(f: Any, label: str) -> tuple[tuple[int, ...], bool, np.dtype[Any]]:
    try:
        shape, fortran, dtype = _read_header(f)
    except (ValueError, OSError, EOFError) as e:
        raise BadInputError(f"{label}: not a NumPy array file ({e}); the file may be truncated or of "
                            f"another format.") from e
    if dtype.hasobject:
        raise BadInputError(f"{label}: holds Python objects (dtype {dtype}); seqgate does not load "
                            f"pickled arrays because that would run code from the file. Save plain "
                            f"numeric arrays.")
    return tuple(int(d) for d in shape), bool(fortran), np.dtype(dtype)


def _open_npy(path: Path) -> dict[str, LazyArray]:
    with open(path, "rb") as f:
        _header(f, str(path))
    try:
        arr = np.load(path, mmap_mode="r", allow_pickle=False)
    except (ValueError, OSError, EOFError) as e:
        raise BadInputError(f"{path}: cannot map the array ({e}); the file is probably truncated. "
                            f"Write the recording again.") from e
    return {path.stem: MappedArray(arr, f"{path}")}


def _open_npz(path: Path) -> dict[str, LazyArray]:
    try:
        zf = zipfile.ZipFile(path)
    except (zipfile.BadZipFile, OSError, EOFError) as e:
        raise BadInputError(f"{path}: not a readable .npz archive ({e}); the file may be truncated or "
                            f"of another format. Write it again with numpy.savez.") from e
    out: dict[str, LazyArray] = {}
    with zf:
        for info in zf.infolist():
            if not info.filename.endswith(".npy"):
                continue
            key = info.filename[:-4]
            label = f"{path} array {key!r}"
            try:
                out[key] = _open_member(path, zf, info, label)
            except (zipfile.BadZipFile, OSError, EOFError, ValueError) as e:
                raise BadInputError(f"{label}: cannot read the archive member ({e}); the file is "
                                    f"probably truncated. Write the recording again.") from e
    return out


def _open_member(path: Path, zf: zipfile.ZipFile, info: zipfile.ZipInfo, label: str) -> LazyArray:
    with zf.open(info) as f:
        shape, fortran, dtype = _header(f, label)
    if info.compress_type == zipfile.ZIP_STORED:
        with open(path, "rb") as raw:
            raw.seek(info.header_offset)
            local = raw.read(30)
            if len(local) < 30 or local[:4] != b"PK\x03\x04":
                raise BadInputError(f"{label}: corrupt zip entry header; write the recording again.")
            name_len = int.from_bytes(local[26:28], "little")
            extra_len = int.from_bytes(local[28:30], "little")
            raw.seek(info.header_offset + 30 + name_len + extra_len)
            _header(raw, label)
            offset = raw.tell()
        need = offset + int(np.prod(shape, dtype=np.int64)) * dtype.itemsize
        if path.stat().st_size < need:
            raise BadInputError(f"{label}: the file ends before the array does (truncated); write "
                                f"the recording again.")
        if int(np.prod(shape, dtype=np.int64)) == 0:
            return MappedArray(np.zeros(shape, dtype), label)
        mm = np.memmap(path, dtype=dtype, mode="r", offset=offset, shape=shape, order="F" if fortran else "C")
        return MappedArray(mm, label)
    if fortran:
        with zf.open(info) as f:
            return MappedArray(np.lib.format.read_array(f, allow_pickle=False), label)
    return StreamedArray(path, info.filename, shape, dtype, label)


# ----- recordings -----------------------------------------------------------------------------
@dataclass
class Recording:
    """A set of windows matched to the model's inputs (recorded or synthetic)."""

    label: str
    kind: str  # "recorded" or "synthetic:<name>"
    arrays: dict[str, LazyArray]
    windows: int
    path: Path | None = None
    sha256: str | None = None
    notes: dict[str, Any] = field(default_factory=dict)

    def batches(self, batch_size: int) -> Iterator[tuple[int, dict[str, np.ndarray[Any, Any]]]]:
        """``(first window index, {input name: array})`` per batch; NaN/Inf refused."""
        for start in range(0, self.windows, batch_size):
            stop = min(start + batch_size, self.windows)
            feeds = {name: a.read(start, stop) for name, a in self.arrays.items()}
            for name, x in feeds.items():
                check_finite(x, start, f"{self.label} array {name!r}")
            yield start, feeds

    def to_json(self) -> dict[str, Any]:
        return {"path": str(self.path) if self.path else None, "label": self.label, "sha256": self.sha256,
                "windows": self.windows, "kind": self.kind, **({"notes": self.notes} if self.notes else {})}


def check_finite(x: np.ndarray[Any, Any], first_window: int, label: str) -> None:
    """Refuse NaN/Inf, naming the first offending window (global index) and position."""
    if x.dtype.kind not in "fc" or np.isfinite(x).all():
        return
    bad = np.argwhere(~np.isfinite(x))[0]
    what = "NaN" if np.isnan(x[tuple(bad)]) else "Inf"
    where = f" at position {tuple(int(i) for i in bad[1:])}" if len(bad) > 1 else ""
    raise BadInputError(
        f"{label}: window {first_window + int(bad[0])} holds {what}{where}. seqgate compares "
        f"finite inputs only (a non-finite input makes every runtime's output meaningless). "
        f"Repair or drop that window and record again."
    )


def open_arrays(path: Path) -> dict[str, LazyArray]:
    """All arrays of a ``.npy``/``.npz`` file, lazily (see the module docstring)."""
    if not path.is_file():
        raise BadInputError(f"recording {path} does not exist (or is not a file).")
    suffix = path.suffix.lower()
    if suffix == ".npy":
        return _open_npy(path)
    if suffix == ".npz":
        return _open_npz(path)
    raise BadInputError(f"recording {path}: expected a .npy or .npz file, got {suffix or 'no suffix'!r}. "
                        f"Build one from a CSV with `seqgate windows`.")


def load_recording(path: str | Path, specs: list[InputSpec], hashed: bool = True) -> Recording:
    """Open ``path`` and match its arrays to ``specs``; every mismatch is a clear error.
    ``hashed=False`` skips the sha256 (a cluster worker reading a file the driver hashed)."""
    p = Path(path)
    arrays = open_arrays(p)
    chosen = _match_keys(p, arrays, specs)
    n = _check_arrays(p, chosen, specs)
    return Recording(str(p), "recorded", chosen, n, path=p, sha256=sha256_file(p) if hashed else None)


def _match_keys(path: Path, arrays: dict[str, LazyArray], specs: list[InputSpec]) -> dict[str, LazyArray]:
    keys = sorted(arrays)
    names = [s.name for s in specs]
    if not arrays:
        want = "one array" if len(specs) == 1 else names
        raise BadInputError(f"recording {path} holds no arrays; expected {want}.")
    if len(specs) == 1:
        if names[0] in arrays:
            return {names[0]: arrays[names[0]]}
        data = [k for k in keys if k not in RESERVED_KEYS]
        if len(data) == 1:
            return {names[0]: arrays[data[0]]}
        raise BadInputError(
            f"recording {path}: the model has one input ({names[0]!r}) but the file holds "
            f"{len(data)} candidate arrays {data}. Keep one array, or name it {names[0]!r}."
        )
    missing = [n for n in names if n not in arrays]
    if missing:
        raise BadInputError(
            f"recording {path}: no array for model input(s) {missing}. A multi-input model needs one "
            f"array per input, keyed by the input name: expected keys {names}, found {keys}."
        )
    return {n: arrays[n] for n in names}


def _check_arrays(path: Path, chosen: dict[str, LazyArray], specs: list[InputSpec]) -> int:
    symbols: dict[str, tuple[int, str]] = {}
    counts = set()
    for spec in specs:
        a = chosen[spec.name]
        label = f"recording {path}, array {a.label.rsplit(' ', 1)[-1] if ' array ' in a.label else path.name}"
        expected = f"{spec.describe()} (first axis = windows)"
        found = f"{a.dtype.name} {list(a.shape)}"
        if a.dtype != spec.dtype:
            raise BadInputError(
                f"{label} for input {spec.name!r}: dtype {a.dtype.name}, the model expects {expected}; "
                f"received {found}. Convert it, e.g. x.astype(np.{spec.dtype.name}), and save again."
            )
        if len(a.shape) != len(spec.window_dims):
            raise BadInputError(
                f"{label} for input {spec.name!r}: rank {len(a.shape)}, the model expects {expected}; "
                f"received {found}. Lay the windows out as [windows, steps, features]."
            )
        for axis, (want, got) in enumerate(zip(spec.window_dims, a.shape, strict=True)):
            if axis == 0:
                continue
            if isinstance(want, int) and want != got:
                raise BadInputError(
                    f"{label} for input {spec.name!r}: axis {axis} has {got}, the model expects "
                    f"{expected}; received {found}."
                )
            if isinstance(want, str):
                prev = symbols.setdefault(want, (got, spec.name))
                if prev[0] != got:
                    raise BadInputError(
                        f"recording {path}: dim {want!r} is {prev[0]} in input {prev[1]!r} but {got} in "
                        f"{spec.name!r}; inputs sharing a dim must agree."
                    )
        counts.add(a.shape[0])
    for want, (got, name) in symbols.items():
        base, offset = split_dim(want)
        if offset and base in symbols and symbols[base][0] + offset != got:
            size, other = symbols[base]
            raise BadInputError(
                f"recording {path}: dim {want!r} of input {name!r} is {got}, but {base!r} is {size} in "
                f"input {other!r}, so it should be {size + offset}; record windows that keep that relation.")
    if len(counts) != 1:
        raise BadInputError(f"recording {path}: the arrays hold different numbers of windows {sorted(counts)}; "
                            f"every input needs one row per window.")
    n = counts.pop()
    if n == 0:
        raise BadInputError(f"recording {path} holds no windows (first axis is 0); record some windows.")
    return int(n)


# ----- per-feature scale (for synthetic windows) ------------------------------------------------
@dataclass
class FeatureStats:
    """Per-feature (last axis) mean, std, min, max of one input over windows and steps."""

    mean: np.ndarray[Any, Any]
    std: np.ndarray[Any, Any]
    low: np.ndarray[Any, Any]
    high: np.ndarray[Any, Any]
    shape: tuple[int, ...]  # one window's shape


def feature_stats(rec: Recording, batch_size: int) -> dict[str, FeatureStats]:
    """Streaming per-feature statistics of every input (float64 sums, one batch at a time)."""
    acc: dict[str, list[Any]] = {}
    for _, feeds in rec.batches(batch_size):
        for name, x in feeds.items():
            flat = (x.reshape(-1, x.shape[-1]) if x.ndim >= 2 else x.reshape(-1, 1)).astype(np.float64)
            s = acc.setdefault(name, [0, 0.0, 0.0, np.inf, -np.inf])
            s[0] += flat.shape[0]
            s[1] = s[1] + flat.sum(axis=0)
            s[2] = s[2] + (flat * flat).sum(axis=0)
            s[3] = np.minimum(s[3], flat.min(axis=0))
            s[4] = np.maximum(s[4], flat.max(axis=0))
    out = {}
    for name, (n, s1, s2, lo, hi) in acc.items():
        mean = s1 / n
        var = np.maximum(s2 / n - mean * mean, 0.0)
        out[name] = FeatureStats(mean, np.sqrt(var), lo, hi, tuple(rec.arrays[name].shape[1:]))
    return out
