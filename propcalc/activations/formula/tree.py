"""Expression graphs: interned nodes, and constructors that simplify trivially.

A formula and its derivative are directed acyclic graphs of :class:`Node`. Nodes are
made only through a :class:`Builder`, which interns them (hash-consing): two
structurally equal sub-expressions are one object, so identity is equality and a
derivative that reuses a sub-expression shares it instead of copying it. The size
of a graph is its number of distinct nodes, which grows with the formula, not with
the number of times a sub-expression is used.
"""

from __future__ import annotations

import math
import operator
from collections.abc import Callable
from typing import Any

import numpy as np

__all__ = ["Node", "Builder", "plain_number", "is_number", "fold", "postorder"]


class Node:
    """One node of an expression tree; built only through a :class:`Builder`.

    Nodes are interned per builder, so structurally equal nodes are the same
    object: identity is equality, and a derivative that reuses a sub-expression
    shares it (the compiled closures then compute it once per call).
    """

    __slots__ = ("op", "args", "value", "name", "has_x", "depth")

    def __init__(self, op: str, args: tuple["Node", ...], value: float | None,
                 name: str | None) -> None:
        self.op = op
        self.args = args
        self.value = value
        self.name = name
        self.has_x = op == "x" or any(a.has_x for a in args)
        self.depth = 1 + max((a.depth for a in args), default=0)


def plain_number(n: Node) -> float | None:
    """The value of an unnamed numeric literal (or its negation), else None."""
    if n.op == "num" and n.name is None:
        return n.value
    if n.op == "neg" and n.args[0].op == "num" and n.args[0].name is None:
        return -n.args[0].value  # type: ignore[operator]
    return None


def is_number(n: Node, v: float) -> bool:
    """True if ``n`` is the number ``v`` (named or not)."""
    return n.op == "num" and n.value == v


def fold(fn: Callable[[Any, Any], Any], a: float, b: float) -> float | None:
    """``fn(a, b)`` in double precision, or None when it is not finite."""
    with np.errstate(all="ignore"):
        out = float(fn(np.float64(a), np.float64(b)))
    return out if math.isfinite(out) else None


class Builder:
    """Makes interned nodes; the ``s_*`` constructors simplify trivially."""

    def __init__(self) -> None:
        self._table: dict[tuple[Any, ...], Node] = {}

    def make(self, op: str, args: tuple[Node, ...] = (), value: float | None = None,
             name: str | None = None) -> Node:
        """The interned node (op, args, value, name): made once, then shared."""
        vkey = None if value is None else (value, math.copysign(1.0, value))
        key = (op, vkey, name, tuple(id(a) for a in args))
        node = self._table.get(key)
        if node is None:
            node = Node(op, args, value, name)
            self._table[key] = node
        return node

    def num(self, v: float, name: str | None = None) -> Node:
        """A number (``name`` for the constants pi and e)."""
        return self.make("num", value=float(v), name=name)

    # -- simplifying constructors (used for derivatives) --------------------------------
    def s_neg(self, a: Node) -> Node:
        """-a, simplified (numbers folded, double negation removed)."""
        if a.op == "num" and a.name is None:
            return self.num(-a.value)  # type: ignore[operator]
        if a.op == "neg":
            return a.args[0]
        return self.make("neg", (a,))

    def s_add(self, a: Node, b: Node) -> Node:
        """a + b, simplified (0 dropped, numbers folded, + -b as - b)."""
        if is_number(a, 0.0):
            return b
        if is_number(b, 0.0):
            return a
        pa, pb = plain_number(a), plain_number(b)
        if pa is not None and pb is not None and (f := fold(operator.add, pa, pb)) is not None:
            return self.num(f)
        if b.op == "neg":
            return self.s_sub(a, b.args[0])
        if a.op == "neg":
            return self.s_sub(b, a.args[0])
        return self.make("add", (a, b))

    def s_sub(self, a: Node, b: Node) -> Node:
        """a - b, simplified (0 dropped, a - a = 0, numbers folded)."""
        if is_number(b, 0.0):
            return a
        if is_number(a, 0.0):
            return self.s_neg(b)
        if a is b:
            return self.num(0.0)
        pa, pb = plain_number(a), plain_number(b)
        if pa is not None and pb is not None and (f := fold(operator.sub, pa, pb)) is not None:
            return self.num(f)
        if b.op == "neg":
            return self.s_add(a, b.args[0])
        return self.make("sub", (a, b))

    def s_mul(self, a: Node, b: Node) -> Node:
        """a * b, simplified (0 and +-1 factors, numbers folded, signs pulled out)."""
        if is_number(a, 0.0) or is_number(b, 0.0):
            return self.num(0.0)
        if is_number(a, 1.0):
            return b
        if is_number(b, 1.0):
            return a
        if is_number(a, -1.0):
            return self.s_neg(b)
        if is_number(b, -1.0):
            return self.s_neg(a)
        pa, pb = plain_number(a), plain_number(b)
        if pa is not None and pb is not None and (f := fold(operator.mul, pa, pb)) is not None:
            return self.num(f)
        if a.op == "neg":
            return self.s_neg(self.s_mul(a.args[0], b))
        if b.op == "neg":
            return self.s_neg(self.s_mul(a, b.args[0]))
        return self.make("mul", (a, b))

    def s_div(self, a: Node, b: Node) -> Node:
        """a / b, simplified (0 / b, a / 1, numbers folded, signs pulled out)."""
        if is_number(a, 0.0):
            return self.num(0.0)
        if is_number(b, 1.0):
            return a
        pa, pb = plain_number(a), plain_number(b)
        if pa is not None and pb is not None and pb != 0.0 \
                and (f := fold(operator.truediv, pa, pb)) is not None:
            return self.num(f)
        if a.op == "neg":
            return self.s_neg(self.s_div(a.args[0], b))
        if b.op == "neg":
            return self.s_neg(self.s_div(a, b.args[0]))
        return self.make("div", (a, b))

    def s_pow(self, a: Node, b: Node) -> Node:
        """a ** b, simplified (a**1 = a, a**0 = 1)."""
        if is_number(b, 1.0):
            return a
        if is_number(b, 0.0):
            return self.num(1.0)
        return self.make("pow", (a, b))

    def s_where(self, c: Node, a: Node, b: Node) -> Node:
        """where(c, a, b), simplified (equal branches: a)."""
        if a is b:
            return a
        return self.make("where", (c, a, b))

    def s_call(self, name: str, *args: Node) -> Node:
        """name(args), simplified (log(e) = 1)."""
        if name == "log" and args[0].op == "num" and args[0].name == "e":
            return self.num(1.0)
        return self.make("call", tuple(args), name=name)

    def rebuild(self, n: Node, args: tuple[Node, ...]) -> Node:
        """The node ``n`` with new arguments, through the simplifying constructors."""
        op = n.op
        if op == "neg":
            return self.s_neg(args[0])
        if op in ("add", "sub", "mul", "div", "pow"):
            return getattr(self, f"s_{op}")(*args)
        if op == "where":
            return self.s_where(*args)
        if op == "call":
            return self.s_call(n.name, *args)  # type: ignore[arg-type]
        return self.make(op, args, n.value, n.name)


def postorder(root: Node) -> list[Node]:
    """Unique nodes, children before parents (iterative: no recursion limit)."""
    out: list[Node] = []
    seen: set[int] = set()
    stack: list[tuple[Node, bool]] = [(root, False)]
    while stack:
        node, expanded = stack.pop()
        if expanded:
            out.append(node)
            continue
        if id(node) in seen:
            continue
        seen.add(id(node))
        stack.append((node, True))
        for a in reversed(node.args):
            if id(a) not in seen:
                stack.append((a, False))
    return out
