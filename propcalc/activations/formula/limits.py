"""Limits on typed formulas, the measured size of a formula, and the table of limits.

The HTTP service takes formulas from anyone, so every stage of the build is bounded: the raw
text (characters, bracket nesting), the syntax tree (nodes, depth, constant exponents), the
parameters, the breakpoints, and the derivative (distinct nodes of its graph, characters of its
printed text). :data:`LIMITS` are the limits of the Python API and the CLI,
:data:`SERVICE_LIMITS` those of the HTTP service (shorter texts, fewer parameters: one request
should cost little). :func:`formula_limit_rows` turns either into rows for the documentation,
so the README and ``docs/service.md`` print the numbers the code enforces.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

from ...errors import FormulaError
from ...results import Result

__all__ = ["FormulaLimits", "FormulaSize", "LimitRow", "LIMITS", "SERVICE_LIMITS", "check_derivative",
           "formula_limit_rows"]


@dataclass(frozen=True)
class FormulaLimits(Result):
    """Limits on typed formulas (the HTTP service takes formulas from anyone).

    Attributes
    ----------
    max_length : int
        Characters in the formula text.
    max_nodes : int
        Expression nodes in the syntax tree (numbers, names, operators, calls).
    max_nesting : int
        Depth of nested brackets, checked on the raw text before parsing.
    max_tree_depth : int
        Depth of the syntax tree (operator chains such as ``x + x + ... + x``).
    max_exponent : float
        Bound on ``|p|`` for a constant exponent in ``a**p``; power towers
        ``a**b**c`` are refused outright.
    max_breakpoints : int
        Breakpoints on [-1e4, 1e4].
    max_parameters : int
        Named parameters per formula.
    max_derivative_nodes : int
        Distinct nodes in the graph of the derivative (shared sub-expressions
        count once).
    max_derivative_length : int
        Characters in the printed derivative (in its named form when the
        expanded text would be long; see :mod:`.printer`).
    """

    max_length: int = 500
    max_nodes: int = 200
    max_nesting: int = 30
    max_tree_depth: int = 60
    max_exponent: float = 64.0
    max_breakpoints: int = 64
    max_parameters: int = 32
    max_derivative_nodes: int = 2000
    max_derivative_length: int = 20000

    def check(self, size: FormulaSize) -> None:
        """Raise a FormulaError for the first limit that ``size`` exceeds.

        The build checks each limit where it is met (with the column, when there is
        one); this re-check serves a formula built earlier under other limits.
        """
        if size.length > self.max_length:
            raise FormulaError(f"formula is {size.length} characters long; the limit is "
                               f"{self.max_length}")
        if size.parameters > self.max_parameters:
            raise FormulaError(f"{size.parameters} parameters given; the limit is "
                               f"{self.max_parameters}")
        if size.nesting > self.max_nesting:
            raise FormulaError(f"brackets nest {size.nesting} deep; the limit is "
                               f"{self.max_nesting}")
        if size.nodes > self.max_nodes:
            raise FormulaError(f"formula has {size.nodes} nodes (numbers, names, operators and "
                               f"calls); the limit is {self.max_nodes}")
        if size.tree_depth > self.max_tree_depth:
            raise FormulaError(f"formula nests {size.tree_depth} operations deep; the limit is "
                               f"{self.max_tree_depth}")
        if size.largest_exponent > self.max_exponent:
            raise FormulaError(f"a constant exponent is {size.largest_exponent:g} in size: a "
                               f"constant exponent must satisfy |exponent| <= "
                               f"{self.max_exponent:g}")
        if size.breakpoints > self.max_breakpoints:
            raise FormulaError(f"the formula switches at {size.breakpoints} points on "
                               f"[-1e4, 1e4]; the limit is {self.max_breakpoints}")
        check_derivative(self, size.derivative_nodes, size.derivative_length)


def check_derivative(limits: FormulaLimits, nodes: int, length: int) -> None:
    """Refuse a derivative whose graph or printed text is beyond the limits."""
    if nodes > limits.max_derivative_nodes:
        raise FormulaError(
            f"the derivative has {nodes} distinct sub-expressions; the limit is "
            f"{limits.max_derivative_nodes}: simplify the formula (fewer nested kinked "
            "functions such as abs, max, where)")
    if length > limits.max_derivative_length:
        raise FormulaError(
            f"the derivative is {length} characters long even with its shared parts named; "
            f"the limit is {limits.max_derivative_length}: simplify the formula")


@dataclass(frozen=True)
class FormulaSize(Result):
    """What a built formula measured against the limits (see :class:`FormulaLimits`).

    Attributes
    ----------
    length, parameters, nesting, nodes, tree_depth : int
        Characters, parameters, bracket depth, syntax-tree nodes and depth.
    largest_exponent : float
        Largest ``|p|`` of a constant exponent (0 when there is none).
    breakpoints : int
        Breakpoints found on [-1e4, 1e4].
    value_nodes, derivative_nodes : int
        Distinct nodes in the graphs of the value and of the derivative.
    derivative_length : int
        Characters of the printed derivative.
    """

    length: int
    parameters: int
    nesting: int
    nodes: int
    tree_depth: int
    largest_exponent: float
    breakpoints: int
    value_nodes: int
    derivative_nodes: int
    derivative_length: int


@dataclass(frozen=True)
class LimitRow(Result):
    """One row of the table of formula limits.

    Attributes
    ----------
    name : str
        The field of :class:`FormulaLimits` (``"max_length"``).
    value : float
        The limit (an integer for counts).
    meaning : str
        What is limited, in words.
    """

    name: str
    value: float
    meaning: str


#: what each limit bounds, in the words of the documentation
_MEANINGS = {
    "max_length": "characters in the formula text",
    "max_nodes": "nodes of the syntax tree (numbers, names, operators, calls)",
    "max_nesting": "depth of nested brackets",
    "max_tree_depth": "depth of the syntax tree (operator chains such as x + x + ... + x)",
    "max_exponent": "|p| of a constant exponent in a**p (power towers a**b**c are refused)",
    "max_breakpoints": "points on [-1e4, 1e4] where the formula switches (where, abs, max, min, "
                       "kinked built-ins)",
    "max_parameters": "named parameters",
    "max_derivative_nodes": "distinct sub-expressions of the derivative",
    "max_derivative_length": "characters of the printed derivative (shared parts named)",
}

#: the limits of the Python API and of the CLI
LIMITS = FormulaLimits()
#: the limits of the HTTP service: shorter texts and fewer parameters than the Python API
SERVICE_LIMITS = dataclasses.replace(LIMITS, max_length=200, max_parameters=8)


def formula_limit_rows(limits: FormulaLimits = LIMITS) -> tuple[LimitRow, ...]:
    """The limits as rows (name, value, meaning), in the order of the fields.

    Parameters
    ----------
    limits : FormulaLimits
        :data:`LIMITS` (Python API and CLI) or :data:`SERVICE_LIMITS` (HTTP service).

    Returns
    -------
    tuple of LimitRow

    Examples
    --------
    >>> formula_limit_rows(SERVICE_LIMITS)[0]
    LimitRow(name='max_length', value=200, meaning='characters in the formula text')
    """
    return tuple(LimitRow(f.name, getattr(limits, f.name), _MEANINGS[f.name])
                 for f in dataclasses.fields(limits))
