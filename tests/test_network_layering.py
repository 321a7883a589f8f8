"""propcalc.networks imports only from below it, and its modules import one way.

Structural checks of our own layout rule (DEVELOPERS.md, "Layout"; docs/networks.md); no external
source. Every import is read from the syntax tree, imports inside functions included.
"""

from __future__ import annotations

import ast
import pathlib

import pytest

NETWORKS = pathlib.Path(__file__).resolve().parents[1] / "propcalc" / "networks"

#: a module may import only the modules of a lower rank
RANK = {"fields": 0, "blocks": 0, "description": 1, "kernels": 1, "rules": 2, "mixing": 3, "walk": 4,
        "sim_blocks": 2, "softmax_moments": 1, "sim_grid": 1, "simulate": 3, "spatial": 2, "summary": 5, "propagate": 6,
        "targets": 7, "check": 7}
#: the engine's lower layers (errors/results/domains -> numerics -> activations -> meanfield)
BELOW = {"errors", "results", "domains", "caches", "jsonable", "numerics", "activations",
         "meanfield"}


def _imports(name: str) -> tuple[set[str], set[str]]:
    """(sibling modules, propcalc subpackages) imported by ``name``."""
    tree = ast.parse((NETWORKS / f"{name}.py").read_text())
    siblings, engine = set(), set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            if node.level == 1:
                siblings.add(node.module.split(".")[0] if node.module else "")
            elif node.level == 2:
                engine.add(node.module.split(".")[0] if node.module else "")
            elif node.module and node.module.split(".")[0] in ("propcalc", "propcalc_api",
                                                               "flask", "marshmallow"):
                engine.add(node.module)
        elif isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.split(".")[0] in ("propcalc", "propcalc_api", "flask",
                                                "marshmallow", "torch", "matplotlib"):
                    engine.add(alias.name)
    return siblings, engine


def test_every_module_has_a_rank():
    assert {p.stem for p in NETWORKS.glob("*.py")} - {"__init__"} == set(RANK)


@pytest.mark.parametrize("name", sorted(RANK))
def test_imports_point_down(name):
    siblings, engine = _imports(name)
    for other in siblings:
        assert RANK[other] < RANK[name], f"{name} imports {other}"
    assert engine <= BELOW, f"{name} imports {engine - BELOW}"


def test_no_module_exceeds_500_lines():
    for path in NETWORKS.glob("*.py"):
        assert len(path.read_text().splitlines()) <= 500, path.name
