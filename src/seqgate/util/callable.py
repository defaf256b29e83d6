"""Make a package callable, so ``seqgate.verify(...)`` runs the command's function.

The Python API mirrors the commands (``seqgate.export``, ``seqgate.verify``, ``seqgate.profile``,
``seqgate.gate``) while those names are also packages; a module object whose class defines
``__call__`` serves both uses. The function's module is imported on the first call, so importing
the package stays cheap and free of cycles.
"""

from __future__ import annotations

import importlib
import sys
import types
from typing import Any


def make_callable(package_name: str, target: str) -> None:
    """Calling package ``package_name`` calls ``target`` (``"module.path:function"``)."""
    module_path, _, function_name = target.partition(":")
    package = sys.modules[package_name]

    class _CallablePackage(types.ModuleType):
        def __call__(self, *args: Any, **kwargs: Any) -> Any:
            return getattr(importlib.import_module(module_path), function_name)(*args, **kwargs)

    package.__class__ = _CallablePackage
