"""The package's layers import only downwards (a structural check, no numbers).
Source: the layer order of DEVELOPERS.md (common practice, no source)."""
from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
# lower number = lower layer; a module may import its own layer (same subpackage) or below
LAYERS = {
    "povmfit.models": 0,
    "povmfit.fitting.display": 1,
    "povmfit.fitting.data": 1.5,
    "povmfit.fitting.inference": 2,
    "povmfit.fitting.tomography": 2,
    "povmfit.fitting.emulation": 2,
    "povmfit.fitting.tally": 2,
    "povmfit.fitting.outputs": 3,
    "povmfit.fitting.workflow": 4,
    "povmfit.fitting.cli": 5,
}
FOLDERS = {"models": "povmfit.models", "fitting": "povmfit.fitting"}


def _layer(module: str):
    """(layer name, rank) of a povmfit module, or None for the package roots."""
    for name in sorted(LAYERS, key=len, reverse=True):
        if module == name or module.startswith(name + "."):
            return name, LAYERS[name]
    return None


def _modules():
    for folder, package in FOLDERS.items():
        for path in sorted((ROOT / folder).rglob("*.py")):
            parts = path.relative_to(ROOT / folder).with_suffix("").parts
            parts = parts[:-1] if parts[-1] == "__init__" else parts
            yield path, ".".join((package,) + parts)


def _imports(path: Path, module: str):
    tree = ast.parse(path.read_text())
    package = module if path.name == "__init__.py" else module.rsplit(".", 1)[0]
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            yield from (alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - node.level + 1]
                yield ".".join(base + ([node.module] if node.module else []))
            elif node.module:
                yield node.module


def test_no_module_imports_a_layer_above_its_own():
    upward = []
    for path, module in _modules():
        own = _layer(module)
        if own is None:
            continue
        for target in _imports(path, module):
            other = _layer(target)
            if other is not None and other[0] != own[0] and other[1] >= own[1]:
                upward.append(f"{module} imports {target}")
    assert not upward, "\n".join(upward)


def test_estimators_print_nothing():
    """Progress and warnings go through callbacks and the warnings module, not print()."""
    printing = []
    for path, module in _modules():
        layer = _layer(module)
        if layer is None or layer[1] > 2:
            continue
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.Call) and getattr(node.func, "id", None) == "print":
                printing.append(f"{module}: line {node.lineno}")
    assert not printing, "\n".join(printing)
