"""Printing expression graphs as text in the formula syntax itself.

The text is what users see as ``Activation.formula`` and ``derivative_formula``:
operators with the fewest brackets that keep the meaning, numbers in their
shortest round-trip form, named constants and parameters by name.
"""

from __future__ import annotations

import math

from .tree import Node, postorder

__all__ = ["to_text", "precedence"]

_PREC = {"or": 1, "and": 2, "not": 3, "cmp": 4, "add": 5, "sub": 5, "mul": 6, "div": 6,
         "neg": 7, "pow": 8}
_SYMBOL = {"add": "+", "sub": "-", "mul": "*", "div": "/"}


def precedence(n: Node) -> int:
    if n.op == "num" and n.name is None and math.copysign(1.0, n.value) < 0:  # type: ignore[arg-type]
        return 7
    return _PREC.get(n.op, 9)


def _format_number(v: float) -> str:
    if v.is_integer() and abs(v) < 1e16:
        return str(int(v)) if v != 0 or math.copysign(1.0, v) > 0 else "-0"
    return repr(v)


def to_text(root: Node) -> str:
    memo: dict[int, str] = {}
    for n in postorder(root):
        memo[id(n)] = _node_text(n, memo)
    return memo[id(root)]


def _node_text(n: Node, memo: dict[int, str]) -> str:
    op = n.op
    if op == "x":
        return "x"
    if op == "param":
        return n.name  # type: ignore[return-value]
    if op == "num":
        return n.name if n.name is not None else _format_number(n.value)  # type: ignore[arg-type]

    def wrap(a: Node, paren: bool) -> str:
        return f"({memo[id(a)]})" if paren else memo[id(a)]

    if op == "neg":
        return "-" + wrap(n.args[0], precedence(n.args[0]) <= 7)
    if op in _SYMBOL:
        a, b = n.args
        p = _PREC[op]
        return f"{wrap(a, precedence(a) < p)} {_SYMBOL[op]} {wrap(b, precedence(b) <= p or precedence(b) == 7)}"
    if op == "pow":
        a, b = n.args
        return f"{wrap(a, precedence(a) <= 8)}**{wrap(b, precedence(b) < 7)}"
    if op == "call":
        return f"{n.name}({', '.join(memo[id(a)] for a in n.args)})"
    if op == "where":
        return f"where({', '.join(memo[id(a)] for a in n.args)})"
    if op == "cmp":
        a, b = n.args
        return f"{wrap(a, precedence(a) <= 4)} {n.name} {wrap(b, precedence(b) <= 4)}"
    if op in ("and", "or"):
        p = _PREC[op]
        return f" {op} ".join(wrap(a, precedence(a) <= p) for a in n.args)
    if op == "not":
        return "not " + wrap(n.args[0], precedence(n.args[0]) < 3)
    raise AssertionError(op)  # pragma: no cover


