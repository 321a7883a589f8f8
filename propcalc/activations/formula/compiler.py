"""Compiling expression graphs into vectorised numpy functions.

Each node becomes a small closure calling one numpy ufunc on its children's
results; user text is never passed to ``eval``, ``exec`` or ``compile``. A node
used by several parents is computed once per call and handed to each of them
(then freed), so an evaluation costs one ufunc call per distinct node: linear in
the size of the graph.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from ..builtins import builtin_activation
from .tree import Node, postorder
from .vocabulary import CMP_FUNCS, FUNCTIONS_1, FUNCTIONS_2

__all__ = ["NodeFn", "compile_nodes", "compile_node", "vectorise", "constant_value",
           "evaluate_many"]

Array = np.ndarray

NodeFn = Callable[[Any, dict], Any]


def _builtin_value_fn(name: str) -> Callable[[Any], Any]:
    fn = builtin_activation(name).value_fn

    def value(v: Any) -> Any:
        return fn(np.asarray(v, dtype=float))

    return value


def _make_closure(n: Node, kids: list[NodeFn]) -> NodeFn:
    op = n.op
    if op == "x":
        return lambda x, m: x
    if op in ("num", "param"):
        c = np.float64(n.value)
        return lambda x, m: c
    if op == "neg":
        (a,) = kids
        return lambda x, m: -a(x, m)
    if op in ("add", "sub", "mul", "div", "pow"):
        a, b = kids
        if op == "add":
            return lambda x, m: a(x, m) + b(x, m)
        if op == "sub":
            return lambda x, m: a(x, m) - b(x, m)
        if op == "mul":
            return lambda x, m: a(x, m) * b(x, m)
        if op == "div":
            return lambda x, m: a(x, m) / b(x, m)
        expo = n.args[1]
        if expo.op == "num" and float(expo.value).is_integer() and 1 <= abs(expo.value) <= 8:
            return _integer_power(a, int(expo.value))
        return lambda x, m: a(x, m) ** b(x, m)
    if op == "call":
        if n.name in FUNCTIONS_2:
            f2 = FUNCTIONS_2[n.name]  # type: ignore[index]
            a, b = kids
            return lambda x, m: f2(a(x, m), b(x, m))
        f1 = FUNCTIONS_1.get(n.name) or _builtin_value_fn(n.name)  # type: ignore[arg-type]
        (a,) = kids
        return lambda x, m: f1(a(x, m))
    if op == "where":
        c, a, b = kids
        return lambda x, m: np.where(c(x, m), a(x, m), b(x, m))
    if op == "cmp":
        fc = CMP_FUNCS[n.name]  # type: ignore[index]
        a, b = kids
        return lambda x, m: fc(a(x, m), b(x, m))
    if op == "and":
        def both(x: Any, m: dict) -> Any:
            out = kids[0](x, m)
            for k in kids[1:]:
                out = np.logical_and(out, k(x, m))
            return out
        return both
    if op == "or":
        def either(x: Any, m: dict) -> Any:
            out = kids[0](x, m)
            for k in kids[1:]:
                out = np.logical_or(out, k(x, m))
            return out
        return either
    if op == "not":
        (a,) = kids
        return lambda x, m: np.logical_not(a(x, m))
    raise AssertionError(op)  # pragma: no cover


def _integer_power(a: NodeFn, k: int) -> NodeFn:
    """a**k for a small integer k by repeated multiplication (numpy's pow is ~100x slower).

    Binary powering: at most 6 multiplications for |k| <= 8; negative k divides 1 by
    the result. Overflow gives inf exactly as pow does.
    """
    n = abs(k)

    def power(x: Any, m: dict) -> Any:
        base = a(x, m)
        result = None
        e = n
        while e:
            if e & 1:
                result = base if result is None else result * base
            e >>= 1
            if e:
                base = base * base
        return 1.0 / result if k < 0 else result

    return power


def _shared(fn: NodeFn, key: int, uses: int) -> NodeFn:
    """Compute ``fn`` once per call and hand the result to each of its ``uses`` parents."""

    def cached(x: Any, m: dict) -> Any:
        entry = m.get(key)
        if entry is None:
            value = fn(x, m)
            m[key] = [value, uses - 1]
            return value
        entry[1] -= 1
        if entry[1] == 0:
            del m[key]  # last consumer: free the array
        return entry[0]

    return cached


def compile_nodes(root: Node) -> dict[int, NodeFn]:
    """Closures for every node of the tree under ``root`` (keyed by node id)."""
    order = postorder(root)
    uses: dict[int, int] = {}
    for n in order:
        for a in n.args:
            uses[id(a)] = uses.get(id(a), 0) + 1
    fns: dict[int, NodeFn] = {}
    for n in order:
        fn = _make_closure(n, [fns[id(a)] for a in n.args])
        if not n.has_x and n.op not in ("num", "param"):
            with np.errstate(all="ignore"):
                c = fn(None, {})
            fn = (lambda v: (lambda x, m: v))(c)
        elif n.has_x and n.op != "x" and uses.get(id(n), 0) > 1:
            fn = _shared(fn, id(n), uses[id(n)])
        fns[id(n)] = fn
    return fns


def vectorise(fn: NodeFn) -> Callable[[Array], Array]:
    """A float function of an array from a node closure (warnings silenced, shape of x kept)."""
    def evaluate(x: Array) -> Array:
        x = np.asarray(x, dtype=float)
        with np.errstate(all="ignore"):
            out = np.asarray(fn(x, {}), dtype=float)
        if out.shape != x.shape:
            out = np.array(np.broadcast_to(out, x.shape), dtype=float)
        return out

    return evaluate


def compile_node(root: Node) -> Callable[[Array], Array]:
    """A vectorised float function for the tree (warnings silenced, shape of x kept)."""
    return vectorise(compile_nodes(root)[id(root)])


def constant_value(n: Node) -> float:
    """The value of a node that does not depend on x."""
    with np.errstate(all="ignore"):
        return float(compile_nodes(n)[id(n)](None, {}))


def _postorder_all(roots: list[Node]) -> list[Node]:
    seen: set[int] = set()
    out: list[Node] = []
    for r in roots:
        for n in postorder(r):
            if id(n) not in seen:
                seen.add(id(n))
                out.append(n)
    return out


def evaluate_many(nodes: list[Node], x: Array, chunk: int = 1 << 15) -> list[Array]:
    """The values of several nodes of one graph at the points ``x``, in one pass.

    Every distinct node under ``nodes`` is computed once per chunk of ``chunk`` points
    (children before parents, each array freed after its last parent has used it), so
    the cost is that of one evaluation of the union of their graphs, however many
    outputs are asked for and however much they share. Warnings are silenced; the
    outputs are float arrays shaped like ``x``.
    """
    x = np.asarray(x, dtype=float)
    order = _postorder_all(nodes)
    wanted = {id(n) for n in nodes}
    uses: dict[int, int] = {}
    for n in order:
        for a in n.args:
            uses[id(a)] = uses.get(id(a), 0) + 1
    outputs: list[list[Array]] = [[] for _ in nodes]
    for start in range(0, max(x.size, 1), chunk):
        xs = x.reshape(-1)[start:start + chunk]
        vals: dict[int, Any] = {}
        left = dict(uses)
        with np.errstate(all="ignore"):
            for n in order:
                kids = [(lambda v: (lambda x_, m: v))(vals[id(a)]) for a in n.args]
                vals[id(n)] = _make_closure(n, kids)(xs, {})
                for a in n.args:
                    left[id(a)] -= 1
                    if left[id(a)] == 0 and id(a) not in wanted:
                        del vals[id(a)]
        for k, n in enumerate(nodes):
            out = np.asarray(vals[id(n)], dtype=float)
            outputs[k].append(np.broadcast_to(out, xs.shape) if out.shape != xs.shape else out)
    return [np.concatenate(parts).reshape(x.shape) if parts else np.zeros(x.shape)
            for parts in outputs]


