"""Make a module callable, so ``seqgate.verify(...)`` runs the command's function.

The Python API mirrors the commands (``seqgate.export``, ``seqgate.verify``, ``seqgate.profile``,
``seqgate.gate``) while those names are also modules of the package; a module object whose
class defines ``__call__`` serves both uses without renaming anything.
"""

from __future__ import annotations

import sys
import types
from typing import Any


def make_callable(module_name: str, function_name: str) -> None:
    """Calling module ``module_name`` calls its attribute ``function_name``."""
    module = sys.modules[module_name]

    class _CallableModule(types.ModuleType):
        def __call__(self, *args: Any, **kwargs: Any) -> Any:
            return getattr(self, function_name)(*args, **kwargs)

    module.__class__ = _CallableModule
