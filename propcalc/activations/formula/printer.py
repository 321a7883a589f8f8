"""Printing expression graphs as text in the formula syntax itself.

The text is what users see as ``Activation.formula`` and ``derivative_formula``:
operators with the fewest brackets that keep the meaning, numbers in their
shortest round-trip form, named constants and parameters by name.

A graph shares sub-expressions, but its text spells each use out again; for
derivatives of nested kinked functions (``abs(abs(...(x)))``: the derivative of
``abs(u)`` is ``where(u < 0, -u', u')``) the spelled-out text doubles with each
level while the graph grows by a few nodes. So the printer writes the expanded
text only while it stays short (at most :data:`EXPANDED_SHORT` characters, or at
most :data:`EXPANDED_MAX` and no more than twice the named form); beyond that it
names every shared sub-expression once and refers to it by name::

    where(t2 < 0, -t3, t3) with t1 = abs(x); t2 = abs(t1); t3 = where(t1 < 0, -d1, d1); ...

so the printed length grows with the number of nodes, never exponentially.
Messages use :func:`short_text`, which elides deep sub-expressions as ``...``.
"""

from __future__ import annotations

import math
import re
from collections.abc import Collection

from .tree import Node, postorder

__all__ = ["to_text", "short_text", "precedence", "EXPANDED_SHORT", "EXPANDED_MAX"]

#: texts up to this long are always printed expanded ...
EXPANDED_SHORT = 300
#: ... and up to this long when the named form would not be less than half as long
EXPANDED_MAX = 2000
#: shared sub-expressions whose text is at most this long are spelled out at each use
_INLINE_MAX = 12

_PREC = {"or": 1, "and": 2, "not": 3, "cmp": 4, "add": 5, "sub": 5, "mul": 6, "div": 6,
         "neg": 7, "pow": 8}
_SYMBOL = {"add": "+", "sub": "-", "mul": "*", "div": "/"}
_ATOM = 9


class _TooLong(Exception):
    """The expanded text passed its budget."""


def precedence(n: Node) -> int:
    """Binding strength of the text of ``n`` (higher binds tighter; 9 for atoms and calls)."""
    if n.op == "num" and n.name is None and math.copysign(1.0, n.value) < 0:  # type: ignore[arg-type]
        return 7
    return _PREC.get(n.op, _ATOM)


def _format_number(v: float) -> str:
    if v.is_integer() and abs(v) < 1e16:
        return str(int(v)) if v != 0 or math.copysign(1.0, v) > 0 else "-0"
    return repr(v)


def _expanded(root: Node, budget: int | None) -> str:
    """The spelled-out text; raises _TooLong as soon as a sub-text passes ``budget``."""
    memo: dict[int, str] = {}
    atoms: set[int] = set()
    for n in postorder(root):
        text = _node_text(n, memo, atoms)
        if budget is not None and len(text) > budget:
            raise _TooLong
        memo[id(n)] = text
    return memo[id(root)]


def to_text(root: Node, taken: Collection[str] = ()) -> str:
    """The text of the graph under ``root``: expanded when short, else with named parts.

    Parameters
    ----------
    root : Node
        The expression.
    taken : collection of str
        Names already in use (the formula's parameters): the names given to shared
        sub-expressions avoid them.

    Returns
    -------
    str
        The expanded text if it is short (see the module docstring); otherwise
        ``"<expression> with t1 = ...; t2 = ..."``, each shared sub-expression named
        once, children before parents.
    """
    try:
        text = _expanded(root, EXPANDED_MAX)
    except _TooLong:
        return _named(root, taken)
    if len(text) <= EXPANDED_SHORT:
        return text
    named = _named(root, taken)
    return text if len(text) <= 2 * len(named) else named


def short_text(root: Node, limit: int = 120) -> str:
    """The text of ``root`` for a message: sub-expressions longer than ``limit`` become ``...``."""
    memo: dict[int, str] = {}
    atoms: set[int] = set()
    for n in postorder(root):
        text = _node_text(n, memo, atoms)
        if len(text) > limit:
            text = "..."
            atoms.add(id(n))
        memo[id(n)] = text
    return memo[id(root)]


def _prefix(taken: Collection[str]) -> str:
    """A name prefix p such that no taken name has the form p<digits>."""
    for p in ("t", "s", "u", "tt", "ss", "uu"):
        if not any(re.fullmatch(p + r"\d+", name) for name in taken):
            return p
    k = 0
    while any(re.fullmatch(f"t{k}_" + r"\d+", name) for name in taken):
        k += 1
    return f"t{k}_"


def _named(root: Node, taken: Collection[str]) -> str:
    order = postorder(root)
    uses: dict[int, int] = {}
    for n in order:
        for a in n.args:
            uses[id(a)] = uses.get(id(a), 0) + 1
    prefix = _prefix(taken)
    memo: dict[int, str] = {}
    atoms: set[int] = set()
    definitions: list[str] = []
    for n in order:
        text = _node_text(n, memo, atoms)
        if n is not root and uses.get(id(n), 0) > 1 and len(text) > _INLINE_MAX:
            name = f"{prefix}{len(definitions) + 1}"
            definitions.append(f"{name} = {text}")
            text = name
            atoms.add(id(n))
        memo[id(n)] = text
    if not definitions:
        return memo[id(root)]
    return f"{memo[id(root)]} with {'; '.join(definitions)}"


def _node_text(n: Node, memo: dict[int, str], atoms: set[int]) -> str:
    op = n.op
    if op == "x":
        return "x"
    if op == "param":
        return n.name  # type: ignore[return-value]
    if op == "num":
        return n.name if n.name is not None else _format_number(n.value)  # type: ignore[arg-type]

    def prec(a: Node) -> int:
        return _ATOM if id(a) in atoms else precedence(a)

    def wrap(a: Node, paren: bool) -> str:
        return f"({memo[id(a)]})" if paren else memo[id(a)]

    if op == "neg":
        return "-" + wrap(n.args[0], prec(n.args[0]) <= 7)
    if op in _SYMBOL:
        a, b = n.args
        p = _PREC[op]
        return f"{wrap(a, prec(a) < p)} {_SYMBOL[op]} {wrap(b, prec(b) <= p or prec(b) == 7)}"
    if op == "pow":
        a, b = n.args
        return f"{wrap(a, prec(a) <= 8)}**{wrap(b, prec(b) < 7)}"
    if op == "call":
        return f"{n.name}({', '.join(memo[id(a)] for a in n.args)})"
    if op == "where":
        return f"where({', '.join(memo[id(a)] for a in n.args)})"
    if op == "cmp":
        a, b = n.args
        return f"{wrap(a, prec(a) <= 4)} {n.name} {wrap(b, prec(b) <= 4)}"
    if op in ("and", "or"):
        p = _PREC[op]
        return f" {op} ".join(wrap(a, prec(a) <= p) for a in n.args)
    if op == "not":
        return "not " + wrap(n.args[0], prec(n.args[0]) < 3)
    raise AssertionError(op)  # pragma: no cover
