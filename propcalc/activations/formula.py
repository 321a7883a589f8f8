"""Activations from typed formulas, and the ``activation()`` entry point.

A formula is a small expression in the variable ``x``, for example
``"x * tanh(softplus(x))"`` or ``"x * sigmoid(beta * x)"`` with
``beta=1.5``. The text is read with :func:`ast.parse` (which only builds a
syntax tree: no code object is made and nothing is run), every node is
checked against a whitelist, and the tree is turned into our own expression
tree. From there:

* the derivative is the exact symbolic derivative of that tree (chain,
  product, quotient and power rules; ``where``, ``max``, ``min``, ``abs`` and
  the kinked built-ins piece by piece), simplified trivially (``0 *``,
  ``1 *``, ``+ 0``) and shown as text in the same syntax;
* value and derivative are compiled into trees of numpy closures (shared
  sub-expressions are computed once per call); user text is never passed to
  ``eval``, ``exec`` or ``compile``;
* breakpoints (points where a ``where`` condition, or the argument of
  ``abs``/``max``/``min`` or of a kinked built-in, changes sign) are found by
  bracketing on a fine grid over [-50, 50] and a coarse grid out to 1e4, and
  refined with :func:`scipy.optimize.brentq`;
* value and derivative are probed on a grid out to ``|x| = 1e4`` (what the
  Gaussian integrals reach); a non-finite value is a :class:`FormulaError`
  that says where, which sub-expression failed, and names the stable
  built-in when the formula spells out an unstable form of one
  (``log(1 + exp(x))`` for ``softplus(x)``...).

The syntax and the limits are documented in the README (section "Typing your own activation").
"""

from __future__ import annotations

import ast
import difflib
import keyword
import math
import operator
import threading
import unicodedata
from collections import OrderedDict
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import optimize, special

from .base import (
    SELU_ALPHA,
    SELU_SCALE,
    Activation,
    builtin_activation,
    builtin_names,
)
from ..errors import FormulaError, UnknownActivationError, check_finite
from ..numerics.smoothing import Piece, Smoothing, Term, piecewise_smoothing

__all__ = [
    "activation",
    "formula_activation",
    "FormulaLimits",
    "LIMITS",
    "FUNCTIONS",
    "CONSTANTS",
    "clear_formula_cache",
]

Array = np.ndarray


# ---------------------------------------------------------------------------------------
# limits and vocabulary
# ---------------------------------------------------------------------------------------
@dataclass(frozen=True)
class FormulaLimits:
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
    """

    max_length: int = 500
    max_nodes: int = 200
    max_nesting: int = 30
    max_tree_depth: int = 60
    max_exponent: float = 64.0
    max_breakpoints: int = 64
    max_parameters: int = 32

    def to_dict(self) -> dict[str, Any]:
        return {
            "max_length": self.max_length,
            "max_nodes": self.max_nodes,
            "max_nesting": self.max_nesting,
            "max_tree_depth": self.max_tree_depth,
            "max_exponent": self.max_exponent,
            "max_breakpoints": self.max_breakpoints,
            "max_parameters": self.max_parameters,
        }


LIMITS = FormulaLimits()

#: reach of the probes: the quadrature nodes of the maps go out to about this |x|
_REACH = 1e4


def _softplus(x: Any) -> Any:
    return np.logaddexp(0.0, x)


# name -> numpy function of one argument
_FUNCTIONS_1: dict[str, Callable[[Any], Any]] = {
    "exp": np.exp,
    "log": np.log,
    "log1p": np.log1p,
    "expm1": np.expm1,
    "sqrt": np.sqrt,
    "abs": np.abs,
    "sin": np.sin,
    "cos": np.cos,
    "tanh": np.tanh,
    "sinh": np.sinh,
    "cosh": np.cosh,
    "arctan": np.arctan,
    "erf": special.erf,
    "erfc": special.erfc,
    "sigmoid": special.expit,
    "softplus": _softplus,
}
_FUNCTIONS_2 = {"max": np.maximum, "min": np.minimum}

# exact derivatives f'(x) of the functions above, in the formula syntax itself
_DERIVATIVE_TEXT: dict[str, str] = {
    "exp": "exp(x)",
    "log": "1 / x",
    "log1p": "1 / (1 + x)",
    "expm1": "exp(x)",
    "sqrt": "1 / (2 * sqrt(x))",
    "abs": "where(x < 0, -1, 1)",
    "sin": "cos(x)",
    "cos": "-sin(x)",
    "tanh": "1 - tanh(x)**2",
    "sinh": "cosh(x)",
    "cosh": "sinh(x)",
    "arctan": "1 / (1 + x**2)",
    # DLMF 7.10.1: d erf(x)/dx = 2 / sqrt(pi) exp(-x^2)
    "erf": "2 / sqrt(pi) * exp(-x**2)",
    "erfc": "-2 / sqrt(pi) * exp(-x**2)",
    # sigma'(x) = sigma(x) (1 - sigma(x)) = sigma(x) sigma(-x), the form that keeps precision
    "sigmoid": "sigmoid(x) * sigmoid(-x)",
    "softplus": "sigmoid(x)",
    # built-in activations used as functions (parametrised ones at their default parameters)
    "linear": "1",
    "step": "0",
    "relu": "where(x > 0, 1, 0)",
    "leaky_relu": "where(x > 0, 1, 0.01)",
    # Clevert et al. 2016, eq. (16): elu'(x) = 1 for x > 0, alpha exp(x) otherwise (alpha = 1)
    "elu": "where(x > 0, 1, exp(x))",
    # Klambauer et al. 2017, eq. (2), differentiated
    "selu": f"where(x > 0, {SELU_SCALE!r}, {SELU_SCALE!r} * {SELU_ALPHA!r} * exp(x))",
    # Hendrycks & Gimpel 2016: gelu(x) = x Phi(x), Phi(x) = erfc(-x / sqrt(2)) / 2
    "gelu": "erfc(-x / sqrt(2)) / 2 + x * exp(-x**2 / 2) / sqrt(2 * pi)",
    # Hendrycks & Gimpel 2016, tanh form x sigmoid(2 u), u = sqrt(2/pi) (x + 0.044715 x^3)
    "gelu_tanh": ("sigmoid(2 * sqrt(2 / pi) * (x + 0.044715 * x**3)) + x * 2 * sqrt(2 / pi)"
                  " * (1 + 3 * 0.044715 * x**2) * sigmoid(2 * sqrt(2 / pi) * (x + 0.044715 * x**3))"
                  " * sigmoid(-(2 * sqrt(2 / pi) * (x + 0.044715 * x**3)))"),
    # Ramachandran et al. 2017 (swish, beta = 1) = silu
    "silu": "sigmoid(x) + x * (sigmoid(x) * sigmoid(-x))",
    "swish": "sigmoid(x) + x * (sigmoid(x) * sigmoid(-x))",
    # Misra 2019: mish(x) = x tanh(softplus(x))
    "mish": "tanh(softplus(x)) + x * (1 - tanh(softplus(x))**2) * sigmoid(x)",
    "hard_tanh": "where(abs(x) < 1, 1, 0)",
}

_BUILTIN_FUNCTIONS = tuple(n for n in builtin_names() if n not in _FUNCTIONS_1)

# parametrised built-ins called inside a formula use their default parameters
_DEFAULTED: dict[str, tuple[str, float, str]] = {
    "leaky_relu": ("slope", 0.01, "where(x > 0, x, slope * x)"),
    "elu": ("alpha", 1.0, "where(x > 0, x, alpha * expm1(x))"),
    "swish": ("beta", 1.0, "x * sigmoid(beta * x)"),
}

#: every function name a formula may call
FUNCTIONS: tuple[str, ...] = tuple(sorted([*_FUNCTIONS_1, *_FUNCTIONS_2, "where",
                                           *_BUILTIN_FUNCTIONS]))
#: named constants
CONSTANTS: dict[str, float] = {"pi": math.pi, "e": math.e}

_ARITY = {**{n: 1 for n in _FUNCTIONS_1}, **{n: 1 for n in _BUILTIN_FUNCTIONS},
          "max": 2, "min": 2, "where": 3}

_BINOPS: dict[type, str] = {ast.Add: "add", ast.Sub: "sub", ast.Mult: "mul", ast.Div: "div",
                            ast.Pow: "pow"}
_BAD_BINOPS: dict[type, tuple[str, str]] = {
    ast.BitXor: ("^", "'^' is not a power here: write x**2 for a power"),
    ast.Mod: ("%", "the remainder operator '%' is not allowed"),
    ast.FloorDiv: ("//", "floor division '//' is not allowed; use '/'"),
    ast.MatMult: ("@", "the matrix product '@' is not allowed"),
    ast.LShift: ("<<", "the shift operator '<<' is not allowed"),
    ast.RShift: (">>", "the shift operator '>>' is not allowed"),
    ast.BitOr: ("|", "'|' is not allowed; inside a where condition write 'or'"),
    ast.BitAnd: ("&", "'&' is not allowed; inside a where condition write 'and'"),
}
_CMPOPS: dict[type, str] = {ast.Lt: "<", ast.LtE: "<=", ast.Gt: ">", ast.GtE: ">=", ast.Eq: "==",
                            ast.NotEq: "!="}
_CMP_FUNCS: dict[str, Callable[[Any, Any], Any]] = {
    "<": operator.lt, "<=": operator.le, ">": operator.gt, ">=": operator.ge,
    "==": operator.eq, "!=": operator.ne}

# syntax the whitelist refuses, with the words used in the message
_REFUSED_NODES: dict[type, str] = {
    ast.Attribute: "attribute access is not allowed",
    ast.Subscript: "subscripts (indexing with [...]) are not allowed",
    ast.Slice: "slices are not allowed",
    ast.Lambda: "lambda functions are not allowed",
    ast.ListComp: "comprehensions are not allowed",
    ast.SetComp: "comprehensions are not allowed",
    ast.DictComp: "comprehensions are not allowed",
    ast.GeneratorExp: "generator expressions are not allowed",
    ast.List: "lists are not allowed",
    ast.Tuple: "tuples (values separated by commas) are not allowed",
    ast.Set: "sets are not allowed",
    ast.Dict: "dicts are not allowed",
    ast.JoinedStr: "f-strings are not allowed",
    ast.FormattedValue: "f-strings are not allowed",
    ast.NamedExpr: "assignment expressions (:=) are not allowed",
    ast.Starred: "starred arguments (*) are not allowed",
    ast.IfExp: "conditional expressions (a if c else b) are not allowed; write where(c, a, b)",
    ast.Await: "await is not allowed",
    ast.Yield: "yield is not allowed",
    ast.YieldFrom: "yield is not allowed",
}

# the only syntax a formula is made of (operators are checked where they are read)
_ALLOWED_NODES = (ast.BinOp, ast.UnaryOp, ast.Call, ast.Name, ast.Constant, ast.Compare,
                  ast.BoolOp, ast.keyword, ast.expr_context, ast.operator, ast.unaryop, ast.cmpop,
                  ast.boolop)

_STATEMENTS: dict[type, str] = {
    ast.Import: "import statements are not allowed",
    ast.ImportFrom: "import statements are not allowed",
    ast.Assign: "assignments are not allowed",
    ast.AugAssign: "assignments are not allowed",
    ast.AnnAssign: "assignments are not allowed",
    ast.FunctionDef: "function definitions are not allowed",
    ast.AsyncFunctionDef: "function definitions are not allowed",
    ast.ClassDef: "class definitions are not allowed",
    ast.Delete: "del statements are not allowed",
}

# characters that are look-alikes of ASCII ones, for the "did you mean" hint
_LOOKALIKES = {
    "\u0445": "x", "\u0425": "X", "\u0430": "a", "\u0435": "e", "\u043e": "o", "\u0440": "p",
    "\u0441": "c", "\u0443": "y", "\u0456": "i", "\u0455": "s", "\u03bf": "o", "\u03b1": "a",
    "\u03c7": "x", "\u2212": "-", "\u2013": "-", "\u2014": "-", "\u00d7": "*", "\u00b7": "*",
    "\u22c5": "*", "\u00f7": "/", "\u00b2": "**2", "\u00b3": "**3", "\u03c0": "pi",
    "\u00a0": " (a plain space)", "\u200b": "nothing (a zero-width space)",
    "\u2018": "no quotes", "\u2019": "no quotes", "\u201c": "no quotes", "\u201d": "no quotes",
}


# ---------------------------------------------------------------------------------------
# the expression tree
# ---------------------------------------------------------------------------------------
class _Node:
    """One node of an expression tree; built only through a :class:`_Builder`.

    Nodes are interned per builder, so structurally equal nodes are the same
    object: identity is equality, and a derivative that reuses a sub-expression
    shares it (the compiled closures then compute it once per call).
    """

    __slots__ = ("op", "args", "value", "name", "has_x", "depth")

    def __init__(self, op: str, args: tuple["_Node", ...], value: float | None,
                 name: str | None) -> None:
        self.op = op
        self.args = args
        self.value = value
        self.name = name
        self.has_x = op == "x" or any(a.has_x for a in args)
        self.depth = 1 + max((a.depth for a in args), default=0)


def _plain(n: _Node) -> float | None:
    """The value of an unnamed numeric literal (or its negation), else None."""
    if n.op == "num" and n.name is None:
        return n.value
    if n.op == "neg" and n.args[0].op == "num" and n.args[0].name is None:
        return -n.args[0].value  # type: ignore[operator]
    return None


def _is(n: _Node, v: float) -> bool:
    return n.op == "num" and n.value == v


def _fold(fn: Callable[[Any, Any], Any], a: float, b: float) -> float | None:
    with np.errstate(all="ignore"):
        out = float(fn(np.float64(a), np.float64(b)))
    return out if math.isfinite(out) else None


class _Builder:
    """Makes interned nodes; the ``s_*`` constructors simplify trivially."""

    def __init__(self) -> None:
        self._table: dict[tuple[Any, ...], _Node] = {}

    def make(self, op: str, args: tuple[_Node, ...] = (), value: float | None = None,
             name: str | None = None) -> _Node:
        vkey = None if value is None else (value, math.copysign(1.0, value))
        key = (op, vkey, name, tuple(id(a) for a in args))
        node = self._table.get(key)
        if node is None:
            node = _Node(op, args, value, name)
            self._table[key] = node
        return node

    def num(self, v: float, name: str | None = None) -> _Node:
        return self.make("num", value=float(v), name=name)

    # -- simplifying constructors (used for derivatives) --------------------------------
    def s_neg(self, a: _Node) -> _Node:
        if a.op == "num" and a.name is None:
            return self.num(-a.value)  # type: ignore[operator]
        if a.op == "neg":
            return a.args[0]
        return self.make("neg", (a,))

    def s_add(self, a: _Node, b: _Node) -> _Node:
        if _is(a, 0.0):
            return b
        if _is(b, 0.0):
            return a
        pa, pb = _plain(a), _plain(b)
        if pa is not None and pb is not None and (f := _fold(operator.add, pa, pb)) is not None:
            return self.num(f)
        if b.op == "neg":
            return self.s_sub(a, b.args[0])
        if a.op == "neg":
            return self.s_sub(b, a.args[0])
        return self.make("add", (a, b))

    def s_sub(self, a: _Node, b: _Node) -> _Node:
        if _is(b, 0.0):
            return a
        if _is(a, 0.0):
            return self.s_neg(b)
        if a is b:
            return self.num(0.0)
        pa, pb = _plain(a), _plain(b)
        if pa is not None and pb is not None and (f := _fold(operator.sub, pa, pb)) is not None:
            return self.num(f)
        if b.op == "neg":
            return self.s_add(a, b.args[0])
        return self.make("sub", (a, b))

    def s_mul(self, a: _Node, b: _Node) -> _Node:
        if _is(a, 0.0) or _is(b, 0.0):
            return self.num(0.0)
        if _is(a, 1.0):
            return b
        if _is(b, 1.0):
            return a
        if _is(a, -1.0):
            return self.s_neg(b)
        if _is(b, -1.0):
            return self.s_neg(a)
        pa, pb = _plain(a), _plain(b)
        if pa is not None and pb is not None and (f := _fold(operator.mul, pa, pb)) is not None:
            return self.num(f)
        if a.op == "neg":
            return self.s_neg(self.s_mul(a.args[0], b))
        if b.op == "neg":
            return self.s_neg(self.s_mul(a, b.args[0]))
        return self.make("mul", (a, b))

    def s_div(self, a: _Node, b: _Node) -> _Node:
        if _is(a, 0.0):
            return self.num(0.0)
        if _is(b, 1.0):
            return a
        pa, pb = _plain(a), _plain(b)
        if pa is not None and pb is not None and pb != 0.0 \
                and (f := _fold(operator.truediv, pa, pb)) is not None:
            return self.num(f)
        if a.op == "neg":
            return self.s_neg(self.s_div(a.args[0], b))
        if b.op == "neg":
            return self.s_neg(self.s_div(a, b.args[0]))
        return self.make("div", (a, b))

    def s_pow(self, a: _Node, b: _Node) -> _Node:
        if _is(b, 1.0):
            return a
        if _is(b, 0.0):
            return self.num(1.0)
        return self.make("pow", (a, b))

    def s_where(self, c: _Node, a: _Node, b: _Node) -> _Node:
        if a is b:
            return a
        return self.make("where", (c, a, b))

    def s_call(self, name: str, *args: _Node) -> _Node:
        if name == "log" and args[0].op == "num" and args[0].name == "e":
            return self.num(1.0)
        return self.make("call", tuple(args), name=name)

    def rebuild(self, n: _Node, args: tuple[_Node, ...]) -> _Node:
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


def _postorder(root: _Node) -> list[_Node]:
    """Unique nodes, children before parents (iterative: no recursion limit)."""
    out: list[_Node] = []
    seen: set[int] = set()
    stack: list[tuple[_Node, bool]] = [(root, False)]
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


# ---------------------------------------------------------------------------------------
# printing (the normalised text of a tree, in the formula syntax)
# ---------------------------------------------------------------------------------------
_PREC = {"or": 1, "and": 2, "not": 3, "cmp": 4, "add": 5, "sub": 5, "mul": 6, "div": 6,
         "neg": 7, "pow": 8}
_SYMBOL = {"add": "+", "sub": "-", "mul": "*", "div": "/"}


def _prec(n: _Node) -> int:
    if n.op == "num" and n.name is None and math.copysign(1.0, n.value) < 0:  # type: ignore[arg-type]
        return 7
    return _PREC.get(n.op, 9)


def _format_number(v: float) -> str:
    if v.is_integer() and abs(v) < 1e16:
        return str(int(v)) if v != 0 or math.copysign(1.0, v) > 0 else "-0"
    return repr(v)


def _to_text(root: _Node) -> str:
    memo: dict[int, str] = {}
    for n in _postorder(root):
        memo[id(n)] = _node_text(n, memo)
    return memo[id(root)]


def _node_text(n: _Node, memo: dict[int, str]) -> str:
    op = n.op
    if op == "x":
        return "x"
    if op == "param":
        return n.name  # type: ignore[return-value]
    if op == "num":
        return n.name if n.name is not None else _format_number(n.value)  # type: ignore[arg-type]

    def wrap(a: _Node, paren: bool) -> str:
        return f"({memo[id(a)]})" if paren else memo[id(a)]

    if op == "neg":
        return "-" + wrap(n.args[0], _prec(n.args[0]) <= 7)
    if op in _SYMBOL:
        a, b = n.args
        p = _PREC[op]
        return f"{wrap(a, _prec(a) < p)} {_SYMBOL[op]} {wrap(b, _prec(b) <= p or _prec(b) == 7)}"
    if op == "pow":
        a, b = n.args
        return f"{wrap(a, _prec(a) <= 8)}**{wrap(b, _prec(b) < 7)}"
    if op == "call":
        return f"{n.name}({', '.join(memo[id(a)] for a in n.args)})"
    if op == "where":
        return f"where({', '.join(memo[id(a)] for a in n.args)})"
    if op == "cmp":
        a, b = n.args
        return f"{wrap(a, _prec(a) <= 4)} {n.name} {wrap(b, _prec(b) <= 4)}"
    if op in ("and", "or"):
        p = _PREC[op]
        return f" {op} ".join(wrap(a, _prec(a) <= p) for a in n.args)
    if op == "not":
        return "not " + wrap(n.args[0], _prec(n.args[0]) < 3)
    raise AssertionError(op)  # pragma: no cover


# ---------------------------------------------------------------------------------------
# reading the text: raw-text checks, then the AST whitelist
# ---------------------------------------------------------------------------------------
def _check_text(text: str) -> None:
    """Checks on the raw characters, before anything parses them."""
    if len(text) > LIMITS.max_length:
        raise FormulaError(f"formula is {len(text)} characters long; the limit is "
                           f"{LIMITS.max_length}")
    if not text:
        raise FormulaError("formula is empty; write an expression in x such as 'x * sigmoid(x)'")
    if not text.strip():
        raise FormulaError("formula is only whitespace; write an expression in x such as "
                           "'x * sigmoid(x)'")
    for i, ch in enumerate(text):
        col = i + 1
        code = ord(ch)
        if ch in "\n\r":
            raise FormulaError(f"newline at column {col}: a formula is one line", col)
        if code > 126:
            hint = _LOOKALIKES.get(ch)
            if hint is None:
                norm = unicodedata.normalize("NFKC", ch)
                hint = norm if norm.isascii() and norm.isprintable() and norm else None
            name = unicodedata.name(ch, "unnamed character")
            msg = (f"character {ch!r} (U+{code:04X} {name}) at column {col} is not allowed: "
                   "formulas are plain ASCII")
            if hint:
                msg += f"; did you mean {hint!r}?" if len(hint) <= 3 else f"; did you mean {hint}?"
            raise FormulaError(msg, col)
        if code < 32 and ch != "\t" or code == 127:
            raise FormulaError(f"control character U+{code:04X} at column {col} is not allowed",
                               col)
        if ch in "'\"":
            prefix = text[:i].rstrip()[-1:].lower() if text[:i][-1:].isalpha() else ""
            kind = {"f": "f-strings", "b": "bytes literals"}.get(prefix, "strings")
            raise FormulaError(f"{kind} are not allowed (quote at column {col})", col)
        if ch == "\\":
            raise FormulaError(f"backslash at column {col} is not allowed", col)
        if ch == "#":
            raise FormulaError(f"comments ('#' at column {col}) are not allowed", col)
        if ch == ";":
            raise FormulaError(f"';' at column {col}: a formula is a single expression, "
                               "not statements", col)
    _check_nesting(text)


def _check_nesting(text: str) -> None:
    """Bracket depth and balance on the raw text (before ast.parse sees it)."""
    pairs = {")": "(", "]": "[", "}": "{"}
    stack: list[tuple[str, int]] = []
    for i, ch in enumerate(text):
        if ch in "([{":
            stack.append((ch, i + 1))
            if len(stack) > LIMITS.max_nesting:
                raise FormulaError(
                    f"brackets nest more than {LIMITS.max_nesting} deep (column {i + 1}); "
                    f"the limit is {LIMITS.max_nesting}", i + 1)
        elif ch in pairs:
            if not stack:
                raise FormulaError(f"unmatched {ch!r} at column {i + 1}", i + 1)
            opener, at = stack.pop()
            if opener != pairs[ch]:
                raise FormulaError(f"{ch!r} at column {i + 1} does not match {opener!r} at "
                                   f"column {at}", i + 1)
    if stack:
        opener, at = stack[-1]
        raise FormulaError(f"{opener!r} at column {at} is never closed", at)


def _parse(text: str) -> ast.expr:
    """ast.parse on checked text (it builds a syntax tree only; nothing runs)."""
    offset = len(text) - len(text.lstrip())
    body = text.strip()
    try:
        tree = ast.parse(body, mode="eval")
    except SyntaxError as exc:
        raise _syntax_error(body, exc, offset) from None
    if offset:
        for node in ast.walk(tree):
            if hasattr(node, "col_offset"):
                node.col_offset += offset  # type: ignore[attr-defined]
                if getattr(node, "end_col_offset", None) is not None:
                    node.end_col_offset += offset  # type: ignore[attr-defined]
    return tree.body


def _syntax_error(body: str, exc: SyntaxError, offset: int) -> FormulaError:
    try:
        module = ast.parse(body, mode="exec")
    except SyntaxError:
        module = None
    if module is not None:
        for stmt in module.body:
            if not isinstance(stmt, ast.Expr):
                what = _STATEMENTS.get(type(stmt), "statements are not allowed")
                col = stmt.col_offset + 1 + offset
                return FormulaError(f"{what} (column {col}); a formula is a single expression "
                                    "in x", col)
    col = (exc.offset or 1) + offset
    msg = (exc.msg or "invalid syntax").rstrip(".")
    return FormulaError(f"could not read the formula at column {col}: {msg}", col)


def _check_size(root: ast.expr) -> None:
    count = 0
    depth_max = 0
    stack: list[tuple[ast.AST, int]] = [(root, 1)]
    while stack:
        node, depth = stack.pop()
        if isinstance(node, ast.expr):
            count += 1
            depth_max = max(depth_max, depth)
            depth += 1
        for child in ast.iter_child_nodes(node):
            stack.append((child, depth))
    if count > LIMITS.max_nodes:
        raise FormulaError(f"formula has {count} nodes (numbers, names, operators and calls); "
                           f"the limit is {LIMITS.max_nodes}")
    if depth_max > LIMITS.max_tree_depth:
        raise FormulaError(f"formula nests {depth_max} operations deep; the limit is "
                           f"{LIMITS.max_tree_depth}")


def _col(node: ast.AST) -> int:
    return int(getattr(node, "col_offset", 0)) + 1


class _Reader:
    """Turns a whitelisted AST into interned nodes (no simplification)."""

    def __init__(self, text: str, params: Mapping[str, float], builder: _Builder) -> None:
        self.text = text
        self.params = params
        self.b = builder
        self.used: set[str] = set()

    # -- helpers ----------------------------------------------------------------------
    def _segment(self, node: ast.AST) -> str:
        seg = ast.get_source_segment(self.text, node)
        return seg if seg is not None else "?"

    def _find(self, symbol: str, start: int) -> int:
        i = self.text.find(symbol, start)
        return i + 1 if i >= 0 else start + 1

    def _refuse(self, node: ast.AST) -> FormulaError:
        col = _col(node)
        if isinstance(node, ast.Attribute):
            col = self._find(".", node.value.end_col_offset or 0)
        what = _REFUSED_NODES.get(type(node), f"{type(node).__name__} expressions are not allowed")
        return FormulaError(f"{what} at column {col}", col)

    def whitelist(self, root: ast.expr) -> None:
        """Refuse any node type outside the whitelist, before reading anything.

        Attribute access is reported first (the classic escape route), then
        the leftmost other offence.
        """
        offences: list[tuple[int, int, ast.AST]] = []
        for node in ast.walk(root):
            if isinstance(node, _ALLOWED_NODES):
                continue
            if not isinstance(node, ast.expr):
                # arguments, comprehension clauses...: always inside a refused expression,
                # which is the one to name; anything else is refused without detail
                offences.append((2, _col(node), node))
                continue
            col = _col(node)
            if isinstance(node, ast.Attribute):
                col = self._find(".", node.value.end_col_offset or 0)
            offences.append((0 if isinstance(node, ast.Attribute) else 1, col, node))
        if offences:
            raise self._refuse(min(offences, key=lambda t: (t[0], t[1]))[2])

    # -- arithmetic expressions -------------------------------------------------------
    def expr(self, node: ast.expr) -> _Node:
        b = self.b
        if isinstance(node, ast.Constant):
            return self.constant(node)
        if isinstance(node, ast.Name):
            return self.name(node)
        if isinstance(node, ast.BinOp):
            return self.binop(node)
        if isinstance(node, ast.UnaryOp):
            if isinstance(node.op, ast.USub):
                return b.make("neg", (self.expr(node.operand),))
            if isinstance(node.op, ast.UAdd):
                return self.expr(node.operand)
            if isinstance(node.op, ast.Not):
                raise FormulaError(f"'not' at column {_col(node)} is only allowed inside the "
                                   "condition of where(condition, a, b)", _col(node))
            raise FormulaError(f"the operator '~' at column {_col(node)} is not allowed",
                               _col(node))
        if isinstance(node, ast.Call):
            return self.call(node)
        if isinstance(node, ast.Compare):
            sym = self._cmp_symbol(node.ops[0], node)
            col = self._find(sym, node.left.end_col_offset or 0)
            raise FormulaError(f"comparison '{sym}' at column {col} is only allowed as the "
                               "condition of where(condition, a, b)", col)
        if isinstance(node, ast.BoolOp):
            word = "and" if isinstance(node.op, ast.And) else "or"
            col = self._find(word, node.values[0].end_col_offset or 0)
            raise FormulaError(f"'{word}' at column {col} is only allowed inside the condition "
                               "of where(condition, a, b), between comparisons", col)
        raise self._refuse(node)

    def constant(self, node: ast.Constant) -> _Node:
        v = node.value
        col = _col(node)
        if isinstance(v, bool) or v is None:
            raise FormulaError(f"{v!r} at column {col} is not a number", col)
        if isinstance(v, complex):
            raise FormulaError(f"complex numbers are not allowed ({self._segment(node)!r} at "
                               f"column {col})", col)
        if isinstance(v, (str, bytes)):
            kind = "strings" if isinstance(v, str) else "bytes literals"
            raise FormulaError(f"{kind} are not allowed (column {col})", col)
        if v is Ellipsis:
            raise FormulaError(f"'...' at column {col} is not allowed", col)
        if not isinstance(v, (int, float)):
            raise FormulaError(f"{type(v).__name__} literals are not allowed (column {col})", col)
        try:
            f = float(v)
        except OverflowError:
            f = math.inf
        if not math.isfinite(f):
            raise FormulaError(f"the number at column {col} is too large (it is not a finite "
                               "double-precision number)", col)
        return self.b.num(f)

    def name(self, node: ast.Name) -> _Node:
        ident = node.id
        col = _col(node)
        if ident == "x":
            return self.b.make("x")
        if ident in CONSTANTS:
            return self.b.num(CONSTANTS[ident], name=ident)
        if ident.startswith("_"):
            raise FormulaError(f"names starting with '_' are not allowed ({ident!r} at column "
                               f"{col})", col)
        if ident in self.params:
            self.used.add(ident)
            return self.b.make("param", value=float(self.params[ident]), name=ident)
        if ident in _ARITY:
            raise FormulaError(f"{ident!r} at column {col} is a function: call it, as in "
                               f"{ident}(x)", col)
        given = ", ".join(sorted(self.params)) or "none"
        known = ["x", *CONSTANTS, *self.params]
        close = [ident.lower()] if ident.lower() in known else \
            difflib.get_close_matches(ident, known, n=1)
        hint = f" (did you mean {close[0]}?)" if close else ""
        raise FormulaError(f"unknown name {ident!r} at column {col}{hint}; the variable is x, "
                           f"parameters given: {given}", col)

    def binop(self, node: ast.BinOp) -> _Node:
        op = _BINOPS.get(type(node.op))
        if op is None:
            sym, what = _BAD_BINOPS.get(type(node.op), ("?", "this operator is not allowed"))
            col = self._find(sym, node.left.end_col_offset or 0)
            raise FormulaError(f"{what} (column {col})", col)
        if op == "pow":
            return self.power(node)
        return self.b.make(op, (self.expr(node.left), self.expr(node.right)))

    def power(self, node: ast.BinOp) -> _Node:
        col = self._find("**", node.left.end_col_offset or 0)
        inner = node.right
        while isinstance(inner, ast.UnaryOp):
            inner = inner.operand
        if isinstance(inner, ast.BinOp) and isinstance(inner.op, ast.Pow) and not any(
                isinstance(n, ast.Name) and n.id == "x" for n in ast.walk(inner)):
            # a constant exponent that is itself a power: 9**9**9**9, x**2**3
            raise FormulaError(
                f"power towers like a**b**c are not allowed (column {col}); write the "
                "exponent as a number", col)
        base = self.expr(node.left)
        expo = self.expr(node.right)
        if not expo.has_x:
            value = _constant_value(expo)
            limit = LIMITS.max_exponent
            if not math.isfinite(value) or abs(value) > limit:
                shown = self._segment(node.right)
                if expo.op == "param":
                    shown = f"{expo.name} = {value:g}"
                raise FormulaError(
                    f"the exponent {shown} at column {col} is too large: a constant exponent "
                    f"must satisfy |exponent| <= {limit:g}", col)
        return self.b.make("pow", (base, expo))

    def call(self, node: ast.Call) -> _Node:
        func = node.func
        col = _col(node)
        if not isinstance(func, ast.Name):
            if isinstance(func, ast.Call):
                c = self._find("(", func.end_col_offset or 0)
                raise FormulaError(f"calling the result of a call is not allowed (column {c})", c)
            if isinstance(func, (ast.Attribute, ast.Lambda, ast.Subscript)):
                raise self._refuse(func)
            raise FormulaError(f"only named functions can be called (column {col})", col)
        fname = func.id
        if fname.startswith("_"):
            raise FormulaError(f"names starting with '_' are not allowed ({fname!r} at column "
                               f"{col})", col)
        if fname == "x":
            raise FormulaError(f"x is the variable, not a function (column {col}); write "
                               "x * (...) for a product", col)
        if fname in CONSTANTS:
            raise FormulaError(f"{fname} is a constant, not a function (column {col}); write "
                               f"{fname} * (...) for a product", col)
        if fname in self.params:
            raise FormulaError(f"{fname!r} is a parameter, not a function (column {col})", col)
        if fname not in _ARITY:
            close = difflib.get_close_matches(fname, FUNCTIONS, n=1)
            hint = f" (did you mean {close[0]}?)" if close else ""
            raise FormulaError(f"unknown function {fname!r} at column {col}{hint}; known: "
                               f"{', '.join(FUNCTIONS)}", col)
        for kw in node.keywords:
            kcol = _col(kw) if hasattr(kw, "col_offset") else col
            if kw.arg is None:
                raise FormulaError(f"'**' unpacking is not allowed in calls (column {kcol})", kcol)
            raise FormulaError(f"keyword arguments are not allowed in calls ({kw.arg}= at column "
                               f"{kcol}); {fname} takes its arguments by position", kcol)
        for arg in node.args:
            if isinstance(arg, ast.Starred):
                raise self._refuse(arg)
        want, got = _ARITY[fname], len(node.args)
        if got != want:
            plural = "argument" if want == 1 else "arguments"
            raise FormulaError(f"{fname} takes {want} {plural}, got {got} (column {col})", col)
        if fname == "where":
            cond = self.condition(node.args[0])
            return self.b.make("where", (cond, self.expr(node.args[1]), self.expr(node.args[2])))
        args = tuple(self.expr(a) for a in node.args)
        return self.b.make("call", args, name=fname)

    # -- conditions (inside where only) ---------------------------------------------------
    def _cmp_symbol(self, op: ast.cmpop, node: ast.Compare) -> str:
        sym = _CMPOPS.get(type(op))
        if sym is None:
            word = {ast.Is: "is", ast.IsNot: "is not", ast.In: "in", ast.NotIn: "not in"}.get(
                type(op), "?")
            col = self._find(word.split()[0], node.left.end_col_offset or 0)
            raise FormulaError(f"the operator '{word}' at column {col} is not allowed; "
                               "comparisons are <, <=, >, >=, ==, !=", col)
        return sym

    def condition(self, node: ast.expr) -> _Node:
        b = self.b
        if isinstance(node, ast.Compare):
            syms = [self._cmp_symbol(op, node) for op in node.ops]
            if len(syms) > 1:
                col = _col(node)
                raise FormulaError(
                    f"chained comparisons are not allowed ({self._segment(node)!r} at column "
                    f"{col}); write (a < x) and (x < b)", col)
            return b.make("cmp", (self.expr(node.left), self.expr(node.comparators[0])),
                          name=syms[0])
        if isinstance(node, ast.BoolOp):
            op = "and" if isinstance(node.op, ast.And) else "or"
            return b.make(op, tuple(self.condition(v) for v in node.values))
        if isinstance(node, ast.UnaryOp) and isinstance(node.op, ast.Not):
            return b.make("not", (self.condition(node.operand),))
        col = _col(node)
        raise FormulaError(
            f"the condition of where must be a comparison such as x > 0, or comparisons joined "
            f"by and, or, not; got {self._segment(node)!r} at column {col}", col)


# ---------------------------------------------------------------------------------------
# compiling a tree into numpy closures
# ---------------------------------------------------------------------------------------
_Fn = Callable[[Any, dict], Any]


def _builtin_value_fn(name: str) -> Callable[[Any], Any]:
    fn = builtin_activation(name).value_fn

    def value(v: Any) -> Any:
        return fn(np.asarray(v, dtype=float))

    return value


def _make_closure(n: _Node, kids: list[_Fn]) -> _Fn:
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
        if n.name in _FUNCTIONS_2:
            f2 = _FUNCTIONS_2[n.name]  # type: ignore[index]
            a, b = kids
            return lambda x, m: f2(a(x, m), b(x, m))
        f1 = _FUNCTIONS_1.get(n.name) or _builtin_value_fn(n.name)  # type: ignore[arg-type]
        (a,) = kids
        return lambda x, m: f1(a(x, m))
    if op == "where":
        c, a, b = kids
        return lambda x, m: np.where(c(x, m), a(x, m), b(x, m))
    if op == "cmp":
        fc = _CMP_FUNCS[n.name]  # type: ignore[index]
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


def _integer_power(a: _Fn, k: int) -> _Fn:
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


def _shared(fn: _Fn, key: int, uses: int) -> _Fn:
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


def _compile_nodes(root: _Node) -> dict[int, _Fn]:
    """Closures for every node of the tree under ``root`` (keyed by node id)."""
    order = _postorder(root)
    uses: dict[int, int] = {}
    for n in order:
        for a in n.args:
            uses[id(a)] = uses.get(id(a), 0) + 1
    fns: dict[int, _Fn] = {}
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


def _vectorise(fn: _Fn) -> Callable[[Array], Array]:
    def evaluate(x: Array) -> Array:
        x = np.asarray(x, dtype=float)
        with np.errstate(all="ignore"):
            out = np.asarray(fn(x, {}), dtype=float)
        if out.shape != x.shape:
            out = np.array(np.broadcast_to(out, x.shape), dtype=float)
        return out

    return evaluate


def _compile(root: _Node) -> Callable[[Array], Array]:
    """A vectorised float function for the tree (warnings silenced, shape of x kept)."""
    return _vectorise(_compile_nodes(root)[id(root)])


def _constant_value(n: _Node) -> float:
    with np.errstate(all="ignore"):
        return float(_compile_nodes(n)[id(n)](None, {}))


# ---------------------------------------------------------------------------------------
# differentiation
# ---------------------------------------------------------------------------------------
_TEMPLATE_AST: dict[str, ast.expr] = {}
_TEMPLATE_LOCK = threading.Lock()


def _template_ast(name: str) -> ast.expr:
    with _TEMPLATE_LOCK:
        tree = _TEMPLATE_AST.get(name)
        if tree is None:
            tree = _parse(_DERIVATIVE_TEXT[name])
            _TEMPLATE_AST[name] = tree
    return tree


class _Differentiator:
    """d/dx of a tree, memoised per node, simplified trivially."""

    def __init__(self, builder: _Builder) -> None:
        self.b = builder
        self.memo: dict[int, _Node] = {}
        self.templates: dict[str, _Node] = {}

    def template(self, name: str, u: _Node) -> _Node:
        """f'(u) from the derivative text of f, with x replaced by u."""
        t = self.templates.get(name)
        if t is None:
            text = _DERIVATIVE_TEXT[name]
            t = _Reader(text, {}, self.b).expr(_template_ast(name))
            self.templates[name] = t
        return self.substitute(t, u)

    def substitute(self, t: _Node, u: _Node) -> _Node:
        memo: dict[int, _Node] = {}
        for n in _postorder(t):
            if n.op == "x":
                memo[id(n)] = u
            elif not n.args:
                memo[id(n)] = n
            else:
                memo[id(n)] = self.b.rebuild(n, tuple(memo[id(a)] for a in n.args))
        return memo[id(t)]

    def __call__(self, root: _Node) -> _Node:
        for n in _postorder(root):
            if id(n) not in self.memo:
                self.memo[id(n)] = self._d(n)
        return self.memo[id(root)]

    def _d(self, n: _Node) -> _Node:
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
            if outer.op == "where" and _plain(outer.args[1]) is not None \
                    and _plain(outer.args[2]) is not None:
                # piece by piece: where(c, a, b) * u' = where(c, a u', b u')
                return b.s_where(outer.args[0], b.s_mul(outer.args[1], d[0]),
                                 b.s_mul(outer.args[2], d[0]))
            return b.s_mul(outer, d[0])
        raise AssertionError(op)  # pragma: no cover

    def _d_pow(self, n: _Node, d: list[_Node]) -> _Node:
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


# ---------------------------------------------------------------------------------------
# breakpoints
# ---------------------------------------------------------------------------------------
def _core_grid() -> Array:
    # k / 1000 exactly rounded: 0 and the integers are on the grid
    return np.arange(-50000, 50001) / 1000.0


def _search_grid() -> Array:
    core = _core_grid()
    tail = np.geomspace(50.0, _REACH, 801)[1:]
    return np.concatenate([-tail[::-1], core, tail])


def _probe_grid() -> Array:
    core = _core_grid()
    mid = np.geomspace(50.0, 1e3, 4001)[1:]
    tail = np.geomspace(1e3, _REACH, 1001)[1:]
    return np.concatenate([-tail[::-1], -mid[::-1], core, mid, tail])


_GRIDS: dict[str, Array] = {}


def _grid(kind: str) -> Array:
    g = _GRIDS.get(kind)
    if g is None:
        g = _search_grid() if kind == "search" else _probe_grid()
        g.setflags(write=False)
        _GRIDS[kind] = g
    return g


def _switch_functions(root: _Node, b: _Builder) -> list[_Node]:
    """Sub-expressions whose sign changes are the breakpoints of the formula.

    ``a - b`` for each comparison of a where condition and for max(a, b) and
    min(a, b); the argument of abs; ``u - p`` for each breakpoint p of a
    built-in called on u (so f(g(x)) breaks where g(x) hits f's breakpoints).
    """
    out: list[_Node] = []
    for n in _postorder(root):
        if n.op == "cmp" and (n.args[0].has_x or n.args[1].has_x):
            out.append(b.make("sub", n.args))
        elif n.op == "call" and any(a.has_x for a in n.args):
            if n.name == "abs":
                out.append(n.args[0])
            elif n.name in ("max", "min"):
                out.append(b.make("sub", n.args))
            elif n.name in _BUILTIN_FUNCTIONS:
                for bp in builtin_activation(n.name).breakpoints:  # type: ignore[arg-type]
                    out.append(n.args[0] if bp == 0.0 else b.make("sub", (n.args[0], b.num(bp))))
    return out


def _roots_of(fn: Callable[[Array], Array], grid: Array) -> list[float]:
    """Points where ``fn`` changes sign, or starts or stops being exactly 0, on the grid.

    Sign changes are refined with Brent's method; the ends of runs of exact
    zeros (``relu(x - a)`` is 0 on a whole half-line) by bisection on the
    sign down to one ulp. An isolated zero counts only if the sign flips
    across it (a tangency such as ``x**2`` at 0 is no breakpoint).
    """
    vals = fn(grid)
    code = np.where(np.isfinite(vals), np.sign(vals), 2.0)
    ends = np.flatnonzero(code[1:] != code[:-1])
    if ends.size == 0:
        return []
    flips = int(np.count_nonzero(np.abs(code[ends] - code[ends + 1]) == 2.0))
    if flips > LIMITS.max_breakpoints:
        _too_many_breakpoints(flips)
    starts = np.concatenate([[0], ends + 1])
    stops = np.concatenate([ends, [grid.size - 1]])
    runs = [(float(code[a]), int(a), int(z)) for a, z in zip(starts, stops)]

    def scalar(t: float) -> float:
        return float(fn(np.array([t]))[0])

    def sign_at(t: float) -> float:
        v = scalar(t)
        return 2.0 if not math.isfinite(v) else float(np.sign(v))

    def bisect(lo: float, hi: float) -> tuple[float, float]:
        left = sign_at(lo)
        for _ in range(200):
            mid = 0.5 * (lo + hi)
            if mid <= lo or mid >= hi:
                break
            if sign_at(mid) == left:
                lo = mid
            else:
                hi = mid
        return lo, hi

    roots: list[float] = []
    for k in range(len(runs) - 1):
        c1, _, e1 = runs[k]
        c2, s2, e2 = runs[k + 1]
        a, b = float(grid[e1]), float(grid[s2])
        if c1 == 2.0 or c2 == 2.0:
            continue
        if c1 != 0.0 and c2 != 0.0:
            fa, fb = scalar(a), scalar(b)
            if fa * fb < 0:
                roots.append(float(optimize.brentq(scalar, a, b, xtol=1e-300,
                                                   rtol=4 * np.finfo(float).eps, maxiter=200)))
            else:
                roots.append(a if abs(fa) <= abs(fb) else b)
        elif c2 == 0.0:
            after = runs[k + 2][0] if k + 2 < len(runs) else 2.0
            if s2 == e2 and after not in (0.0, 2.0):
                if after != c1:
                    roots.append(float(grid[s2]))  # the sign flips through an exact zero
                continue  # (else a tangency)
            roots.append(bisect(a, b)[1])  # first zero of the run
        else:
            before = runs[k - 1][0] if k > 0 else 2.0
            if runs[k][1] == e1 and before not in (0.0, 2.0):
                continue  # an isolated zero, handled on the way in
            roots.append(bisect(a, b)[0])  # last zero of the run
    return roots


def _breakpoints(root: _Node, b: _Builder) -> tuple[float, ...]:
    grid = _grid("search")
    found: list[float] = []
    for node in _switch_functions(root, b):
        found += _roots_of(_compile(node), grid)
    found.sort()
    merged: list[float] = []
    for r in found:
        if merged and abs(r - merged[-1]) <= 1e-13 * max(1.0, abs(r)):
            continue
        merged.append(0.0 if r == 0 else r)
    if len(merged) > LIMITS.max_breakpoints:
        _too_many_breakpoints(len(merged))
    return tuple(merged)


def _too_many_breakpoints(count: int) -> None:
    raise FormulaError(
        f"the formula switches at {count} or more points on [-1e4, 1e4] (where conditions, "
        f"abs, max, min, kinked built-ins); the limit is {LIMITS.max_breakpoints}: "
        "a periodic condition such as where(sin(x) > 0, ...) is not supported")


# ---------------------------------------------------------------------------------------
# numerical probes: report trouble, do not hide it
# ---------------------------------------------------------------------------------------
def _unstable_patterns(root: _Node) -> list[str]:
    """Hints for sub-trees that spell out an unstable form of a stable built-in."""
    hints: list[str] = []

    def call(n: _Node, name: str) -> bool:
        return n.op == "call" and n.name == name

    def one_plus(n: _Node) -> _Node | None:
        """The t in 1 + t or t + 1, else None."""
        if n.op == "add":
            a, c = n.args
            if _is(a, 1.0):
                return c
            if _is(c, 1.0):
                return a
        return None

    def minus(u: _Node) -> str:
        """Text of -u."""
        if u.op == "neg":
            return _to_text(u.args[0])
        return f"-{_to_text(u)}" if _prec(u) >= 8 else f"-({_to_text(u)})"

    t = _to_text
    for n in _postorder(root):
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
            scale = "" if _is(n.args[0], 1.0) else f"{t(n.args[0])} * "
            if call(n.args[0], "exp") and n.args[0].args[0] is arg:
                hints.append(f"sigmoid({t(arg)}) instead of {t(n)}")
            else:
                hints.append(f"{scale}sigmoid({inner}) instead of {t(n)}")
        elif n.op == "div" and n.args[0].op == "sub" and n.args[1].op == "add" \
                and all(call(k, "exp") for k in (*n.args[0].args, *n.args[1].args)):
            hints.append(f"tanh({t(n.args[0].args[0].args[0])}) instead of {t(n)}")
    return hints


def _culprit(root: _Node, fns: dict[int, _Fn], x0: float) -> tuple[_Node, list[float]]:
    """The innermost sub-expression that is not finite at x0 (following the taken branches)."""
    xa = np.array([x0])

    def val(n: _Node) -> float:
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


def _describe(node: _Node, arg_vals: list[float], value: float) -> str:
    text = _to_text(node)
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


def _probe(root: _Node, fns: dict[int, _Fn], x: Array, what: str, value_root: _Node) -> None:
    fn = _vectorise(fns[id(root)])
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
    hints = _unstable_patterns(value_root)
    msg = (f"the {what} is not finite at x = {x0:.6g}: {detail}; the Gaussian integrals reach "
           f"|x| up to {_REACH:g}, so the formula must be finite there")
    if hints:
        msg += "; write " + "; write ".join(dict.fromkeys(hints))
    raise FormulaError(msg)


def _reaches(root: _Node, fns: dict[int, _Fn], x0: float, target: _Node) -> bool:
    """True if ``target`` takes part in the value at x0 (the branches of where taken there)."""
    xa = np.array([x0])
    stack, seen = [root], set()
    while stack:
        node = stack.pop()
        if node is target:
            return True
        if id(node) in seen:
            continue
        seen.add(id(node))
        if node.op == "where":
            with np.errstate(all="ignore"):
                taken = bool(np.asarray(fns[id(node.args[0])](xa, {})).reshape(-1)[0])
            stack.append(node.args[1] if taken else node.args[2])
        elif node.op not in ("cmp", "and", "or", "not"):
            stack.extend(node.args)
    return False


def _check_poles(root: _Node, fns: dict[int, _Fn]) -> None:
    """Refuse poles between grid points: a denominator (or the base of a negative power)
    that changes sign where it takes part in the value.

    The probe grid only sees a pole it lands on exactly; ``1 / (x - 0.0005)``
    would otherwise pass with huge finite values and a divergent integral. A
    0/0 point (``sin(x - a) / (x - a)``) is a removable singularity and passes.
    """
    grid = _grid("search")
    for n in _postorder(root):
        if n.op == "div" and n.args[1].has_x:
            den, num = n.args[1], n.args[0]
        elif n.op == "pow" and n.args[0].has_x and not n.args[1].has_x \
                and _constant_value(n.args[1]) < 0:
            den, num = n.args[0], None
        else:
            continue
        den_fn = _vectorise(fns[id(den)])
        num_fn = None if num is None else _vectorise(fns[id(num)])
        for r in _roots_of(den_fn, grid):
            if not _reaches(root, fns, r, n):
                continue
            if num_fn is not None:
                near = num_fn(np.array([r, r - 1e-2, r + 1e-2]))
                if abs(near[0]) <= 1e-9 * max(1.0, abs(near[1]), abs(near[2])):
                    continue  # 0/0: removable
            raise FormulaError(
                f"the value has a pole at x = {r:.6g}: {_to_text(den)} is 0 there, in "
                f"{_to_text(n)}; the Gaussian integrals reach |x| up to {_REACH:g}, so the "
                "formula must be finite there")


# ---------------------------------------------------------------------------------------
# the whole build
# ---------------------------------------------------------------------------------------
def _check_params(params: Mapping[str, Any]) -> dict[str, float]:
    if len(params) > LIMITS.max_parameters:
        raise FormulaError(f"{len(params)} parameters given; the limit is "
                           f"{LIMITS.max_parameters}")
    out: dict[str, float] = {}
    for key, raw in params.items():
        if not isinstance(key, str) or not key.isascii() or not key.isidentifier() \
                or keyword.iskeyword(key):
            raise FormulaError(f"parameter name {key!r} is not a plain name (letters, digits, _)")
        if key.startswith("_"):
            raise FormulaError(f"parameter name {key!r}: names starting with '_' are not allowed")
        if key == "x":
            raise FormulaError("parameter name 'x': x is the variable, not a parameter")
        if key in CONSTANTS or key in _ARITY or key in ("and", "or", "not"):
            raise FormulaError(f"parameter name {key!r} is taken by a "
                               f"{'constant' if key in CONSTANTS else 'function'}")
        out[key] = check_finite(f"params.{key}", raw)
    return out


def _build(text: str, params: dict[str, float]) -> Activation:
    _check_text(text)
    tree = _parse(text)
    _check_size(tree)
    b = _Builder()
    reader = _Reader(text, params, b)
    reader.whitelist(tree)
    value_root = reader.expr(tree)
    unused = sorted(set(params) - reader.used)
    if unused:
        names = ", ".join(repr(u) for u in unused)
        uses = ", ".join(sorted(reader.used)) or "none"
        msg = (f"parameter {names} is given but the formula does not use it "
               f"(parameters the formula uses: {uses})")
        called = {n.name for n in _postorder(value_root) if n.op == "call"}
        for fname, (pname, default, spelled) in _DEFAULTED.items():
            if fname in called and pname in unused:
                msg += (f"; {fname}(...) inside a formula uses its default {pname} = {default:g}: "
                        f"write {spelled} to set it")
        raise FormulaError(msg)
    if not value_root.has_x:
        raise FormulaError("the formula does not use the variable x")

    x = _grid("probe")
    value_fns = _compile_nodes(value_root)
    _probe(value_root, value_fns, x, "value", value_root)

    _check_poles(value_root, value_fns)

    deriv_root = _Differentiator(b)(value_root)
    deriv_fns = _compile_nodes(deriv_root)
    _probe(deriv_root, deriv_fns, x, "derivative", value_root)

    bps = _breakpoints(value_root, b)
    if bps:
        near = np.array([p + s * h for p in bps for h in (0.0, 1e-9 * max(1.0, abs(p)), 1e-6)
                         for s in (-1.0, 1.0)])
        _probe(value_root, value_fns, near, "value", value_root)
        _probe(deriv_root, deriv_fns, near, "derivative", value_root)

    formula = _to_text(value_root)
    derivative_formula = _to_text(deriv_root)
    value_fn = _vectorise(value_fns[id(value_root)])
    derivative_fn = _vectorise(deriv_fns[id(deriv_root)])
    desc = "typed formula; derivative by exact symbolic differentiation"
    if params:
        desc += "; parameters " + ", ".join(f"{k}={v:g}" for k, v in sorted(params.items()))
    return Activation(
        name=text.strip(),
        value_fn=value_fn,
        derivative_fn=derivative_fn,
        breakpoints=bps,
        params=params,
        formula=formula,
        derivative_formula=derivative_formula,
        description=desc,
        smoothing=_affine_smoothing(value_fn, derivative_fn, bps),
    )


def _piece_samples(lo: float, hi: float) -> Array:
    """Points inside (lo, hi): a dense interior set, or a geometric run out to 1e4 away."""
    if math.isinf(lo) and math.isinf(hi):
        far = np.geomspace(1e-3, 1e4, 60)
        return np.concatenate([-far[::-1], np.linspace(-3.0, 3.0, 61), far])
    if math.isinf(lo):
        return hi - np.geomspace(1e-6, 1e4, 80)
    if math.isinf(hi):
        return lo + np.geomspace(1e-6, 1e4, 80)
    return np.linspace(lo, hi, 82)[1:-1]


def _affine_smoothing(value_fn: Callable[[Array], Array], deriv_fn: Callable[[Array], Array],
                      bps: tuple[float, ...]) -> Smoothing | None:
    """Closed-form smoothing of a formula that is affine between its breakpoints, else None.

    Typed rectifiers ("max(x, 0)", "where(x > 0, x, 0.2 * x)", clipping, steps) are
    piecewise ``d x + e``; then E[phi(m + s z)] is a sum of truncated normal moments
    (:func:`propcalc.smoothing.piecewise_smoothing`) and the correlation map a 1-D
    integral. A piece counts as affine when phi equals ``d x + e`` (d and e read at
    one interior point) to 1e-13 at 80 points spread over the piece, out to |x| = 1e4.
    """
    edges = (-math.inf,) + tuple(bps) + (math.inf,)
    values, slopes = [], []
    for lo, hi in zip(edges[:-1], edges[1:]):
        xs = _piece_samples(lo, hi)
        with np.errstate(all="ignore"):
            x0 = xs[len(xs) // 2: len(xs) // 2 + 1]
            d = float(deriv_fn(x0)[0])
            e = float(value_fn(x0)[0]) - d * float(x0[0])
            f = value_fn(xs)
            ds = deriv_fn(xs)
        if not (math.isfinite(d) and math.isfinite(e)):
            return None
        scale = 1.0 + np.abs(d * xs) + abs(e)
        if not (np.all(np.abs(f - (d * xs + e)) <= 1e-13 * scale)
                and np.all(np.abs(ds - d) <= 1e-13 * (1.0 + abs(d)))):
            return None
        terms = tuple(t for t in (Term(d, 1), Term(e)) if t.coef != 0.0)
        if terms:
            values.append(Piece(lo, hi, terms))
        if d != 0.0:
            slopes.append(Piece(lo, hi, (Term(d),)))
    return piecewise_smoothing(values, slopes)


_CACHE_SIZE = 512
_CACHE: OrderedDict[tuple[str, tuple[tuple[str, float], ...]], Activation] = OrderedDict()
_CACHE_LOCK = threading.Lock()


def clear_formula_cache() -> None:
    """Forget every compiled formula (tests and long-running services)."""
    with _CACHE_LOCK:
        _CACHE.clear()


def formula_activation(text: str, **params: float) -> Activation:
    """Parse, check, differentiate and compile a typed formula in x.

    Parameters
    ----------
    text : str
        The formula, e.g. ``"x * sigmoid(beta * x)"`` (syntax in
        the README (section "Typing your own activation")).
    **params : float
        Values of the named parameters the formula uses.

    Returns
    -------
    Activation
        ``name`` is the text as typed (stripped), ``formula`` its normalised
        form, ``derivative_formula`` the exact derivative in the same syntax,
        ``breakpoints`` the points found where the formula switches.

    Raises
    ------
    FormulaError
        If the text is refused (with the reason and, when it has one, the
        1-based ``column``), a parameter is unknown or unused, or the value or
        derivative is not finite somewhere on ``|x| <= 1e4``.
    InvalidParameterError
        If a parameter value is not a finite real number.

    Notes
    -----
    The result is cached per (exact text, parameters) in a bounded LRU cache
    of 512 entries: the same input returns the same object while it is cached.
    """
    if not isinstance(text, str):
        raise FormulaError(f"a formula must be a string, got {type(text).__name__}")
    clean = _check_params(params)
    key = (text, tuple(sorted(clean.items())))
    with _CACHE_LOCK:
        act = _CACHE.get(key)
        if act is not None:
            _CACHE.move_to_end(key)
            return act
    act = _build(text, clean)
    with _CACHE_LOCK:
        act = _CACHE.setdefault(key, act)
        _CACHE.move_to_end(key)
        while len(_CACHE) > _CACHE_SIZE:
            _CACHE.popitem(last=False)
    return act


def activation(spec: str | Activation, **params: float) -> Activation:
    """Return an Activation from a built-in name or a typed formula.

    Parameters
    ----------
    spec : str or Activation
        A built-in name such as ``"tanh"`` or ``"leaky_relu"``, or a formula in
        ``x`` such as ``"x * tanh(softplus(x))"``. An Activation is returned
        unchanged.
    **params : float
        Named parameters: ``slope=0.1`` for leaky_relu..., or the values of the
        parameters a formula uses (``beta=1.5`` for ``"x * sigmoid(beta * x)"``).

    Returns
    -------
    Activation

    Raises
    ------
    UnknownActivationError
        If ``spec`` is not a string, or is a single unknown name (neither a
        built-in nor ``x``).
    FormulaError
        If a formula is refused (see :func:`formula_activation`).
    InvalidParameterError
        If a parameter is out of range.

    Examples
    --------
    >>> act = activation("x * sigmoid(beta * x)", beta=1.5)
    >>> act.derivative_formula
    'sigmoid(beta * x) + x * (sigmoid(beta * x) * sigmoid(-(beta * x)) * beta)'
    """
    if isinstance(spec, Activation):
        return spec
    if not isinstance(spec, str):
        raise UnknownActivationError(f"activation must be a name or formula string, got {spec!r}")
    name = spec.strip()
    if name in builtin_names():
        return builtin_activation(name, **params)
    if (name.isascii() and name.isidentifier() and not keyword.iskeyword(name)
            and name != "x" and not name.startswith("_") and name not in _ARITY
            and name not in CONSTANTS and name not in params):
        close = difflib.get_close_matches(name, builtin_names(), n=1)
        hint = f" (did you mean {close[0]}?)" if close else ""
        raise UnknownActivationError(
            f"unknown activation {spec!r}{hint}; built-ins are: {', '.join(builtin_names())}; "
            "or type a formula in x such as 'x * sigmoid(x)'")
    return formula_activation(spec, **params)

