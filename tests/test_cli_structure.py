"""How the ``propcalc`` command is put together: modules, contributed commands, no service import.

Structural checks of our own design (DEVELOPERS.md, "Adding a CLI subcommand"); the entry-point
mechanism is the standard one of Python packaging (importlib.metadata, "Entry points"
specification of the Python Packaging User Guide). No numeric reference is involved.
"""

from __future__ import annotations

import argparse
import ast
import io
import pathlib
import subprocess
import sys
from importlib import metadata

import pytest

import propcalc
from propcalc import cli
from propcalc.cli import program
from cli_helpers import run

CLI = pathlib.Path(cli.__file__).resolve().parent


def _modules() -> list[pathlib.Path]:
    return sorted(CLI.rglob("*.py"))


@pytest.mark.parametrize("path", _modules(), ids=lambda p: p.name)
def test_no_cli_module_imports_the_service_or_a_web_library(path):
    tree = ast.parse(path.read_text())
    for node in ast.walk(tree):
        names = []
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            names = [node.module]
        for name in names:
            assert name.split(".")[0] not in {"propcalc_api", "flask", "marshmallow", "werkzeug",
                                              "gunicorn", "apispec"}, (path.name, name)


@pytest.mark.parametrize("path", _modules(), ids=lambda p: p.name)
def test_cli_modules_stay_small(path):
    assert len(path.read_text().splitlines()) <= 500


def test_every_command_module_is_registered_once():
    found = {p.stem for p in (CLI / "commands").glob("*.py")} - {"__init__"}
    assert set(program.BUILTIN_COMMANDS) == found
    assert len(program.BUILTIN_COMMANDS) == len(found)


def test_building_the_parser_imports_no_web_library():
    code = ("import sys; from propcalc.cli import build_parser; build_parser(); "
            "print(sorted(m for m in ('flask', 'marshmallow', 'werkzeug') if m in sys.modules))")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=120, check=True)
    assert done.stdout.strip() == "[]"


def test_serve_is_contributed_through_the_entry_point_group():
    names = {e.name: e for e in metadata.entry_points(group=program.ENTRY_POINT_GROUP)}
    assert names["serve"].value.startswith("propcalc_api._command:register")
    sub = next(a for a in cli.build_parser()._actions if a.dest == "command")
    assert "serve" in sub.choices


def test_version():
    code, out, err = run("--version")
    assert (code, err) == (0, "")
    assert out == f"propcalc {propcalc.__version__}\n"


# ---- a contributed command, end to end, with fake entry points -----------------------------
def _register_hello(sub):
    p = sub.add_parser("hello", help="say hello")
    p.add_argument("--name", default="world")
    p.set_defaults(func=lambda args, out: out.write(f"hello {args.name}\n") and 0)


class _Entry:
    def __init__(self, name, value, target=None, extras=()):
        self.name, self.value, self.extras, self._target = name, value, list(extras), target

    def load(self):
        if self._target is None:
            raise ModuleNotFoundError("No module named 'somewebthing'", name="somewebthing")
        return self._target


def _fake_entry_points(entries):
    def entry_points(group=None):
        assert group == program.ENTRY_POINT_GROUP
        return entries
    return entry_points


def test_a_contributed_command_runs(monkeypatch):
    monkeypatch.setattr(program.metadata, "entry_points", _fake_entry_points(
        [_Entry("hello", "tests:_register_hello", _register_hello)]))
    assert run("hello", "--name", "you") == (0, "hello you\n", "")


def test_a_contributed_command_that_cannot_load_says_what_to_install(monkeypatch):
    monkeypatch.setattr(program.metadata, "entry_points", _fake_entry_points(
        [_Entry("web", "somewebthing.cli:register", None, ["web"])]))
    code, out, err = run("web", "--anything", "1")
    assert (code, out) == (2, "")
    assert err == ("propcalc: error: the web command needs the 'web' extra (somewebthing is not "
                   "installed): python3 -m pip install -e \".[web]\" in the propcalc checkout\n")


def test_a_contributed_command_cannot_replace_a_built_in(monkeypatch):
    def register_report(sub):
        raise AssertionError("a built-in name must not be registered again")

    monkeypatch.setattr(program.metadata, "entry_points", _fake_entry_points(
        [_Entry("report", "x:register", register_report)]))
    code, out, _ = run("report", "tanh", "-w", "1", "--json")
    assert code == 0 and '"phase"' in out


def test_help_lists_the_built_ins_in_order():
    out = io.StringIO()
    assert cli.main(["--help"], out=out, err=io.StringIO()) == 0
    sub = next(a for a in cli.build_parser()._actions if a.dest == "command")
    names = list(sub.choices)
    assert names[:16] == ["activations", "show", "report", "edge", "phase", "depth-scales",
                          "plan", "network", "shape", "dropout", "maxout", "selfnorm",
                          "isometry", "softmax", "simulate", "demo"]
    assert isinstance(sub, argparse._SubParsersAction)
