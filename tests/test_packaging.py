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


def _setup_commands() -> list[str]:
    """The sh blocks of the README's "Set-up on a fresh machine" section, in order."""
    import re

    text = (ROOT / "README.md").read_text()
    section = text.split("## Set-up on a fresh machine", 1)[1].split("\n## ", 1)[0]
    return [block.strip() for block in re.findall(r"```sh\n(.*?)```", section, re.S)]


def test_the_first_set_up_command_installs_what_the_readme_examples_use():
    # issue 12 section 4: the first command installed no `plot` extra, so the README's own
    # --plot examples failed after it; it installs from the checkout (editable)
    readme = (ROOT / "README.md").read_text()
    first = _setup_commands()[0]
    assert first.startswith('python3 -m pip install -e ".[') and first.endswith("propcalc demo")
    extras = set(first.split('".[', 1)[1].split(']"', 1)[0].split(","))
    needed = {"plot": "--plot" in readme, "service": "propcalc serve" in readme,
              "sweep": "progress bar" in readme}
    assert {name for name, used in needed.items() if used} <= extras
    assert ("torch" in first) == ("torch_adapter import" in readme or "read_module" in readme)
    declared = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"][
        "optional-dependencies"]
    assert extras <= set(declared)


def test_ci_runs_the_readme_set_up_command_2():
    # .ci/run installs exactly as the README's second command says, then runs its tests
    second = _setup_commands()[1]
    ci = (ROOT / ".ci" / "run").read_text()
    assert second.replace("python3 ", "python ") in ci.replace("--quiet ", "")
