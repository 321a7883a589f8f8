"""Numerical probes of a compiled formula: report trouble, do not hide it.

Value and derivative are probed on a grid out to ``|x| = 1e4`` (what the Gaussian
integrals reach); a non-finite value is a :class:`~propcalc.errors.FormulaError`
that says where, which sub-expression failed, and names the stable built-in when
the formula spells out an unstable form of one (``log(1 + exp(x))`` for
``softplus(x)``...). Poles between grid points are found by :mod:`.poles`.
"""

from __future__ import annotations

import math
import sys

import numpy as np

from ...errors import FormulaError
from .compiler import NodeFn, vectorise
from .printer import precedence, short_text
from .tree import Node, is_number, postorder
from .vocabulary import REACH

__all__ = ["probe", "check_constants", "unstable_patterns"]

Array = np.ndarray


def unstable_patterns(root: Node) -> list[str]:
    """Hints for sub-trees that spell out an unstable form of a stable built-in."""
    hints: list[str] = []

    def call(n: Node, name: str) -> bool:
        return n.op == "call" and n.name == name

    def one_plus(n: Node) -> Node | None:
        """The t in 1 + t or t + 1, else None."""
        if n.op == "add":
            a, c = n.args
            if is_number(a, 1.0):
                return c
            if is_number(c, 1.0):
                return a
        return None

    def t(n: Node) -> str:
        return short_text(n, 200)

    def minus(u: Node) -> str:
        """Text of -u."""
        if u.op == "neg":
            return t(u.args[0])
        return f"-{t(u)}" if precedence(u) >= 8 else f"-({t(u)})"

    for n in postorder(root):
        if call(n, "log") and (u := one_plus(n.args[0])) is not None and call(u, "exp"):
            hints.append(f"softplus({t(u.args[0])}) instead of {t(n)}")
        elif call(n, "log1p") and call(n.args[0], "exp"):
            hints.append(f"softplus({t(n.args[0].args[0])}) instead of {t(n)}")
        elif call(n, "log") and call(n.args[0], "exp"):
            hints.append(f"{t(n.args[0].args[0])} instead of {t(n)}")
        elif call(n, "log") and call(n.args[0], "sigmoid"):
            hints.append(f"-softplus({minus(n.args[0].args[0])}) instead of {t(n)}")
        elif call(n, "log") and call(n.args[0], "cosh"):
            u_text = t(n.args[0].args[0])
            hints.append(f"abs({u_text}) + softplus(-2 * abs({u_text})) - log(2) instead of "
                         f"{t(n)}")
        elif n.op == "div" and (u := one_plus(n.args[1])) is not None and call(u, "exp"):
            arg = u.args[0]
            inner = minus(arg)
            scale = "" if is_number(n.args[0], 1.0) else f"{t(n.args[0])} * "
            if call(n.args[0], "exp") and n.args[0].args[0] is arg:
                hints.append(f"sigmoid({t(arg)}) instead of {t(n)}")
            else:
                hints.append(f"{scale}sigmoid({inner}) instead of {t(n)}")
        elif n.op == "div" and n.args[0].op == "sub" and n.args[1].op == "add" \
                and all(call(k, "exp") for k in (*n.args[0].args, *n.args[1].args)):
            hints.append(f"tanh({t(n.args[0].args[0].args[0])}) instead of {t(n)}")
    return hints


def _culprit(root: Node, fns: dict[int, NodeFn], x0: float) -> tuple[Node, list[float]]:
    """The innermost sub-expression that is not finite at x0 (following the taken branches)."""
    xa = np.array([x0])

    def val(n: Node) -> float:
        with np.errstate(all="ignore"):
            return float(np.asarray(fns[id(n)](xa, {}), dtype=float).reshape(-1)[0])

    node = root
    while True:
        if node.op == "where":
            with np.errstate(all="ignore"):
                taken = bool(np.asarray(fns[id(node.args[0])](xa, {})).reshape(-1)[0])
            kids = [node.args[1] if taken else node.args[2]]
        elif node.op in ("cmp", "and", "or", "not"):
            kids = []
        else:
            kids = list(node.args)
        bad = [k for k in kids if not math.isfinite(val(k))]
        if not bad:
            return node, [val(k) for k in node.args if node.op not in ("where",)]
        node = bad[0]


def _describe(node: Node, arg_vals: list[float], value: float) -> str:
    text = short_text(node)
    name = node.name if node.op == "call" else None
    a0 = arg_vals[0] if arg_vals else math.nan
    if name in ("log", "sqrt") and a0 < 0:
        return f"{text} takes the {name} of a negative number ({a0:.6g})"
    if name == "log1p" and a0 < -1:
        return f"{text} takes log1p of {a0:.6g} < -1"
    if name in ("log", "log1p") and (a0 == 0 or a0 == -1):
        return f"{text} is -inf (the log of 0)"
    if name in ("exp", "expm1", "cosh", "sinh"):
        return f"{text} overflows (its argument is {a0:.6g}; exp overflows above 709.78)"
    if node.op == "div" and len(arg_vals) == 2 and arg_vals[1] == 0:
        return f"{text} divides by zero"
    if node.op == "pow" and len(arg_vals) == 2:
        base, ex = arg_vals
        if base < 0 and not float(ex).is_integer():
            return f"{text} raises a negative number ({base:.6g}) to a fractional power"
        if base == 0 and ex < 0:
            return f"{text} raises 0 to a negative power"
        return f"{text} overflows ({base:.6g}**{ex:.6g})"
    if len(arg_vals) == 2 and all(math.isfinite(v) for v in arg_vals):
        return f"{text} overflows ({value:g})"
    return f"{text} = {value:g}"


def probe(root: Node, fns: dict[int, NodeFn], x: Array, what: str, value_root: Node) -> None:
    """Refuse ``root`` if it is not finite at some point of ``x``, naming the place.

    Parameters
    ----------
    root : Node
        The graph probed (the value or the derivative).
    fns : dict
        Its compiled closures (:func:`~.compiler.compile_nodes`).
    x : ndarray
        The points.
    what : str
        ``"value"`` or ``"derivative"``, for the message.
    value_root : Node
        The value of the formula (its unstable spellings are named in the message).

    Raises
    ------
    FormulaError
        At the point nearest 0 where ``root`` is not finite, naming the innermost
        sub-expression that fails there and, if the formula spells out an unstable
        form of a built-in, the stable one.
    """
    fn = vectorise(fns[id(root)])
    vals = fn(x)
    bad = ~np.isfinite(vals)
    if not np.any(bad):
        return
    xb = x[bad]
    x0 = float(xb[np.argmin(np.abs(xb))])
    node, args = _culprit(root, fns, x0)
    with np.errstate(all="ignore"):
        v = float(np.asarray(fns[id(node)](np.array([x0]), {}), dtype=float).reshape(-1)[0])
    detail = _describe(node, args, v)
    hints = unstable_patterns(value_root)
    msg = (f"the {what} is not finite at x = {x0:.6g}: {detail}; the Gaussian integrals reach "
           f"|x| up to {REACH:g}, so the formula must be finite there")
    if hints:
        msg += "; write " + "; write ".join(dict.fromkeys(hints))
    raise FormulaError(msg)


def check_constants(root: Node, fns: dict[int, NodeFn]) -> None:
    """Refuse a constant sub-expression that underflows to 0 or to a subnormal number.

    ``1e-200 * 1e-200 * x`` would otherwise be read as ``0 * x`` without a word (the
    literal ``1e-400`` is refused by the reader for the same reason). Constants that
    overflow are reported by :func:`probe`, with the place.
    """
    tiny = sys.float_info.min
    for n in postorder(root):
        if n.has_x or n.op not in ("mul", "div", "pow", "call"):
            continue
        with np.errstate(all="ignore"):
            args = [float(np.asarray(fns[id(a)](None, {}))) for a in n.args]
            value = float(np.asarray(fns[id(n)](None, {})))
        if not all(math.isfinite(a) and a != 0.0 for a in args) or not math.isfinite(value):
            continue
        if abs(value) < tiny and (n.op != "pow" or args[1] > 0 or abs(args[0]) > 1):
            raise FormulaError(
                f"the constant {short_text(n)} underflows to {value!r} in double precision "
                f"(the smallest normal double is {tiny!r}): write 0 if you mean 0, or rescale")
