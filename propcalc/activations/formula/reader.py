"""Reading formula text: checks on the raw characters, ``ast.parse``, the node whitelist.

The text is read with :func:`ast.parse` (which only builds a syntax tree: no code
object is made and nothing is run), every node is checked against a whitelist, and
the tree is turned into interned :class:`~.tree.Node` graphs. Every refusal is a
:class:`~propcalc.errors.FormulaError` naming what was wrong and, when there is a
place, its 1-based column.
"""

from __future__ import annotations

import ast
import math
import re
import sys
import unicodedata
from collections.abc import Mapping

from ...errors import FormulaError
from ..names import did_you_mean
from .compiler import constant_value
from .tree import Builder, Node
from .limits import LIMITS, FormulaLimits
from .vocabulary import (ALLOWED_NODES, ARITY, BAD_BINOPS, BINOPS, CMPOPS, CONSTANTS, FUNCTIONS,
                         LOOKALIKES, REFUSED_NODES, STATEMENTS)

__all__ = ["check_text", "parse", "check_size", "Reader"]


def check_text(text: str, limits: FormulaLimits = LIMITS) -> int:
    """Checks on the raw characters, before anything parses them; returns the bracket depth."""
    if len(text) > limits.max_length:
        raise FormulaError(f"formula is {len(text)} characters long; the limit is "
                           f"{limits.max_length}")
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
            hint = LOOKALIKES.get(ch)
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
    return _check_nesting(text, limits)


def _check_nesting(text: str, limits: FormulaLimits) -> int:
    """Bracket depth and balance on the raw text (before ast.parse sees it)."""
    pairs = {")": "(", "]": "[", "}": "{"}
    stack: list[tuple[str, int]] = []
    deepest = 0
    for i, ch in enumerate(text):
        if ch in "([{":
            stack.append((ch, i + 1))
            deepest = max(deepest, len(stack))
            if len(stack) > limits.max_nesting:
                raise FormulaError(
                    f"brackets nest more than {limits.max_nesting} deep (column {i + 1}); "
                    f"the limit is {limits.max_nesting}", i + 1)
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
    return deepest


def parse(text: str) -> ast.expr:
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
                what = STATEMENTS.get(type(stmt), "statements are not allowed")
                col = stmt.col_offset + 1 + offset
                return FormulaError(f"{what} (column {col}); a formula is a single expression "
                                    "in x", col)
    col = (exc.offset or 1) + offset
    msg = (exc.msg or "invalid syntax").rstrip(".")
    return FormulaError(f"could not read the formula at column {col}: {msg}", col)


def check_size(root: ast.expr, limits: FormulaLimits = LIMITS) -> tuple[int, int]:
    """Count the expression nodes of the syntax tree and its depth; refuse beyond the limits."""
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
    if count > limits.max_nodes:
        raise FormulaError(f"formula has {count} nodes (numbers, names, operators and calls); "
                           f"the limit is {limits.max_nodes}")
    if depth_max > limits.max_tree_depth:
        raise FormulaError(f"formula nests {depth_max} operations deep; the limit is "
                           f"{limits.max_tree_depth}")
    return count, depth_max


def _col(node: ast.AST) -> int:
    return int(getattr(node, "col_offset", 0)) + 1


class Reader:
    """Turns a whitelisted AST into interned nodes (no simplification)."""

    def __init__(self, text: str, params: Mapping[str, float], builder: Builder,
                 limits: FormulaLimits = LIMITS) -> None:
        self.text = text
        self.params = params
        self.b = builder
        self.limits = limits
        self.used: set[str] = set()
        #: largest |p| of a constant exponent read so far
        self.largest_exponent = 0.0

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
        what = REFUSED_NODES.get(type(node), f"{type(node).__name__} expressions are not allowed")
        return FormulaError(f"{what} at column {col}", col)

    def whitelist(self, root: ast.expr) -> None:
        """Refuse any node type outside the whitelist, before reading anything.

        Attribute access is reported first (the classic escape route), then
        the leftmost other offence.
        """
        offences: list[tuple[int, int, ast.AST]] = []
        for node in ast.walk(root):
            if isinstance(node, ALLOWED_NODES):
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
    def expr(self, node: ast.expr) -> Node:
        """The node of an arithmetic expression (conditions only inside where)."""
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

    def constant(self, node: ast.Constant) -> Node:
        """A number literal: finite, not underflowing, not subnormal."""
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
        if abs(f) < sys.float_info.min and isinstance(v, float):
            shown = self._segment(node)
            mantissa = re.split("[eE]", shown.replace("_", ""))[0]
            if f != 0.0 or re.search("[1-9]", mantissa):
                what = ("underflows to 0 in double precision" if f == 0.0 else
                        "is subnormal in double precision (fewer than 53 significant bits)")
                raise FormulaError(
                    f"the number {shown} at column {col} {what}: the smallest normal double "
                    f"is {sys.float_info.min!r}; write 0 if you mean 0", col)
        return self.b.num(f)

    def name(self, node: ast.Name) -> Node:
        """x, a constant or a given parameter; anything else is refused with a hint."""
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
        if ident in ARITY:
            raise FormulaError(f"{ident!r} at column {col} is a function: call it, as in "
                               f"{ident}(x)", col)
        given = ", ".join(sorted(self.params)) or "none"
        known = ["x", *CONSTANTS, *self.params]
        hint = did_you_mean(ident, known)
        raise FormulaError(f"unknown name {ident!r} at column {col}{hint}; the variable is x, "
                           f"parameters given: {given}", col)

    def binop(self, node: ast.BinOp) -> Node:
        """+, -, *, / and ** (the other binary operators are refused with a hint)."""
        op = BINOPS.get(type(node.op))
        if op is None:
            sym, what = BAD_BINOPS.get(type(node.op), ("?", "this operator is not allowed"))
            col = self._find(sym, node.left.end_col_offset or 0)
            raise FormulaError(f"{what} (column {col})", col)
        if op == "pow":
            return self.power(node)
        return self.b.make(op, (self.expr(node.left), self.expr(node.right)))

    def power(self, node: ast.BinOp) -> Node:
        """a**b, with constant exponents bounded and power towers refused."""
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
            value = constant_value(expo)
            limit = self.limits.max_exponent
            if math.isfinite(value):
                self.largest_exponent = max(self.largest_exponent, abs(value))
            if not math.isfinite(value) or abs(value) > limit:
                shown = self._segment(node.right)
                if expo.op == "param":
                    shown = f"{expo.name} = {value:g}"
                raise FormulaError(
                    f"the exponent {shown} at column {col} is too large: a constant exponent "
                    f"must satisfy |exponent| <= {limit:g}", col)
        return self.b.make("pow", (base, expo))

    def call(self, node: ast.Call) -> Node:
        """A call of a known function with its arity, by position only."""
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
        if fname not in ARITY:
            hint = did_you_mean(fname, FUNCTIONS)
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
        want, got = ARITY[fname], len(node.args)
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
        sym = CMPOPS.get(type(op))
        if sym is None:
            word = {ast.Is: "is", ast.IsNot: "is not", ast.In: "in", ast.NotIn: "not in"}.get(
                type(op), "?")
            col = self._find(word.split()[0], node.left.end_col_offset or 0)
            raise FormulaError(f"the operator '{word}' at column {col} is not allowed; "
                               "comparisons are <, <=, >, >=, ==, !=", col)
        return sym

    def condition(self, node: ast.expr) -> Node:
        """The condition of where: comparisons joined by and, or, not."""
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


