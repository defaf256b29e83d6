"""Safe loading of Keras files: ``keras.models.load_model(path, safe_mode=True, compile=False)``.

Lambda layers and classes from outside Keras are refused, because loading them would run code
from the file; every failure becomes one clear paragraph (exit 2).

Opt-in to custom classes (a custom RNN cell): :func:`load_custom_code` imports the Python file
the user names (``--custom-code FILE.py``, gate ``[model] custom_code``), which defines the
classes and registers them with ``keras.saving.register_keras_serializable``. Only that file's
code runs; loading itself keeps ``safe_mode=True`` (Lambda layers stay refused). Registration is
Keras's own process-wide registry, so the import is done once per file and process.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from seqgate.errors import BadInputError, UnsafeSourceError
from seqgate.util.text import first_line

OPT_IN = ("--custom-code FILE.py (in a gate config: [model] custom_code = \"FILE.py\")")
_IMPORTED: dict[Path, Any] = {}


def load_custom_code(path: str | Path) -> Any:
    """Import the user's file of custom Keras classes (the explicit opt-in; module docstring)."""
    import importlib.util
    import sys

    from seqgate.sources.spec import check_custom_code

    p = Path(path).resolve()
    if p in _IMPORTED:
        return _IMPORTED[p]
    check_custom_code(path)
    name = f"seqgate_custom_code_{len(_IMPORTED)}_{p.stem}"
    spec = importlib.util.spec_from_file_location(name, p)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    try:
        from seqgate.util.frameworks import import_keras

        import_keras()
        spec.loader.exec_module(module)
    except Exception as e:
        del sys.modules[name]
        why = f"{type(e).__name__}: {first_line(str(e))}"
        raise BadInputError(f"custom code {path}: importing it failed ({why}). "
                            f"Fix the file so that `python {p.name}` runs, then try again.") from e
    _IMPORTED[p] = module
    return module


def load_keras(path: Path, custom_code: Path | None = None) -> Any:
    """Load a Keras model with ``safe_mode=True``; translate every failure to a clear error.

    ``custom_code``: the user's opt-in file, imported first (:func:`load_custom_code`)."""
    from seqgate.util.frameworks import import_keras, quiet_stderr

    keras = import_keras()
    if custom_code is not None:
        load_custom_code(custom_code)
    _check_container(path)
    try:
        with quiet_stderr():
            return keras.models.load_model(str(path), safe_mode=True, compile=False)
    except ValueError as e:
        msg = str(e)
        if "Lambda" in msg or "lambda" in msg or "safe_mode" in msg:
            raise UnsafeSourceError(
                f"{path}: refused to load a Lambda layer — loading it would run Python code "
                f"stored in the file. Replace the Lambda with built-in layers, or export from "
                f"a model rebuilt without it. (Keras said: {first_line(msg)})"
            ) from e
        raise BadInputError(f"{path}: Keras could not load the model: {first_line(msg)}") from e
    except TypeError as e:
        msg = str(e)
        if "Could not locate" in msg or "custom" in msg.lower() or "register" in msg:
            raise UnsafeSourceError(
                f"{path}: {_custom_class_what(msg)} that is not part of Keras; building it would run "
                f"code from outside Keras, so safe loading refuses it by default. If you trust the code, "
                f"opt in by naming the Python file that defines and registers the class "
                f"(@keras.saving.register_keras_serializable) with {OPT_IN}; otherwise rebuild the model "
                f"from built-in layers and save it again."
            ) from e
        raise BadInputError(f"{path}: Keras could not load the model: {first_line(msg)}") from e
    except (OSError, KeyError, AttributeError, IndexError) as e:
        raise BadInputError(
            f"{path}: not a readable Keras model file ({type(e).__name__}: "
            f"{first_line(str(e))}). Save the model with model.save('model.keras')."
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
    return f"the model uses a custom class ({first_line(msg)})"


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
    if path.suffix.lower() == ".keras":
        _check_archive_config(path)
    if path.suffix.lower() in (".h5", ".hdf5") and head != b"\x89HDF\r\n\x1a\n":
        raise BadInputError(f"{path}: not an HDF5 file (wrong signature). It may be truncated or "
                            f"of another format.")


def _check_archive_config(path: Path) -> None:
    """A ``.keras`` archive holds ``config.json``: a JSON object describing the model (class_name, config)."""
    import json
    import zipfile

    try:
        with zipfile.ZipFile(path) as z:
            names = z.namelist()
            raw = z.read("config.json") if "config.json" in names else None
    except (zipfile.BadZipFile, OSError) as e:
        raise BadInputError(f"{path}: the Keras archive cannot be read ({e}); the file is probably damaged. "
                            f"Copy or save the model again.") from e
    if raw is None:
        shown = ", ".join(names[:6]) or "nothing"
        raise BadInputError(f"{path}: the archive has no config.json (it holds {shown}), so it is not a Keras "
                            f"model file. Save the model with model.save('model.keras').")
    try:
        cfg = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as e:
        why = f"at line {e.lineno}, column {e.colno}: {e.msg}" if isinstance(e, json.JSONDecodeError) else \
            "not UTF-8 text"
        raise BadInputError(f"{path}: config.json inside the Keras archive is not valid JSON ({why}); the "
                            f"archive was damaged or edited by hand. Save the model again with "
                            f"model.save('model.keras').") from e
    if not isinstance(cfg, dict) or "class_name" not in cfg:
        kind = type(cfg).__name__
        raise BadInputError(f"{path}: config.json inside the Keras archive is a JSON {kind} without "
                            f"'class_name', not a Keras model description; the archive was damaged or edited "
                            f"by hand. Save the model again with model.save('model.keras').")
