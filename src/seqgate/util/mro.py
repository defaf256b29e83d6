"""Give one object a method that runs just before a base class's own, without touching the class.

``super().forward(...)`` inside a subclass resolves to the next ``forward`` in the instance's
method resolution order. :func:`insert_before_base` swaps the instance's class for a generated
subclass of its own class and of a small class ``I(base)`` holding the new methods; C3
linearisation places ``I`` immediately before ``base`` (every class the instance's class lists
before ``base`` stays before it), so a call that would reach ``base.forward`` reaches
``I.forward`` first, and ``I.forward`` can call ``base.forward`` itself. Nothing else changes:
the generated class keeps the class's name and module, and other instances are untouched.
"""

from __future__ import annotations

from typing import Any


def insert_before_base(obj: Any, base: type, methods: dict[str, Any]) -> type:
    """Swap ``obj``'s class (module docstring); returns the class to restore with ``obj.__class__ = …``."""
    cls = type(obj)
    mixin = type(f"{base.__name__}Before", (base,), dict(methods))
    new = type(cls.__name__, (cls, mixin), {"__module__": cls.__module__, "__qualname__": cls.__qualname__})
    mro = new.__mro__
    if mro.index(mixin) + 1 != mro.index(base):
        raise TypeError(f"cannot place a method before {base.__name__} in {cls.__name__}'s method order")
    obj.__class__ = new
    return cls
