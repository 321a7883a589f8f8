"""Packaging checks: every engine subpackage is installed by a non-editable install.

CI installs propcalc with ``pip install .`` (not editable), which copies only the packages listed in
``pyproject.toml``; a subpackage missing from that list imports here (from the checkout) and fails
only there. Source: the setuptools documentation on ``[tool.setuptools] packages`` (explicit lists
are not searched).
"""

from __future__ import annotations

import pathlib
import tomllib

ROOT = pathlib.Path(__file__).resolve().parents[1]


def test_every_subpackage_is_listed_in_pyproject():
    listed = set(tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]["packages"])
    found = {".".join(p.parent.relative_to(ROOT).parts)
             for p in (ROOT / "propcalc").rglob("__init__.py")}
    assert found - listed == set(), "add these to [tool.setuptools] packages in pyproject.toml"
    assert "propcalc_api" in listed
