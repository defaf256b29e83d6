"""What a model source is: the parsed form of a source string (``Source``, ``parse_source``).

A source is one of:

- a Keras 3 file (``.keras``, or legacy ``.h5`` / ``.hdf5``), loaded with
  ``keras.models.load_model(path, safe_mode=True, compile=False)``: Lambda layers and classes
  from outside Keras are refused, because loading them would run code from the file;
- a PyTorch factory ``path/to/file.py:FACTORY`` or ``package.module:FACTORY`` plus an optional
  state dict loaded with ``torch.load(weights_only=True)``. Naming a Python file runs it: that
  is the user's own code, run by the user's choice.

A Keras source may name its custom code (``--custom-code FILE.py``, ``[model] custom_code``):
the Python file that defines and registers the model's custom classes, run before loading
(``sources.keras.load_keras``). It is part of what defines the model, so it is hashed like the
model file (``Source.files``, the export's provenance).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from seqgate.errors import BadInputError

KERAS_SUFFIXES = (".keras", ".h5", ".hdf5")


@dataclass(frozen=True)
class Source:
    """A parsed source argument."""

    framework: str  # "keras" | "torch"
    text: str
    path: Path | None = None
    factory: str | None = None
    weights: Path | None = None
    custom_code: Path | None = None  # Keras: the user's file of custom classes (opt-in)

    def files(self) -> list[Path]:
        """Files whose bytes define the model (hashed into every report)."""
        out = [p for p in (self.path, self.weights, self.custom_code) if p is not None]
        return out


def parse_source(text: str, weights: str | None = None, custom_code: str | Path | None = None) -> Source:
    """Classify ``text`` as a Keras file or a PyTorch factory; check files exist."""
    p = Path(text)
    if p.suffix.lower() in KERAS_SUFFIXES:
        if weights:
            raise BadInputError(f"--weights is for PyTorch sources; {text} is a Keras file that "
                                f"already holds its weights. Drop --weights.")
        if not p.is_file():
            raise BadInputError(f"model file {text} does not exist (or is not a file).")
        return Source("keras", text, path=p, custom_code=check_custom_code(custom_code))
    if custom_code is not None:
        raise BadInputError(f"--custom-code ([model] custom_code) is for Keras sources; {text} is not a Keras "
                            f"file ({', '.join(KERAS_SUFFIXES)}). A PyTorch factory's file is already your "
                            f"code: drop --custom-code.")
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


def check_custom_code(path: str | Path | None) -> Path | None:
    """The custom-code file as a Path, after checking it is an existing ``.py`` file (exit 2 if not)."""
    if path is None:
        return None
    p = Path(path)
    if p.suffix != ".py" or not p.is_file():
        raise BadInputError(f"custom code {path}: not an existing .py file. Name the Python file that defines "
                            f"and registers your Keras classes (keras.saving.register_keras_serializable).")
    return p
