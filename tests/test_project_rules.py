"""Static guards on the project's own rules, computed from the source with ``ast``.

Each test fails when the rule breaks: seqgate builds ONNX itself (only ``onnx`` and
``onnxruntime`` among imported modules whose name contains "onnx"; never ``torch.onnx``),
imports frameworks lazily, has no import cycle, keeps modules and functions small, registers
mappings in explicit tables (no import for its side effect), imports no ``_private`` name from
another module, and the library never imports the CLI.
"""

from __future__ import annotations

import ast
from pathlib import Path

SRC = Path(__file__).resolve().parent.parent / "src" / "seqgate"
HEAVY = ("tensorflow", "keras", "torch", "matplotlib")
ONNX_ALLOWED = ("onnx", "onnxruntime")
MAX_MODULE_LINES = 500
MAX_FUNCTION_LINES = 60


def _modules() -> list[tuple[Path, ast.Module]]:
    return [(p, ast.parse(p.read_text(encoding="utf-8"))) for p in sorted(SRC.rglob("*.py"))]


def _dotted(path: Path) -> str:
    rel = path.relative_to(SRC.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _resolve(path: Path, node: ast.ImportFrom) -> str:
    """Absolute module name of a ``from`` import (relative imports resolved)."""
    if node.level == 0:
        return node.module or ""
    base = _dotted(path).split(".")
    if path.name != "__init__.py":
        base.pop()
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def _imports(path: Path, tree: ast.AST) -> list[tuple[str, list[str], int]]:
    """(module, imported names, line) for every import anywhere in the file."""
    out: list[tuple[str, list[str], int]] = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out += [(a.name, [], node.lineno) for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            out.append((_resolve(path, node), [a.name for a in node.names], node.lineno))
    return out


def _internal_targets(module: str, names: list[str], known: set[str]) -> set[str]:
    """The seqgate modules an import statement depends on (``from pkg import mod`` → pkg.mod)."""
    if not module.startswith("seqgate"):
        return set()
    targets = {f"{module}.{n}" for n in names if f"{module}.{n}" in known}
    if len(targets) < len(names) or not names:
        targets.add(module)
    return {t for t in targets if t in known}


def test_only_onnx_and_onnxruntime_among_onnx_modules() -> None:
    for path, tree in _modules():
        for module, names, line in _imports(path, tree):
            for full in [module, *(f"{module}.{n}" for n in names)]:
                assert full != "torch.onnx" and not full.startswith("torch.onnx."), f"{path}:{line}: {full}"
            if "onnx" in module.split(".")[0]:
                assert module.split(".")[0] in ONNX_ALLOWED, f"{path}:{line}: imports {module}"
        for node in ast.walk(tree):
            if isinstance(node, ast.Attribute) and node.attr == "onnx" and isinstance(node.value, ast.Name):
                assert node.value.id != "torch", f"{path}:{node.lineno}: uses torch.onnx"


def test_heavy_frameworks_only_imported_inside_functions() -> None:
    # Module-level imports of a framework would make `import seqgate` (and --help) slow. Modules that
    # are only ever imported after the framework is loaded say so in their docstring.
    allowed = {f"export/torch/{n}.py"
               for n in ("modules", "functions", "shapes", "values", "registry", "packing", "statistics",
                         "selection", "assign")}
    for path, tree in _modules():
        if path.relative_to(SRC).as_posix() in allowed:
            continue
        for node in tree.body:
            if isinstance(node, ast.Import | ast.ImportFrom):
                for module, _names, _ in _imports(path, node):
                    assert module.split(".")[0] not in HEAVY, f"{path}: module-level import of {module}"


def _graph() -> dict[str, set[str]]:
    mods = _modules()
    known = {_dotted(p) for p, _ in mods}
    graph: dict[str, set[str]] = {}
    for path, tree in mods:
        me = _dotted(path)
        deps: set[str] = set()
        for module, names, _ in _imports(path, tree):
            deps |= _internal_targets(module, names, known)
        deps.discard(me)
        # A package's own __init__ is imported on the way to any of its modules; that edge is not a cycle.
        graph[me] = {d for d in deps if not me.startswith(d + ".")}
    return graph


def test_no_import_cycle_inside_seqgate() -> None:
    """Depth-first search over every import (module level and lazy): no module reaches itself."""
    graph = _graph()
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(m: str) -> None:
        state[m] = 1
        stack.append(m)
        for d in sorted(graph.get(m, ())):
            if state.get(d) == 1:
                cycle = [*stack[stack.index(d):], d]
                raise AssertionError("import cycle: " + " → ".join(cycle))
            if d not in state:
                visit(d)
        stack.pop()
        state[m] = 2

    for m in sorted(graph):
        if m not in state:
            visit(m)


def test_library_never_imports_the_cli() -> None:
    for path, tree in _modules():
        if _dotted(path).startswith("seqgate.cli"):
            continue
        for module, _names, line in _imports(path, tree):
            assert not module.startswith("seqgate.cli"), f"{path}:{line}: imports {module}"


def test_modules_and_functions_stay_small() -> None:
    problems = []
    for path, tree in _modules():
        n = len(path.read_text(encoding="utf-8").splitlines())
        if n > MAX_MODULE_LINES:
            problems.append(f"{path.relative_to(SRC)}: {n} lines (max {MAX_MODULE_LINES})")
        for node in ast.walk(tree):
            if isinstance(node, ast.FunctionDef | ast.AsyncFunctionDef):
                length = (node.end_lineno or node.lineno) - node.lineno + 1
                if length > MAX_FUNCTION_LINES:
                    problems.append(f"{path.relative_to(SRC)}:{node.lineno}: {node.name} is {length} lines "
                                    f"(max {MAX_FUNCTION_LINES})")
    assert not problems, "\n".join(problems)


def test_no_registration_by_import_side_effect() -> None:
    """An import whose names are never used (``import x  # noqa: F401``) exists only for its side effect."""
    for path, tree in _modules():
        source = path.read_text(encoding="utf-8").splitlines()
        for node in ast.walk(tree):
            if isinstance(node, ast.Import | ast.ImportFrom) and "F401" in source[node.lineno - 1]:
                raise AssertionError(f"{path}:{node.lineno}: import kept only for its side effect")


def test_no_private_name_imported_from_another_module() -> None:
    for path, tree in _modules():
        for module, names, line in _imports(path, tree):
            if module.startswith("seqgate"):
                private = [n for n in names if n.startswith("_") and not n.startswith("__")]
                assert not private, f"{path}:{line}: imports private {private} from {module}"
