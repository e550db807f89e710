"""The package's layout follows the pipeline: imports point from later stages to earlier ones only."""

import ast
from pathlib import Path

import ebm_layers as el

PACKAGE = Path(el.__file__).resolve().parent

# Stage of every top-level name under ebm_layers. Within a stage, modules may import each other.
STAGES = {
    "_checks": 0,
    "_random": 0,
    "_buffers": 0,
    "datasets": 0,
    "viz": 0,
    "model": 0,
    "phases": 1,
    "evaluation": 2,
    "training": 3,
    "features": 4,
}


def _stage(module: Path) -> int:
    return STAGES[module.relative_to(PACKAGE).parts[0].removesuffix(".py")]


def _imported(source: str, package: tuple[str, ...]) -> set[str]:
    """Top-level names under ebm_layers that ``source``, a module in the subpackage ``package``
    (``()`` at the top), imports anywhere in the file."""
    names = set()
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.ImportFrom) and node.level > 0:
            base = package[: len(package) - (node.level - 1)]
            parts = [*base, *(node.module.split(".") if node.module else [])]
            names |= {parts[0]} if parts else {alias.name for alias in node.names}
        elif isinstance(node, ast.ImportFrom) and (node.module or "").startswith("ebm_layers."):
            names.add(node.module.split(".")[1])
    return names


def test_every_module_has_a_stage():
    for module in PACKAGE.rglob("*.py"):
        if module.name != "__init__.py" or module.parent != PACKAGE:
            _stage(module)  # a KeyError names a module outside the layout


def test_imports_point_from_later_stages_to_earlier_ones():
    backwards = []
    for module in PACKAGE.rglob("*.py"):
        if module.parent == PACKAGE and module.name == "__init__.py":
            continue  # the public API imports everything
        stage = _stage(module)
        for name in _imported(module.read_text(), module.relative_to(PACKAGE).parent.parts):
            if STAGES[name] > stage:
                backwards.append(f"{module.relative_to(PACKAGE)} imports {name}")
    assert not backwards


def test_the_check_sees_relative_and_absolute_imports():
    # Negative control: imports that the stage rule must catch are all found.
    source = "from ..training import fit\nfrom ebm_layers.evaluation import metrics\nfrom . import units\n"
    assert _imported(source, ("model",)) == {"training", "evaluation", "model"}
    assert _imported("from .phases.gibbs import gibbs_sweep\n", ()) == {"phases"}
