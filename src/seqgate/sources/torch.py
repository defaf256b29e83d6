"""Build a PyTorch module from a factory source and load its state dict safely.

A PyTorch source is ``path/to/file.py:FACTORY`` or ``package.module:FACTORY`` (see
``seqgate.sources``). FACTORY is a zero-argument function or ``nn.Module`` class that
returns the ``torch.nn.Module``.

**Naming a Python file runs it.** seqgate imports the file (its directory is put first on
``sys.path`` while it is imported, so it can import its neighbours) and calls FACTORY. That is
the user's own code, run by the user's choice; seqgate never runs code found in a weights file.
The import writes no ``__pycache__/`` beside the file (``sys.dont_write_bytecode`` is set while
it runs, then restored).

What may be called is limited, because a gate config names code to run: FACTORY must be a
Python function or a ``torch.nn.Module`` subclass, defined outside the Python standard library
and builtins — its ``__module__`` is not ``builtins`` nor a standard-library module
(``sys.stdlib_module_names``), and that module's file does not lie under the standard library's
directories (``sysconfig`` ``stdlib``/``platstdlib``, site-packages excepted). A
``package.module`` source whose top package is in the standard library is refused before it is
imported. Anything else (``os:abort``, a builtin, a ``functools.partial``, a plain class) is
refused (exit 2) before it is called.

Weights (``--weights``) must be a state dict saved with ``torch.save(model.state_dict(), path)``.
They are read with ``torch.load(weights_only=True, map_location="cpu")``, which refuses pickled
classes, so a pickled whole module (``torch.save(model, path)``) is refused with a message that
says how to save a state dict instead. Keys and shapes are compared with the module's own state
dict before ``load_state_dict(strict=True)`` so the message can list every mismatch.

The module is then put in ``eval()`` mode (dropout inert, batch-norm running statistics);
:func:`load_torch_with_info` also says whether it was in training mode before.

Every failure is a :class:`~seqgate.errors.BadInputError` (exit 2) with one paragraph: what
failed, what was expected, what was found, what to do.
"""

from __future__ import annotations

import hashlib
import importlib
import importlib.util
import inspect
import sys
import sysconfig
import traceback
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from seqgate.errors import BadInputError, UnsafeSourceError
from seqgate.sources.spec import Source
from seqgate.util.text import first_line

_MAX_LISTED = 12


@dataclass(frozen=True)
class LoadInfo:
    """What loading did besides building the module."""

    was_training: bool
    weights_loaded: bool


def load_torch(src: Source) -> Any:
    """The source's ``nn.Module``, weights loaded, in ``eval()`` mode (see module docstring)."""
    return load_torch_with_info(src)[0]


def load_torch_with_info(src: Source) -> tuple[Any, LoadInfo]:
    """:func:`load_torch` plus :class:`LoadInfo`."""
    from seqgate.util.frameworks import import_torch

    torch = import_torch()
    if src.framework != "torch" or src.factory is None:
        raise BadInputError(f"{src.text} is not a PyTorch source; use FILE.py:FACTORY or "
                            f"package.module:FACTORY.")
    factory = _find_factory(src)
    check_factory(factory, _label(src), torch)
    module = _call_factory(src, factory, torch)
    if src.weights is not None:
        _load_weights(module, src.weights, torch)
    was_training = bool(module.training)
    module.eval()
    return module, LoadInfo(was_training=was_training, weights_loaded=src.weights is not None)


# ----- importing the factory --------------------------------------------------------------
def _find_factory(src: Source) -> Any:
    assert src.factory is not None
    if src.path is not None:
        mod = _import_file(src.path)
        name = src.factory
        where = str(src.path)
    else:
        modname, _, name = src.factory.rpartition(":")
        if _stdlib_name(modname):
            raise BadInputError(
                f"source {src.factory!r}: {modname} is part of the Python standard library, not a model "
                f"factory; seqgate does not import or call it. Point at your own file "
                f"(FILE.py:FACTORY) or package (package.module:FACTORY).")
        mod = _import_module(modname)
        where = modname
    if not hasattr(mod, name):
        names = sorted(k for k, v in vars(mod).items() if callable(v) and not k.startswith("_")
                       and getattr(v, "__module__", None) == mod.__name__)
        listed = ", ".join(names[:_MAX_LISTED]) or "none"
        raise BadInputError(
            f"{where} defines no {name!r}; expected a zero-argument function or class that returns "
            f"the torch.nn.Module. Callables defined there: {listed}. Name one of them after the colon."
        )
    factory = getattr(mod, name)
    if not callable(factory):
        raise BadInputError(f"{where}:{name} is a {type(factory).__name__}, not a callable; point "
                            f"at a function or class that returns the torch.nn.Module.")
    return factory


def _import_file(path: Path) -> Any:
    """Import ``path`` under a private module name derived from its absolute path."""
    resolved = path.resolve()
    tag = hashlib.sha256(str(resolved).encode()).hexdigest()[:12]
    modname = f"seqgate_user_{_identifier(resolved.stem)}_{tag}"
    spec = importlib.util.spec_from_file_location(modname, resolved)
    if spec is None or spec.loader is None:
        raise BadInputError(f"{path} cannot be imported as a Python file.")
    mod = importlib.util.module_from_spec(spec)
    sys.modules[modname] = mod
    folder = str(resolved.parent)
    sys.path.insert(0, folder)
    no_bytecode = sys.dont_write_bytecode
    sys.dont_write_bytecode = True  # no __pycache__/ beside the user's file
    try:
        spec.loader.exec_module(mod)
    except SyntaxError as e:
        sys.modules.pop(modname, None)
        raise BadInputError(f"{path} has a Python syntax error at line {e.lineno}: {e.msg}. "
                            f"Fix the file and run again.") from None
    except BaseException as e:
        sys.modules.pop(modname, None)
        if isinstance(e, KeyboardInterrupt):
            raise
        raise BadInputError(
            f"running {path} failed with {type(e).__name__}: {first_line(e)}{_user_line(e, resolved)}. "
            f"seqgate imports the file to find the factory; make it importable on its own."
        ) from None
    finally:
        sys.dont_write_bytecode = no_bytecode
        if folder in sys.path:
            sys.path.remove(folder)
    return mod


def _import_module(modname: str) -> Any:
    try:
        return importlib.import_module(modname)
    except ModuleNotFoundError as e:
        raise BadInputError(f"Python module {modname!r} cannot be found ({first_line(e)}); install the "
                            f"package or pass FILE.py:FACTORY instead.") from None
    except Exception as e:
        raise BadInputError(f"importing {modname} failed with {type(e).__name__}: {first_line(e)}.") from None


def _label(src: Source) -> str:
    return f"{src.path}:{src.factory}" if src.path is not None else str(src.factory)


def _stdlib_name(modname: str) -> bool:
    top = modname.split(".")[0]
    return top in sys.stdlib_module_names or top in sys.builtin_module_names


def _in_stdlib_dirs(file: str | None) -> bool:
    """True for a file under the standard library's directories that is not under site-packages."""
    if not file:
        return False
    f = Path(file).resolve()
    paths = sysconfig.get_paths()
    std = {Path(paths[k]).resolve() for k in ("stdlib", "platstdlib") if k in paths}
    site = {Path(paths[k]).resolve() for k in ("purelib", "platlib") if k in paths}
    return any(f.is_relative_to(d) for d in std) and not any(f.is_relative_to(d) for d in site)


def check_factory(factory: Any, label: str, torch: Any) -> None:
    """Refuse a FACTORY that is not a function or ``nn.Module`` subclass of the user's (module docstring)."""
    is_module_class = inspect.isclass(factory) and issubclass(factory, torch.nn.Module)
    if not (inspect.isfunction(factory) or is_module_class):
        if inspect.isclass(factory):
            kind = f"class {factory.__module__}.{factory.__qualname__} (not an nn.Module)"
        else:
            kind = f"{type(factory).__name__} object"
        raise BadInputError(
            f"{label} is a {kind}, not a Python function or a torch.nn.Module class; seqgate calls only "
            f"those, so it did not call it. Point FACTORY at a function or nn.Module class that builds "
            f"the model.")
    owner = getattr(factory, "__module__", None) or ""
    file = getattr(sys.modules.get(owner), "__file__", None)
    if owner == "builtins" or _stdlib_name(owner) or _in_stdlib_dirs(file):
        raise BadInputError(
            f"{label} is {owner}.{factory.__qualname__}, defined in the Python standard library, not a model "
            f"factory; seqgate did not call it. Point FACTORY at a function or nn.Module class of your own.")


def _call_factory(src: Source, factory: Any, torch: Any) -> Any:
    label = _label(src)
    try:
        module = factory()
    except Exception as e:
        raise BadInputError(
            f"the factory {label} raised {type(e).__name__}: {first_line(e)}"
            f"{_user_line(e, src.path.resolve() if src.path else None)}. It is called with no "
            f"arguments and must return the torch.nn.Module; fix it so that it does."
        ) from None
    if not isinstance(module, torch.nn.Module):
        raise BadInputError(
            f"the factory {label} returned a {type(module).__module__}.{type(module).__name__}, "
            f"expected a torch.nn.Module. Return the module itself (not a state dict, tuple or "
            f"class)."
        )
    wrong = sorted({str(p.dtype) for p in module.parameters() if p.dtype != torch.float32})
    if wrong:
        raise BadInputError(
            f"the module from {label} has parameters of dtype {', '.join(wrong)}; seqgate exports "
            f"float32 models. Convert with model.float() in the factory."
        )
    return module


# ----- weights ----------------------------------------------------------------------------
def _load_weights(module: Any, path: Path, torch: Any) -> None:
    state = _read_state_dict(path, torch)
    own = module.state_dict()
    missing = [k for k in own if k not in state]
    unexpected = [k for k in state if k not in own]
    if missing or unexpected:
        prefixed = bool(unexpected) and all(k.startswith("module.") for k in unexpected) and \
            {k[len("module."):] for k in unexpected} >= set(missing)
        hint = (" The saved keys start with 'module.' (a DataParallel or DistributedDataParallel "
                "wrapper): save model.module.state_dict() instead." if prefixed else "")
        raise BadInputError(
            f"weights {path} do not fit the module: {_listing('missing', missing)}"
            f"{'; ' if missing and unexpected else ''}{_listing('unexpected', unexpected)}. "
            f"Expected exactly the keys of model.state_dict() ({len(own)} entries); save the "
            f"weights of the same architecture with torch.save(model.state_dict(), path).{hint}"
        )
    bad = [f"{k}: expected {tuple(own[k].shape)}, found {tuple(state[k].shape)}"
           for k in own if tuple(own[k].shape) != tuple(state[k].shape)]
    if bad:
        shown = "; ".join(bad[:_MAX_LISTED]) + ("; …" if len(bad) > _MAX_LISTED else "")
        raise BadInputError(
            f"weights {path} have {len(bad)} tensor(s) of the wrong shape ({shown}). The factory "
            f"builds a different size of model than the one saved; make them agree."
        )
    try:
        module.load_state_dict(state, strict=True)
    except Exception as e:
        raise BadInputError(f"loading weights {path} failed: {first_line(e)}.") from None


_SAVE_HINT = "save the trained weights with torch.save(model.state_dict(), 'FILE.pt') and pass that file"


def _what_file(path: Path) -> str | None:
    """What ``path`` really is when it cannot be a ``torch.save`` file; ``None`` when it may be one.

    ``torch.save`` writes a zip archive holding ``<name>/data.pkl`` (or, before PyTorch 1.6, a raw
    pickle, which starts with the pickle protocol byte 0x80).
    """
    import zipfile

    size = path.stat().st_size
    with open(path, "rb") as f:
        head = f.read(512)
    if size == 0:
        return "an empty file (0 bytes)"
    if head.startswith(b"PK"):
        if not zipfile.is_zipfile(path):
            return f"an incomplete zip archive ({size} bytes, its directory is missing): probably truncated"
        with zipfile.ZipFile(path) as z:
            names = z.namelist()
        if not any(n == "data.pkl" or n.endswith("/data.pkl") for n in names):
            shown = ", ".join(names[:5]) + (", …" if len(names) > 5 else "")
            return f"a zip archive of another kind (it holds {shown}; a .keras model or an .npz?)"
        return None
    if head.startswith(b"\x89HDF"):
        return "an HDF5 file (a Keras .h5 model?)"
    if head[:1] == b"\x80":
        return None
    try:
        text = head.decode("utf-8")
    except UnicodeDecodeError:
        return f"a binary file of an unknown kind ({size} bytes, starting {head[:8].hex(' ')})"
    if all(c.isprintable() or c in "\r\n\t" for c in text):
        first = (text.strip().splitlines() or [""])[0][:40]
        return f"a text file ({size} bytes, starting {first!r})"
    return f"a file of an unknown kind ({size} bytes)"


def _read_state_dict(path: Path, torch: Any) -> dict[str, Any]:
    what = _what_file(path)
    if what is not None:
        raise BadInputError(f"weights file {path} is {what}: not a readable PyTorch weights file. Pass the "
                            f"state dict of the trained model: {_SAVE_HINT}.")
    try:
        obj = torch.load(str(path), weights_only=True, map_location="cpu")
    except Exception as e:
        msg = str(e)
        if "Unsupported global" in msg or "weights_only" in msg.lower() or "WeightsUnpickler" in msg:
            raise UnsafeSourceError(
                f"{path} holds pickled Python objects (a whole module or custom classes), not a "
                f"state dict; seqgate loads weights with torch.load(weights_only=True) and will "
                f"not run code stored in a file. Save the weights with "
                f"torch.save(model.state_dict(), '{path.name}') and pass that file."
            ) from None
        raise BadInputError(
            f"{path} is not a readable PyTorch weights file ({type(e).__name__}: {first_line(e)}). It "
            f"may be truncated or of another format; save it with "
            f"torch.save(model.state_dict(), path)."
        ) from None
    if not isinstance(obj, dict) or not all(isinstance(v, torch.Tensor) for v in obj.values()):
        if isinstance(obj, dict):
            keys = ", ".join(repr(k) for k in list(obj)[:_MAX_LISTED])
            found = f"a dict whose values are not all tensors (keys: {keys})"
        else:
            found = f"a {type(obj).__name__}"
        raise BadInputError(
            f"{path} holds {found}, expected a state dict (parameter name → tensor). If it is a "
            f"training checkpoint, save just the model part: "
            f"torch.save(model.state_dict(), path)."
        )
    return obj


# ----- message helpers --------------------------------------------------------------------
def _listing(label: str, keys: list[str]) -> str:
    if not keys:
        return ""
    shown = ", ".join(keys[:_MAX_LISTED]) + (", …" if len(keys) > _MAX_LISTED else "")
    return f"{len(keys)} {label} key(s) ({shown})"



def _user_line(e: BaseException, path: Path | None) -> str:
    """`` at FILE:LINE`` for the deepest traceback frame in the user's file, if any."""
    if path is None:
        return ""
    frames = [f for f in traceback.extract_tb(e.__traceback__) if Path(f.filename) == path]
    if not frames:
        return ""
    f = frames[-1]
    return f" (at {path.name}:{f.lineno}: {(f.line or '').strip()})"


def _identifier(text: str) -> str:
    return "".join(c if c.isalnum() else "_" for c in text) or "file"
