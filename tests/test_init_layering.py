"""The modules of propcalc.init import one way: layers -> draw -> plan -> gains, planner -> torch.

Structural checks of our own layout rule (DEVELOPERS.md, "Layout"); no external source. Every
import is read from the syntax tree, including imports inside functions, so a lazy import that
reaches upwards (the old circle between the plan's ``draw`` method and draw.py) is caught.
"""

from __future__ import annotations

import ast
import pathlib

import pytest

INIT = pathlib.Path(__file__).resolve().parents[1] / "propcalc" / "init"

#: a module may import only the modules of a lower rank
RANK = {"layers": 0, "draw": 1, "plan": 2, "training_plan": 2, "gains": 3, "planner": 3, "network_readout_plan": 3,
        "recommend": 4,
        "torch_adapter": 4, "network_plan": 4, "torch_ops": 4, "torch_links": 5, "torch_walk": 6,
        "torch_attention": 7, "torch_dispatch": 8, "torch_reader": 9, "torch_measure": 10,
        "torch_network": 10}


def _sibling_imports(name: str) -> set[str]:
    tree = ast.parse((INIT / f"{name}.py").read_text())
    out = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.level == 1:
            if node.module:
                out.add(node.module.split(".")[0])
            else:
                out.update(alias.name for alias in node.names)
    return out


def test_every_init_module_has_a_rank():
    assert {p.stem for p in INIT.glob("*.py")} - {"__init__"} == set(RANK)


@pytest.mark.parametrize("name", sorted(RANK))
def test_imports_point_down(name):
    for other in _sibling_imports(name):
        assert RANK[other] < RANK[name], f"{name} imports {other}"


def test_draw_knows_no_plan_type():
    assert _sibling_imports("draw") == {"layers"}
