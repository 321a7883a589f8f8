"""The documents state the limits the code enforces (issue 12, section 2).

Source: issue 12 section 2 ("The README says formulas are limited to 500 characters and 32
parameters; the service allows 200 and 8. One table of limits per interface, generated from
the code, in the README and docs/service.md"). The references are the code itself: the engine's
FORMULA_LIMITS, SERVICE_FORMULA_LIMITS and domain table, the service's DEFAULTS and what a
default app reports at /v1/limits.
"""

from __future__ import annotations

import pathlib
import re

import pytest

import propcalc
from propcalc.output.limit_tables import TABLES, render_blocks, stale_blocks

ROOT = pathlib.Path(__file__).resolve().parents[1]
DOCS = [ROOT / "README.md", ROOT / "docs" / "service.md"]


@pytest.mark.parametrize("path", DOCS, ids=lambda p: p.name)
def test_the_generated_tables_in_the_documents_are_current(path: pathlib.Path) -> None:
    text = path.read_text()
    for name in TABLES:
        assert f"<!-- generated: {name} -->" in text, f"{path.name} lacks the {name} table"
    assert stale_blocks(text) == [], ("regenerate with: python3 -m propcalc.output.limit_tables "
                                      "--write")
    assert render_blocks(text) == text


def test_the_formula_table_states_both_interfaces() -> None:
    table = TABLES["formula-limits"]()
    assert (f"| `max_length` | {propcalc.FORMULA_LIMITS.max_length} | "
            f"{propcalc.SERVICE_FORMULA_LIMITS.max_length} (`MAX_FORMULA_LENGTH`) |") in table
    assert (f"| `max_parameters` | {propcalc.FORMULA_LIMITS.max_parameters} | "
            f"{propcalc.SERVICE_FORMULA_LIMITS.max_parameters} (`MAX_FORMULA_PARAMS`) |") in table


def test_a_changed_limit_makes_the_block_stale(monkeypatch) -> None:
    import dataclasses

    from propcalc.output import limit_tables

    text = (ROOT / "README.md").read_text()
    monkeypatch.setattr(limit_tables, "LIMITS",
                        dataclasses.replace(limit_tables.LIMITS, max_length=499))
    assert stale_blocks(text) == ["formula-limits"]


def _settings_table() -> dict[str, str]:
    """The `setting | default | limits` table of docs/service.md: {name: default text}."""
    text = (ROOT / "docs" / "service.md").read_text()
    table = text.split("| setting | default | limits |", 1)[1].split("\n\n", 1)[0]
    out = {}
    for line in table.splitlines()[2:]:
        cells = [c.strip() for c in line.strip("|").split("|")]
        names = re.findall(r"`([A-Z_]+)`", cells[0])
        defaults = [d.strip() for d in cells[1].split(" / ")]
        for name, default in zip(names, defaults if len(defaults) == len(names) else
                                 defaults * len(names)):
            out[name] = default
    return out


def _as_text(value: object) -> str:
    if value is None:
        return "none"
    if isinstance(value, bool):
        return str(value).lower()
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    if isinstance(value, int) and value >= 1024 * 1024 and value % (1024 * 1024) == 0:
        return f"{value // (1024 * 1024)} MiB"
    return str(value)


def test_the_service_settings_table_matches_the_defaults() -> None:
    pytest.importorskip("flask")
    from propcalc_api._config import DEFAULTS

    documented = _settings_table()
    assert set(documented) == set(DEFAULTS)
    assert {k: documented[k] for k in DEFAULTS} == {k: _as_text(v) for k, v in DEFAULTS.items()}
    # the formula limits of the service are the engine's (one definition)
    assert DEFAULTS["MAX_FORMULA_LENGTH"] == propcalc.SERVICE_FORMULA_LIMITS.max_length
    assert DEFAULTS["MAX_FORMULA_PARAMS"] == propcalc.SERVICE_FORMULA_LIMITS.max_parameters


def test_a_default_service_reports_the_documented_formula_limits() -> None:
    pytest.importorskip("flask")
    from propcalc_api import create_app

    body = create_app().test_client().get("/v1/limits").get_json()
    assert body["max_formula_length"] == propcalc.SERVICE_FORMULA_LIMITS.max_length
    assert body["max_formula_params"] == propcalc.SERVICE_FORMULA_LIMITS.max_parameters
