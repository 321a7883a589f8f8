"""What a formula may contain: functions and their arities, exact derivative texts, constants,
operators, and the syntax the whitelist refuses (the limits on size are in :mod:`.limits`).

Everything here is data; the reader (:mod:`.reader`), the differentiator
(:mod:`.differentiator`) and the compiler (:mod:`.compiler`) read it.
"""

from __future__ import annotations

import ast
import math
import operator
from collections.abc import Callable
from typing import Any

import numpy as np
from scipy import special

from ..builtins import SELU_ALPHA, SELU_SCALE, builtin_names

__all__ = [
    "REACH", "FUNCTIONS", "CONSTANTS", "FUNCTIONS_1", "FUNCTIONS_2",
    "DERIVATIVE_TEXT", "BUILTIN_FUNCTIONS", "DEFAULTED", "ARITY", "BINOPS", "BAD_BINOPS",
    "CMPOPS", "CMP_FUNCS", "REFUSED_NODES", "ALLOWED_NODES", "STATEMENTS", "LOOKALIKES",
]


#: reach of the probes: the quadrature nodes of the maps go out to about this |x|
REACH = 1e4


def _softplus(x: Any) -> Any:
    return np.logaddexp(0.0, x)


# name -> numpy function of one argument
FUNCTIONS_1: dict[str, Callable[[Any], Any]] = {
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
FUNCTIONS_2 = {"max": np.maximum, "min": np.minimum}

# exact derivatives f'(x) of the functions above, in the formula syntax itself
DERIVATIVE_TEXT: dict[str, str] = {
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

BUILTIN_FUNCTIONS = tuple(n for n in builtin_names() if n not in FUNCTIONS_1)

# parametrised built-ins called inside a formula use their default parameters
DEFAULTED: dict[str, tuple[str, float, str]] = {
    "leaky_relu": ("slope", 0.01, "where(x > 0, x, slope * x)"),
    "elu": ("alpha", 1.0, "where(x > 0, x, alpha * expm1(x))"),
    "swish": ("beta", 1.0, "x * sigmoid(beta * x)"),
}

#: every function name a formula may call
FUNCTIONS: tuple[str, ...] = tuple(sorted([*FUNCTIONS_1, *FUNCTIONS_2, "where",
                                           *BUILTIN_FUNCTIONS]))
#: named constants
CONSTANTS: dict[str, float] = {"pi": math.pi, "e": math.e}

ARITY = {**{n: 1 for n in FUNCTIONS_1}, **{n: 1 for n in BUILTIN_FUNCTIONS},
          "max": 2, "min": 2, "where": 3}

BINOPS: dict[type, str] = {ast.Add: "add", ast.Sub: "sub", ast.Mult: "mul", ast.Div: "div",
                            ast.Pow: "pow"}
BAD_BINOPS: dict[type, tuple[str, str]] = {
    ast.BitXor: ("^", "'^' is not a power here: write x**2 for a power"),
    ast.Mod: ("%", "the remainder operator '%' is not allowed"),
    ast.FloorDiv: ("//", "floor division '//' is not allowed; use '/'"),
    ast.MatMult: ("@", "the matrix product '@' is not allowed"),
    ast.LShift: ("<<", "the shift operator '<<' is not allowed"),
    ast.RShift: (">>", "the shift operator '>>' is not allowed"),
    ast.BitOr: ("|", "'|' is not allowed; inside a where condition write 'or'"),
    ast.BitAnd: ("&", "'&' is not allowed; inside a where condition write 'and'"),
}
CMPOPS: dict[type, str] = {ast.Lt: "<", ast.LtE: "<=", ast.Gt: ">", ast.GtE: ">=", ast.Eq: "==",
                            ast.NotEq: "!="}
CMP_FUNCS: dict[str, Callable[[Any, Any], Any]] = {
    "<": operator.lt, "<=": operator.le, ">": operator.gt, ">=": operator.ge,
    "==": operator.eq, "!=": operator.ne}

# syntax the whitelist refuses, with the words used in the message
REFUSED_NODES: dict[type, str] = {
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
ALLOWED_NODES = (ast.BinOp, ast.UnaryOp, ast.Call, ast.Name, ast.Constant, ast.Compare,
                  ast.BoolOp, ast.keyword, ast.expr_context, ast.operator, ast.unaryop, ast.cmpop,
                  ast.boolop)

STATEMENTS: dict[type, str] = {
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
LOOKALIKES = {
    "\u0445": "x", "\u0425": "X", "\u0430": "a", "\u0435": "e", "\u043e": "o", "\u0440": "p",
    "\u0441": "c", "\u0443": "y", "\u0456": "i", "\u0455": "s", "\u03bf": "o", "\u03b1": "a",
    "\u03c7": "x", "\u2212": "-", "\u2013": "-", "\u2014": "-", "\u00d7": "*", "\u00b7": "*",
    "\u22c5": "*", "\u00f7": "/", "\u00b2": "**2", "\u00b3": "**3", "\u03c0": "pi",
    "\u00a0": " (a plain space)", "\u200b": "nothing (a zero-width space)",
    "\u2018": "no quotes", "\u2019": "no quotes", "\u201c": "no quotes", "\u201d": "no quotes",
}
