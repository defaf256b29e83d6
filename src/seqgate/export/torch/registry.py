"""The PyTorch capture's one explicit registry: module class, function or tensor method → mapping.

``MODULES`` comes from ``modules``; ``FUNCTIONS`` and ``METHODS`` merge the tables of
``functions`` and ``shapes`` (a key defined twice is a bug, caught at import). Adding a
function is adding one ``@TABLE.add(...)`` entry in one of those modules.
"""

from __future__ import annotations

from typing import Any

from seqgate.export.torch import assign, functions, modules, packing, selection, shapes, statistics
from seqgate.export.torch.modules import module_mapping
from seqgate.export.torch.values import Table


def _merge(*tables: Table) -> tuple[dict[Any, Any], dict[str, Any]]:
    funcs: dict[Any, Any] = {}
    methods: dict[str, Any] = {}
    for t in tables:
        for target, into in ((t.functions, funcs), (t.methods, methods)):
            twice = set(target) & set(into)
            if twice:
                raise RuntimeError(f"seqgate registry: {sorted(map(str, twice))} mapped twice")
            into.update(target)
    return funcs, methods


FUNCTIONS, METHODS = _merge(functions.TABLE, shapes.TABLE, packing.TABLE, modules.BASE_CALLS, statistics.TABLE,
                            selection.TABLE, assign.TABLE)

__all__ = ["FUNCTIONS", "METHODS", "module_mapping"]
