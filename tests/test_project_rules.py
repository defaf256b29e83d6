"""Static guards on the project's own rules: seqgate builds ONNX itself and imports frameworks lazily."""

from __future__ import annotations

import ast
from pathlib import Path

SRC = Path(__file__).resolve().parent.parent / "src" / "seqgate"
FORBIDDEN_MODULES = ("torch.onnx", "tf2onnx", "keras2onnx", "onnxmltools", "onnx2torch", "onnxscript")
HEAVY = ("tensorflow", "keras", "torch", "matplotlib")


def _modules() -> list[tuple[Path, ast.Module]]:
    return [(p, ast.parse(p.read_text(encoding="utf-8"))) for p in sorted(SRC.rglob("*.py"))]


def _imported(node: ast.AST) -> list[str]:
    if isinstance(node, ast.Import):
        return [a.name for a in node.names]
    if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
        return [node.module, *(f"{node.module}.{a.name}" for a in node.names)]
    return []


def test_no_existing_converter_is_used() -> None:
    for path, tree in _modules():
        for node in ast.walk(tree):
            for name in _imported(node):
                assert not name.startswith(FORBIDDEN_MODULES), f"{path}: imports {name}"
            if isinstance(node, ast.Attribute) and node.attr == "onnx" and isinstance(node.value, ast.Name):
                assert node.value.id != "torch", f"{path}:{node.lineno}: uses torch.onnx"


def test_heavy_frameworks_only_imported_inside_functions() -> None:
    # Module-level imports of a framework would make `import seqgate` (and --help) slow. Modules that
    # are only ever imported after the framework is loaded say so in their docstring.
    allowed = {f"export/torch/{n}.py"
               for n in ("modules", "functions", "shapes", "values", "registry", "packing")}
    for path, tree in _modules():
        if path.relative_to(SRC).as_posix() in allowed:
            continue
        for node in tree.body:
            for name in _imported(node):
                assert name.split(".")[0] not in HEAVY, f"{path}: module-level import of {name}"
