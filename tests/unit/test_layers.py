"""The package's imports point down its layers (README, Development): a guard against tangles.

Every relative import in groupmodel/ (module level and inside functions; ``TYPE_CHECKING`` blocks are only
for type checkers and are skipped) must go to a lower layer or stay inside its own subpackage.
"""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[2] / "groupmodel"

#: Layer of each top-level part of the package; a part may import parts of lower layers only.
LAYERS = {
    "errors": 0, "text": 0, "__version__": 0, "schemas": 0,
    "engine": 1, "runtime": 1,
    "model": 2, "images": 2, "inference": 2,
    "outputs": 3,
    "analysis": 4, "audit": 4,
    "cli": 5, "fit": 5,
}
#: Deliberate exceptions, each with its reason.
ALLOWED = {
    # Model.write / Model.design_sidecar: public conveniences (README) that hand the model to the writers;
    # imported inside the methods, so the model layer never loads outputs by itself.
    ("model", "outputs"),
}


def _imports(path: Path) -> list[tuple[str, int]]:
    """(imported top-level part, line) for every relative import outside TYPE_CHECKING blocks."""
    tree = ast.parse(path.read_text())
    skip: set[int] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test):
            skip.update(id(n) for n in ast.walk(node))
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    here = parts if path.name == "__init__.py" else parts[:-1]
    here = [p for p in here if p != "__init__"]
    found = []
    for node in ast.walk(tree):
        if id(node) in skip or not isinstance(node, ast.ImportFrom) or node.level == 0:
            continue
        base = here[: len(here) - (node.level - 1)]
        targets = [base + node.module.split(".")] if node.module else [base + [a.name] for a in node.names]
        found += [(t[1] if len(t) > 1 else "__init__", node.lineno) for t in targets]
    return found


def test_imports_point_down() -> None:
    wrong = []
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = path.relative_to(PACKAGE).with_suffix("").parts
        own = parts[0]
        if own == "__init__":
            continue
        for target, line in _imports(path):
            if target == own or target == "__init__" or (own, target) in ALLOWED:
                continue
            assert own in LAYERS and target in LAYERS, f"{path}:{line}: unknown part {own} or {target}"
            if LAYERS[target] >= LAYERS[own]:
                wrong.append(f"{path.relative_to(PACKAGE)}:{line}: {own} (layer {LAYERS[own]}) imports "
                             f"{target} (layer {LAYERS[target]})")
    assert not wrong, "\n".join(wrong)
