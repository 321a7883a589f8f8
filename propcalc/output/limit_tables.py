"""The limits of each interface as Markdown tables, generated from the code that enforces them.

The README and ``docs/service.md`` carry these tables between marker comments
(``<!-- generated: NAME -->`` ... ``<!-- end: NAME -->``); ``tests/test_limit_tables.py``
checks that the text there is what this module generates, so a limit changed in the code
cannot leave the documents behind (issue 12 section 2: the README said 500 characters and 32
parameters where the service allowed 200 and 8). Run ``python3 -m propcalc.output.limit_tables
--write`` from the checkout to rewrite the blocks.

Tables:

* ``formula-limits``: every formula limit, for the Python API and the CLI
  (:data:`propcalc.FORMULA_LIMITS`) and for the HTTP service
  (:data:`propcalc.SERVICE_FORMULA_LIMITS`, whose length and parameter count are the
  service's defaults ``MAX_FORMULA_LENGTH`` and ``MAX_FORMULA_PARAMS``);
* ``input-domains``: the documented domain of every numeric input
  (:func:`propcalc.domains.domain_table`), which the Python API, the CLI and the service
  all check.
"""

from __future__ import annotations

import pathlib
import re
import sys
from collections.abc import Callable

from ..activations.formula.limits import LIMITS, SERVICE_LIMITS, formula_limit_rows
from ..domains import domain_table, format_bound

__all__ = ["TABLES", "formula_limits_table", "input_domains_table", "render_blocks",
           "stale_blocks"]

#: the service's configuration key of the limits it lets an operator change
_SERVICE_KEYS = {"max_length": "MAX_FORMULA_LENGTH", "max_parameters": "MAX_FORMULA_PARAMS"}


def _cell(text: object) -> str:
    return str(text).replace("|", "\\|")


def _number(value: float) -> str:
    return format_bound(value) if isinstance(value, float) else str(value)


def formula_limits_table() -> str:
    """| limit | Python API and CLI | HTTP service | what it bounds |, one row per limit."""
    lines = ["| limit | Python API and CLI | HTTP service | what it bounds |",
             "| --- | --- | --- | --- |"]
    for ours, served in zip(formula_limit_rows(LIMITS), formula_limit_rows(SERVICE_LIMITS)):
        key = _SERVICE_KEYS.get(served.name)
        service = _number(served.value) + (f" (`{key}`)" if key else "")
        lines.append(f"| `{ours.name}` | {_number(ours.value)} | {service} | "
                     f"{_cell(ours.meaning)} |")
    return "\n".join(lines)


def input_domains_table() -> str:
    """| input | allowed values | units |, one row per documented numeric domain."""
    lines = ["| input | allowed values | units |", "| --- | --- | --- |"]
    for row in domain_table():
        lines.append(f"| `{row['name']}` | {_cell(row['constraint'])} | {_cell(row['units'])} |")
    return "\n".join(lines)


#: the generated tables by marker name
TABLES: dict[str, Callable[[], str]] = {
    "formula-limits": formula_limits_table,
    "input-domains": input_domains_table,
}

_BLOCK = re.compile(r"(<!-- generated: ([a-z-]+) -->\n)(.*?)\n?(<!-- end: \2 -->)", re.S)


def render_blocks(text: str) -> str:
    """``text`` with every marked block replaced by its generated table."""
    def fill(match: re.Match[str]) -> str:
        name = match.group(2)
        if name not in TABLES:
            raise KeyError(f"unknown generated table {name!r}; known: {', '.join(TABLES)}")
        return f"{match.group(1)}{TABLES[name]()}\n{match.group(4)}"

    return _BLOCK.sub(fill, text)


def stale_blocks(text: str) -> list[str]:
    """The names of the marked blocks in ``text`` whose content differs from the code's."""
    return [m.group(2) for m in _BLOCK.finditer(text)
            if m.group(2) not in TABLES
            or m.group(0) != f"{m.group(1)}{TABLES[m.group(2)]()}\n{m.group(4)}"]


def _main(argv: list[str]) -> int:
    """``--write [FILES]``: rewrite the blocks of README.md and docs/service.md (or FILES)."""
    write = "--write" in argv
    paths = [pathlib.Path(a) for a in argv if a != "--write"] or [
        pathlib.Path("README.md"), pathlib.Path("docs/service.md")]
    stale = 0
    for path in paths:
        text = path.read_text()
        names = stale_blocks(text)
        if names and write:
            path.write_text(render_blocks(text))
        stale += bool(names)
        print(f"{path}: {'rewrote' if names and write else 'stale' if names else 'current'}"
              + (f" ({', '.join(names)})" if names else ""))
    return 0 if write or not stale else 1


if __name__ == "__main__":
    sys.exit(_main(sys.argv[1:]))
