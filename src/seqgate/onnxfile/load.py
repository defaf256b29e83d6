"""Loading an ONNX file with clear errors, and reading the dims of its values."""

from __future__ import annotations

from pathlib import Path

import onnx

from seqgate.errors import BadInputError


def load_onnx(path: str | Path) -> onnx.ModelProto:
    """Load an ONNX file with a clear error for missing, empty or corrupt files."""
    p = Path(path)
    if not p.is_file():
        raise BadInputError(f"ONNX file {p} does not exist (or is not a file).")
    if p.suffix.lower() in (".keras", ".h5", ".hdf5", ".py", ".pt", ".pth", ".npz", ".npy", ".csv", ".toml"):
        raise BadInputError(f"{p} is not an ONNX file (it looks like a {p.suffix} file). This command reads "
                            f"the file `seqgate export` writes: export the model first, then pass the .onnx.")
    try:
        model = onnx.load(str(p))
    except Exception as e:  # protobuf raises several types for corrupt bytes
        raise BadInputError(f"{p}: not a readable ONNX model ({type(e).__name__}); the file may "
                            f"be truncated or of another format. Export it again.") from e
    if not model.graph.node and not model.graph.output:
        raise BadInputError(f"{p}: the ONNX file holds no graph; export it again.")
    return model


def value_dims(vi: onnx.ValueInfoProto) -> list[int | str | None]:
    """Dims of a graph value: ints for fixed dims, names for symbolic ones, None when unnamed."""
    out: list[int | str | None] = []
    for d in vi.type.tensor_type.shape.dim:
        out.append(d.dim_value if d.HasField("dim_value") else (d.dim_param or None))
    return out
