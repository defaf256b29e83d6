"""What a model source is and how it is loaded safely.

A source is one of:

- a Keras 3 file (``.keras``, or legacy ``.h5`` / ``.hdf5``), loaded with
  ``keras.models.load_model(path, safe_mode=True, compile=False)``: Lambda layers and classes
  from outside Keras are refused, because loading them would run code from the file;
- a PyTorch factory ``path/to/file.py:FACTORY`` or ``package.module:FACTORY`` plus an optional
  state dict loaded with ``torch.load(weights_only=True)``. Naming a Python file runs it: that
  is the user's own code, run by the user's choice.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from seqgate.errors import BadInputError, UnsafeSourceError

KERAS_SUFFIXES = (".keras", ".h5", ".hdf5")


@dataclass(frozen=True)
class Source:
    """A parsed source argument."""

    framework: str  # "keras" | "torch"
    text: str
    path: Path | None = None
    factory: str | None = None
    weights: Path | None = None

    def files(self) -> list[Path]:
        """Files whose bytes define the model (hashed into every report)."""
        out = [p for p in (self.path, self.weights) if p is not None]
        return out


def parse_source(text: str, weights: str | None = None) -> Source:
    """Classify ``text`` as a Keras file or a PyTorch factory; check files exist."""
    p = Path(text)
    if p.suffix.lower() in KERAS_SUFFIXES:
        if weights:
            raise BadInputError(f"--weights is for PyTorch sources; {text} is a Keras file that "
                                f"already holds its weights. Drop --weights.")
        if not p.is_file():
            raise BadInputError(f"model file {text} does not exist (or is not a file).")
        return Source("keras", text, path=p)
    if ":" in text:
        mod, _, factory = text.rpartition(":")
        if not factory.isidentifier():
            raise BadInputError(f"source {text!r}: {factory!r} is not a Python name; use "
                                f"FILE.py:FACTORY or package.module:FACTORY.")
        w = Path(weights) if weights else None
        if w is not None and not w.is_file():
            raise BadInputError(f"weights file {weights} does not exist (or is not a file).")
        if mod.endswith(".py"):
            mp = Path(mod)
            if not mp.is_file():
                raise BadInputError(f"source {text!r}: Python file {mod} does not exist.")
            return Source("torch", text, path=mp, factory=factory, weights=w)
        return Source("torch", text, factory=f"{mod}:{factory}", weights=w)
    if p.suffix.lower() in (".pt", ".pth", ".bin", ".ckpt"):
        raise BadInputError(
            f"{text} looks like a PyTorch checkpoint on its own. seqgate builds the module from "
            f"your code and loads weights into it: pass FILE.py:FACTORY and --weights {text}."
        )
    raise BadInputError(
        f"cannot tell what kind of model {text!r} is: expected a Keras file ending in "
        f"{', '.join(KERAS_SUFFIXES)} or a PyTorch factory FILE.py:FACTORY."
    )


def load_keras(path: Path) -> Any:
    """Load a Keras model with ``safe_mode=True``; translate every failure to a clear error."""
    from seqgate.frameworks import _quiet_stderr, import_keras

    keras = import_keras()
    _check_container(path)
    try:
        with _quiet_stderr():
            return keras.models.load_model(str(path), safe_mode=True, compile=False)
    except ValueError as e:
        msg = str(e)
        if "Lambda" in msg or "lambda" in msg or "safe_mode" in msg:
            raise UnsafeSourceError(
                f"{path}: refused to load a Lambda layer — loading it would run Python code "
                f"stored in the file. Replace the Lambda with built-in layers, or export from "
                f"a model rebuilt without it. (Keras said: {_first_line(msg)})"
            ) from e
        raise BadInputError(f"{path}: Keras could not load the model: {_first_line(msg)}") from e
    except TypeError as e:
        msg = str(e)
        if "Could not locate" in msg or "custom" in msg.lower() or "register" in msg:
            raise UnsafeSourceError(
                f"{path}: {_custom_class_what(msg)} that is not part of Keras; building it would run "
                f"code from outside Keras, so safe loading refuses it. seqgate loads only Keras's own "
                f"layers: rebuild the model from built-in layers and save it again."
            ) from e
        raise BadInputError(f"{path}: Keras could not load the model: {_first_line(msg)}") from e
    except (OSError, KeyError, AttributeError, IndexError) as e:
        raise BadInputError(
            f"{path}: not a readable Keras model file ({type(e).__name__}: "
            f"{_first_line(str(e))}). Save the model with model.save('model.keras')."
        ) from e


def _custom_class_what(msg: str) -> str:
    """'layer 'doubler' uses the custom class Doubler' from Keras's TypeError text, when present."""
    import re

    cls = re.search(r"Could not locate (?:class|function) '([^']+)'", msg)
    name = re.search(r"Full object config: \{.*?'name': '([^']+)'", msg)
    if cls and name:
        return f"layer {name.group(1)!r} uses the custom class {cls.group(1)}"
    if cls:
        return f"the model uses the custom class {cls.group(1)}"
    return f"the model uses a custom class ({_first_line(msg)})"


def _check_container(path: Path) -> None:
    """A .keras file is a complete zip archive; an .h5 file has the HDF5 signature."""
    import zipfile

    with open(path, "rb") as f:
        head = f.read(8)
    if path.suffix.lower() == ".keras" and not head.startswith(b"PK"):
        raise BadInputError(f"{path}: not a Keras archive (a .keras file is a zip file; this one "
                            f"is not). It may be truncated or of another format.")
    if path.suffix.lower() == ".keras" and not zipfile.is_zipfile(path):
        raise BadInputError(f"{path}: the Keras archive is incomplete (its zip directory is missing); "
                            f"the file is probably truncated. Copy or save the model again.")
    if path.suffix.lower() in (".h5", ".hdf5") and head != b"\x89HDF\r\n\x1a\n":
        raise BadInputError(f"{path}: not an HDF5 file (wrong signature). It may be truncated or "
                            f"of another format.")


def _first_line(msg: str) -> str:
    line = msg.strip().splitlines()[0] if msg.strip() else "no message"
    return line[:300]
