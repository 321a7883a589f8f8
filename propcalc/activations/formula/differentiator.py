"""Exact symbolic derivatives of expression graphs.

Chain, product, quotient and power rules; ``where``, ``max``, ``min``, ``abs`` and
the kinked built-ins piece by piece; the derivative of each function comes from
its text in :data:`~.vocabulary.DERIVATIVE_TEXT`, read once. The derivative is
built in the same :class:`~.tree.Builder` as the value, memoised per node, so it
shares sub-expressions with the value and with itself.
"""

from __future__ import annotations

import ast
import threading

from .reader import Reader, parse
from .tree import Builder, Node, plain_number, postorder
from .vocabulary import DERIVATIVE_TEXT

__all__ = ["Differentiator"]

_TEMPLATE_AST: dict[str, ast.expr] = {}
_TEMPLATE_LOCK = threading.Lock()


def _template_ast(name: str) -> ast.expr:
    with _TEMPLATE_LOCK:
        tree = _TEMPLATE_AST.get(name)
        if tree is None:
            tree = parse(DERIVATIVE_TEXT[name])
            _TEMPLATE_AST[name] = tree
    return tree


class Differentiator:
    """d/dx of a tree, memoised per node, simplified trivially."""

    def __init__(self, builder: Builder) -> None:
        self.b = builder
        self.memo: dict[int, Node] = {}
        self.templates: dict[str, Node] = {}

    def template(self, name: str, u: Node) -> Node:
        """f'(u) from the derivative text of f, with x replaced by u."""
        t = self.templates.get(name)
        if t is None:
            text = DERIVATIVE_TEXT[name]
            t = Reader(text, {}, self.b).expr(_template_ast(name))
            self.templates[name] = t
        return self.substitute(t, u)

    def substitute(self, t: Node, u: Node) -> Node:
        """The graph ``t`` with the variable x replaced by ``u`` (simplifying as it goes)."""
        memo: dict[int, Node] = {}
        for n in postorder(t):
            if n.op == "x":
                memo[id(n)] = u
            elif not n.args:
                memo[id(n)] = n
            else:
                memo[id(n)] = self.b.rebuild(n, tuple(memo[id(a)] for a in n.args))
        return memo[id(t)]

    def __call__(self, root: Node) -> Node:
        for n in postorder(root):
            if id(n) not in self.memo:
                self.memo[id(n)] = self._d(n)
        return self.memo[id(root)]

    def _d(self, n: Node) -> Node:
        b = self.b
        zero = b.num(0.0)
        if not n.has_x:
            return zero
        op = n.op
        if op == "x":
            return b.num(1.0)
        if op in ("cmp", "and", "or", "not"):
            return zero  # conditions are piecewise constant; where() uses them unchanged
        d = [self.memo.get(id(a), zero) for a in n.args]
        if op == "neg":
            return b.s_neg(d[0])
        if op == "add":
            return b.s_add(d[0], d[1])
        if op == "sub":
            return b.s_sub(d[0], d[1])
        if op == "mul":
            u, v = n.args
            return b.s_add(b.s_mul(d[0], v), b.s_mul(u, d[1]))
        if op == "div":
            u, v = n.args
            if not v.has_x:
                return b.s_div(d[0], v)
            # quotient rule: (u/v)' = u'/v - u v' / v^2
            return b.s_sub(b.s_div(d[0], v), b.s_div(b.s_mul(u, d[1]), b.s_pow(v, b.num(2.0))))
        if op == "pow":
            return self._d_pow(n, d)
        if op == "where":
            return b.s_where(n.args[0], d[1], d[2])
        if op == "call":
            u = n.args
            if n.name == "max":
                return b.s_where(b.make("cmp", (u[0], u[1]), name=">"), d[0], d[1])
            if n.name == "min":
                return b.s_where(b.make("cmp", (u[0], u[1]), name="<"), d[0], d[1])
            outer = self.template(n.name, u[0])  # type: ignore[arg-type]
            if outer.op == "where" and plain_number(outer.args[1]) is not None \
                    and plain_number(outer.args[2]) is not None:
                # piece by piece: where(c, a, b) * u' = where(c, a u', b u')
                return b.s_where(outer.args[0], b.s_mul(outer.args[1], d[0]),
                                 b.s_mul(outer.args[2], d[0]))
            return b.s_mul(outer, d[0])
        raise AssertionError(op)  # pragma: no cover

    def _d_pow(self, n: Node, d: list[Node]) -> Node:
        b = self.b
        u, v = n.args
        du, dv = d
        if not v.has_x:
            # (u^v)' = v u^(v-1) u'
            return b.s_mul(b.s_mul(v, b.s_pow(u, b.s_sub(v, b.num(1.0)))), du)
        log_u = b.s_call("log", u)
        if not u.has_x:
            # (c^v)' = c^v log(c) v'
            return b.s_mul(b.s_mul(n, log_u), dv)
        # (u^v)' = u^v (v' log(u) + v u' / u)
        return b.s_mul(n, b.s_add(b.s_mul(dv, log_u), b.s_div(b.s_mul(v, du), u)))


