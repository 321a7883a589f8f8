"""Hostile and malformed formulas: each is refused quickly, clearly, and runs nothing.

The HTTP service passes formulas from anyone to ``propcalc.activation``. Every
input below must raise :class:`propcalc.FormulaError` whose message names what
was wrong (and where, when there is a place), within 100 ms, and without
anything in the text being executed: ``eval``/``exec`` are replaced by traps,
``compile`` may only be used to build syntax trees (``ast.PyCF_ONLY_AST``, which
is what ``ast.parse`` does), and ``os.system``, ``os.popen`` and
``subprocess.Popen`` are replaced by recorders.

The 100 ms bound is a safety bound on refusal (an allowed exception to the
no-timing rule of RULES.md item 5); the expected messages are part of the
contract (common practice, no source).
"""

from __future__ import annotations

import ast
import builtins
import os
import subprocess
import time

import pytest

import propcalc
from propcalc.errors import FormulaError, InvalidParameterError, UnknownActivationError

# (formula, parameters, regex the message must match, column or None when unchecked)
CATALOGUE: list[tuple[str, dict[str, float], str, int | None]] = [
    # --- dunders, attribute access ---------------------------------------------------------
    ("x.__class__", {}, r"attribute access is not allowed at column 2", 2),
    ("x.real", {}, r"attribute access is not allowed at column 2", 2),
    ("(x).__class__.__mro__", {}, r"attribute access is not allowed at column 4", 4),
    ("exp.__globals__", {}, r"attribute access is not allowed at column 4", 4),
    ("exp(x).__class__", {}, r"attribute access is not allowed at column 7", 7),
    ("().__class__.__bases__[0].__subclasses__()", {}, r"attribute access is not allowed at column 3", 3),
    ("__import__(x)", {}, r"names starting with '_' are not allowed \('__import__' at column 1\)", 1),
    ("__builtins__", {}, r"names starting with '_' are not allowed", 1),
    ("x + __debug__", {}, r"names starting with '_' are not allowed \('__debug__' at column 5\)", 5),
    ("_ * x", {}, r"names starting with '_' are not allowed", 1),
    ("__import__('os').system('echo hi')", {}, r"strings are not allowed \(quote at column 12\)", 12),
    ("propcalc_sentinel()", {}, r"unknown function 'propcalc_sentinel' at column 1", 1),
    ("eval(x)", {}, r"unknown function 'eval' at column 1", 1),
    ("exec(x)", {}, r"unknown function 'exec'", 1),
    ("open(x)", {}, r"unknown function 'open'", 1),
    ("getattr(x, x)", {}, r"unknown function 'getattr'", 1),
    # --- imports and statements --------------------------------------------------------------
    ("import os", {}, r"import statements are not allowed \(column 1\)", 1),
    ("from os import system", {}, r"import statements are not allowed", 1),
    ("x; import os", {}, r"';' at column 2: a formula is a single expression", 2),
    ("x = 1", {}, r"assignments are not allowed", 1),
    ("x += 1", {}, r"assignments are not allowed", 1),
    ("del x", {}, r"del statements are not allowed", 1),
    ("def f(): pass", {}, r"function definitions are not allowed", 1),
    ("class A: pass", {}, r"class definitions are not allowed", 1),
    ("global x", {}, r"statements are not allowed", 1),
    ("raise SystemExit", {}, r"statements are not allowed", 1),
    ("while 1: pass", {}, r"statements are not allowed", 1),
    # --- lambdas, comprehensions ---------------------------------------------------------------
    ("lambda: 0", {}, r"lambda functions are not allowed at column 1", 1),
    ("(lambda x: x)(1)", {}, r"lambda functions are not allowed at column 2", 2),
    ("[x for x in (1, 2)]", {}, r"comprehensions are not allowed at column 1", 1),
    ("exp(x for x in (1,))", {}, r"generator expressions are not allowed at column 4", 4),
    ("{x: 1 for x in (1,)}", {}, r"comprehensions are not allowed", 1),
    ("{x for x in (1,)}", {}, r"comprehensions are not allowed", 1),
    # --- strings, f-strings, bytes -------------------------------------------------------------
    ("'abc'", {}, r"strings are not allowed \(quote at column 1\)", 1),
    ('"x"', {}, r"strings are not allowed", 1),
    ("x + 'a'", {}, r"strings are not allowed \(quote at column 5\)", 5),
    ("f'{x}'", {}, r"f-strings are not allowed \(quote at column 2\)", 2),
    ("F'{x.__class__}'", {}, r"f-strings are not allowed", 2),
    ("b'x'", {}, r"bytes literals are not allowed \(quote at column 2\)", 2),
    ("'''x'''", {}, r"strings are not allowed", 1),
    # --- containers, subscripts --------------------------------------------------------------
    ("[x]", {}, r"lists are not allowed at column 1", 1),
    ("(x, 1)", {}, r"tuples .* are not allowed at column 1", 1),
    ("x, 1", {}, r"tuples .* are not allowed", 1),
    ("{x}", {}, r"sets are not allowed", 1),
    ("{1: x}", {}, r"dicts are not allowed", 1),
    ("()", {}, r"tuples .* are not allowed", None),
    ("x[0]", {}, r"subscripts \(indexing with \[...\]\) are not allowed at column 1", 1),
    ("exp(x)[0]", {}, r"subscripts .* are not allowed", 1),
    # --- walrus, starred, keyword tricks, calls of calls ------------------------------------
    ("(y := x)", {}, r"assignment expressions \(:=\) are not allowed at column 2", 2),
    ("exp(y := 1)", {}, r"assignment expressions \(:=\) are not allowed at column 5", 5),
    ("exp(*x)", {}, r"starred arguments \(\*\) are not allowed at column 5", 5),
    ("max(*(x, 1))", {}, r"starred arguments \(\*\) are not allowed at column 5", 5),
    ("exp(x=1)", {}, r"keyword arguments are not allowed in calls \(x= at column 5\)", 5),
    ("exp(**x)", {}, r"'\*\*' unpacking is not allowed in calls \(column 5\)", 5),
    ("where(x > 0, x, 0, extra=1)", {}, r"keyword arguments are not allowed", 20),
    ("exp(x)(2)", {}, r"calling the result of a call is not allowed \(column 7\)", 7),
    ("x(2)", {}, r"x is the variable, not a function \(column 1\)", 1),
    ("pi(x)", {}, r"pi is a constant, not a function", 1),
    ("beta(x)", {"beta": 1.0}, r"'beta' is a parameter, not a function", 1),
    ("exp", {}, r"'exp' at column 1 is a function: call it, as in exp\(x\)", 1),
    ("x * exp", {}, r"'exp' at column 5 is a function", 5),
    # --- nesting and size -------------------------------------------------------------------
    ("(" * 10000 + "x" + ")" * 10000, {}, r"formula is 20001 characters long; the limit is 500", None),
    ("(" * 31 + "x" + ")" * 31, {}, r"brackets nest more than 30 deep \(column 31\)", 31),
    ("(" * 240 + "x" + ")" * 240, {}, r"brackets nest more than 30 deep", 31),
    ("exp(" * 31 + "x" + ")" * 31, {}, r"brackets nest more than 30 deep", None),
    ("[" * 100 + "]" * 100, {}, r"brackets nest more than 30 deep", 31),
    ("-" * 150 + "x", {}, r"formula nests 151 operations deep; the limit is 60", None),
    ("x" + "+x" * 70, {}, r"formula nests 71 operations deep; the limit is 60", None),
    ("+".join(["x"] * 150), {}, r"formula has 299 nodes .*; the limit is 200", None),
    ("x + " * 200 + "x", {}, r"formula is 801 characters long; the limit is 500", None),
    ("1" * 501, {}, r"formula is 501 characters long", None),
    ("x" + " " * 600, {}, r"formula is 601 characters long", None),
    ("(x", {}, r"'\(' at column 1 is never closed", 1),
    ("x)", {}, r"unmatched '\)' at column 2", 2),
    ("(x]", {}, r"'\]' at column 3 does not match '\(' at column 1", 3),
    # --- huge numbers, exponents ----------------------------------------------------------
    ("9**9**9**9", {}, r"power towers like a\*\*b\*\*c are not allowed \(column 2\)", 2),
    ("x**9**9", {}, r"power towers", 2),
    ("x**(2**3)", {}, r"power towers", 2),
    ("x**100", {}, r"the exponent 100 at column 2 is too large: .*\|exponent\| <= 64", 2),
    ("x**-100", {}, r"the exponent -100 at column 2 is too large", 2),
    ("2**1000 * x", {}, r"the exponent 1000 at column 2 is too large", 2),
    ("x**(60 + 10)", {}, r"the exponent 60 \+ 10 at column 2 is too large", 2),
    ("x**beta", {"beta": 100.0}, r"the exponent beta = 100 at column 2 is too large", 2),
    ("9" * 400 + " * x", {}, r"the number at column 1 is too large", 1),
    ("1e309 * x", {}, r"the number at column 1 is too large", 1),
    ("x + (9**64)**64", {}, r"the value is not finite at x = 0: \(9\*\*64\)\*\*64 overflows", None),
    # --- unicode look-alikes ------------------------------------------------------------------
    ("\u0445", {}, r"character 'х' \(U\+0445 CYRILLIC SMALL LETTER HA\) at column 1 is not allowed: "
                   r"formulas are plain ASCII; did you mean 'x'\?", 1),
    ("\u0445 * 2", {}, r"U\+0445 CYRILLIC SMALL LETTER HA.*did you mean 'x'", 1),
    ("\u0435\u0445\u0440(x)", {}, r"U\+0435 CYRILLIC SMALL LETTER IE.*did you mean 'e'", 1),
    ("\uff58 + 1", {}, r"U\+FF58 FULLWIDTH LATIN SMALL LETTER X.*did you mean 'x'", 1),
    ("x + \uff11", {}, r"U\+FF11 FULLWIDTH DIGIT ONE\) at column 5.*did you mean '1'", 5),
    ("x \u2212 1", {}, r"U\+2212 MINUS SIGN.*did you mean '-'", 3),
    ("x \u00d7 2", {}, r"U\+00D7 MULTIPLICATION SIGN.*did you mean '\*'", 3),
    ("x\u00b2", {}, r"U\+00B2 SUPERSCRIPT TWO.*did you mean '\*\*2'", 2),
    ("\U0001d465", {}, r"U\+1D465 MATHEMATICAL ITALIC SMALL X.*did you mean 'x'", 1),
    ("\u03c7 + 1", {}, r"U\+03C7 GREEK SMALL LETTER CHI", 1),
    ("x\u200b+ 1", {}, r"U\+200B ZERO WIDTH SPACE\) at column 2", 2),
    ("x\u00a0+ 1", {}, r"U\+00A0 NO-BREAK SPACE", 2),
    # --- empty, whitespace, control characters, newlines -------------------------------------
    ("", {}, r"formula is empty", None),
    ("   ", {}, r"formula is only whitespace", None),
    ("\t", {}, r"formula is only whitespace", None),
    ("x\n+1", {}, r"newline at column 2: a formula is one line", 2),
    ("x\r\n", {}, r"newline at column 2", 2),
    ("x\\\n+ 1", {}, r"backslash at column 2 is not allowed", 2),
    ("x\x00", {}, r"control character U\+0000 at column 2", 2),
    ("x\x1b[2J", {}, r"control character U\+001B at column 2", 2),
    ("x # comment", {}, r"comments \('#' at column 3\) are not allowed", 3),
    # --- unknown names, wrong arity -----------------------------------------------------------
    ("y + 1", {}, r"unknown name 'y' at column 1; the variable is x, parameters given: none", 1),
    ("x * beta", {}, r"unknown name 'beta' at column 5; the variable is x, parameters given: none", 5),
    ("x * betta", {"beta": 1.0}, r"unknown name 'betta' at column 5 \(did you mean beta\?\); "
                                 r"the variable is x, parameters given: beta", 5),
    ("X + 1", {}, r"unknown name 'X' at column 1 \(did you mean x\?\)", 1),
    ("x + exq(x)", {}, r"unknown function 'exq' at column 5 \(did you mean exp\?\); known: abs, "
                       r"arctan, .*exp, expm1", 5),
    ("exp(x, 2)", {}, r"exp takes 1 argument, got 2", 1),
    ("exp()", {}, r"exp takes 1 argument, got 0", 1),
    ("max(x)", {}, r"max takes 2 arguments, got 1", 1),
    ("where(x > 0, x)", {}, r"where takes 3 arguments, got 2", 1),
    ("relu(x, 1)", {}, r"relu takes 1 argument, got 2", 1),
    # --- comparisons and boolean operators out of place ---------------------------------------
    ("x > 0", {}, r"comparison '>' at column 3 is only allowed as the condition of where", 3),
    ("(x > 0) * x", {}, r"comparison '>' at column 4 is only allowed", 4),
    ("where(x > 0, x > 1, 0)", {}, r"comparison '>' at column 16", 16),
    ("exp(x <= 1)", {}, r"comparison '<=' at column 7", 7),
    ("where(0 < x < 1, x, 0)", {}, r"chained comparisons are not allowed \('0 < x < 1' at column 7\)", 7),
    ("x and 1", {}, r"'and' at column 3 is only allowed inside the condition of where", 3),
    ("x or x", {}, r"'or' at column 3 is only allowed", 3),
    ("not x", {}, r"'not' at column 1 is only allowed inside the condition", 1),
    ("where(x, 1, 0)", {}, r"the condition of where must be a comparison .*got 'x' at column 7", 7),
    ("where(x > 0 and 1, x, 0)", {}, r"the condition of where must be a comparison .*got '1' at column 17", 17),
    ("where(not x, 1, 0)", {}, r"the condition of where must be a comparison .*got 'x' at column 11", 11),
    ("x is 1", {}, r"the operator 'is' at column 3 is not allowed", 3),
    ("where(x in x, 1, 0)", {}, r"the operator 'in' at column 9 is not allowed", 9),
    # --- other literals and operators -----------------------------------------------------------
    ("1j * x", {}, r"complex numbers are not allowed \('1j' at column 1\)", 1),
    ("x + 2j", {}, r"complex numbers are not allowed \('2j' at column 5\)", 5),
    ("...", {}, r"'\.\.\.' at column 1 is not allowed", 1),
    ("x + ...", {}, r"'\.\.\.' at column 5 is not allowed", 5),
    ("None", {}, r"None at column 1 is not a number", 1),
    ("True * x", {}, r"True at column 1 is not a number", 1),
    ("x if x > 0 else 0", {}, r"conditional expressions \(a if c else b\) are not allowed; write "
                             r"where\(c, a, b\) at column 1", 1),
    ("x ^ 2", {}, r"'\^' is not a power here: write x\*\*2 for a power \(column 3\)", 3),
    ("x % 2", {}, r"the remainder operator '%' is not allowed \(column 3\)", 3),
    ("x // 2", {}, r"floor division '//' is not allowed", 3),
    ("x @ x", {}, r"the matrix product '@' is not allowed", 3),
    ("x << 1", {}, r"the shift operator '<<' is not allowed", 3),
    ("x | 1", {}, r"'\|' is not allowed; inside a where condition write 'or'", 3),
    ("x & 1", {}, r"'&' is not allowed", 3),
    ("~x", {}, r"the operator '~' at column 1 is not allowed", 1),
    ("await x", {}, r"await is not allowed at column 1", 1),
    ("(yield x)", {}, r"yield is not allowed at column 2", 2),
    ("x +", {}, r"could not read the formula at column \d+: invalid syntax", None),
    ("$x", {}, r"could not read the formula at column 1", 1),
    ("x ? 1 : 0", {}, r"could not read the formula", None),
    ("x x", {}, r"could not read the formula at column 3: invalid syntax", 3),
    ("1.real", {}, r"could not read the formula at column 2: invalid decimal literal", 2),
    # --- parameters ---------------------------------------------------------------------------
    ("x * beta", {"beta": 1.0, "gamma": 2.0}, r"parameter 'gamma' is given but the formula does "
                                              r"not use it \(parameters the formula uses: beta\)", None),
    ("x", {"x": 1.0}, r"parameter name 'x': x is the variable", None),
    ("x * exp(x)", {"exp": 1.0}, r"parameter name 'exp' is taken by a function", None),
    ("x * pi", {"pi": 3.0}, r"parameter name 'pi' is taken by a constant", None),
    ("x", {"__class__": 1.0}, r"parameter name '__class__': names starting with '_'", None),
    ("x", {"a b": 1.0}, r"parameter name 'a b' is not a plain name", None),
    ("x", {"lambda": 1.0}, r"parameter name 'lambda' is not a plain name", None),
    # --- formulas the probes refuse ---------------------------------------------------------------
    ("where(sin(x) > 0, x, 0)", {}, r"switches at \d+ or more points .* the limit is 64", None),
    ("1 + 0 * beta", {"beta": 1.0}, r"the formula does not use the variable x", None),
    ("1 / (x - 0.0005)", {}, r"the value has a pole at x = 0.0005: x - 0.0005 is 0 there", None),
    # --- issue 11: even-order poles, near-poles, singular derivatives --------------------------
    ("1/(x - 0.0005)**2", {}, r"the value has a pole at x = 0.0005: \(x - 0.0005\)\*\*2 is 0", None),
    ("1/(x**2 + 1e-150)", {}, r"the value has a pole at x = 0: x\*\*2 \+ 1e-150 comes within "
                              r"1e-150 of 0", None),
    ("1/(1 + cos(x))", {}, r"pole at x = -3.14159: 1 \+ cos\(x\) is 0 there without changing "
                           r"sign", None),
    ("sqrt(abs(x - 0.0005))", {}, r"the derivative has a pole at x = 0.0005", None),
    # --- issue 11: numbers at the ends of double precision -------------------------------------
    ("x + 1e-400", {}, r"the number 1e-400 at column 5 underflows to 0 in double precision", 5),
    ("1e-310 * x", {}, r"the number 1e-310 at column 1 is subnormal", 1),
    ("1e-200 * 1e-200 * x", {}, r"the constant 1e-200 \* 1e-200 underflows to 0.0", None),
    ("x * 1e200 * 1e200", {}, r"the value is not finite at x = -0\.001: x \* 1e\+200 \* 1e\+200 "
                              r"overflows", None),
    # --- issue 11: derivatives that explode when spelled out: refused by a limit, in time ------
    ("abs(" * 31 + "x" + ")" * 31, {}, r"brackets nest more than 30 deep \(column 124\)", 124),
]


@pytest.fixture
def traps(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """Replace every way of running text by a recorder; yield the list of what fired."""
    fired: list[str] = []
    real_compile, real_eval, real_exec = builtins.compile, builtins.eval, builtins.exec

    # text must never reach eval/exec; code objects (the import system runs modules with
    # exec(code, namespace)) pass through, and compile is trapped for anything but syntax trees
    def no_eval(source: object, *args: object, **kwargs: object) -> object:
        if isinstance(source, (str, bytes)):
            fired.append(f"eval({source!r:.40})")
            raise AssertionError("eval was called on text")
        return real_eval(source, *args, **kwargs)  # type: ignore[arg-type]

    def no_exec(source: object, *args: object, **kwargs: object) -> object:
        if isinstance(source, (str, bytes)):
            fired.append(f"exec({source!r:.40})")
            raise AssertionError("exec was called on text")
        return real_exec(source, *args, **kwargs)  # type: ignore[arg-type]

    def ast_only_compile(source: object, filename: object, mode: str, flags: int = 0,
                         *args: object, **kwargs: object) -> object:
        if isinstance(source, (str, bytes)) and not flags & ast.PyCF_ONLY_AST:
            fired.append(f"compile({source!r:.40})")
        return real_compile(source, filename, mode, flags, *args, **kwargs)

    def recorder(name: str):
        def record(*args: object, **kwargs: object) -> int:
            fired.append(name)
            return 0
        return record

    monkeypatch.setattr(builtins, "eval", no_eval)
    monkeypatch.setattr(builtins, "exec", no_exec)
    monkeypatch.setattr(builtins, "compile", ast_only_compile)
    monkeypatch.setattr(builtins, "propcalc_sentinel", recorder("propcalc_sentinel"), raising=False)
    monkeypatch.setattr(os, "system", recorder("os.system"))
    monkeypatch.setattr(os, "popen", recorder("os.popen"))
    monkeypatch.setattr(subprocess, "Popen", recorder("subprocess.Popen"))
    return fired


def _ident(case: tuple[str, dict[str, float], str, int | None]) -> str:
    text = case[0]
    return ascii(text[:30]) + (f"+{len(text) - 30}" if len(text) > 30 else "")


def test_catalogue_is_large_enough() -> None:
    # the brief asks for at least 60 hostile or malformed inputs
    assert len(CATALOGUE) >= 60
    assert len({(t, tuple(sorted(p.items()))) for t, p, _, _ in CATALOGUE}) == len(CATALOGUE)


@pytest.mark.parametrize("case", CATALOGUE, ids=_ident)
def test_refused_quickly_and_clearly(case: tuple[str, dict[str, float], str, int | None],
                                     traps: list[str]) -> None:
    text, params, pattern, column = case
    t0 = time.perf_counter()
    with pytest.raises(FormulaError, match=pattern) as info:
        propcalc.activation(text, **params)
    elapsed = time.perf_counter() - t0
    assert elapsed < 0.1, f"refusal took {elapsed:.3f} s"  # safety bound on refusal, see module doc
    assert traps == []
    if column is not None:
        assert info.value.column == column
    message = str(info.value)
    assert "\n" not in message and len(message) < 600
    assert "Traceback" not in message


def test_sentinels_fire_when_called(traps: list[str]) -> None:
    # the traps themselves work: calling them records (so an empty list above means "not run")
    builtins.propcalc_sentinel()  # type: ignore[attr-defined]
    os.system("true")
    assert traps == ["propcalc_sentinel", "os.system"]


def test_import_os_system_does_not_run(traps: list[str], tmp_path) -> None:
    target = tmp_path / "pwned"
    for text in (f"__import__('os').system('touch {target}')",
                 "__import__(x).system(x)",
                 "propcalc_sentinel()",
                 "exp(propcalc_sentinel())",
                 f"where(x > 0, x, 0) + 0 * __import__('os').system('touch {target}')"):
        with pytest.raises(FormulaError):
            propcalc.activation(text)
    assert traps == []
    assert not target.exists()


def test_refusals_are_not_cached_and_stay_refused() -> None:
    for _ in range(3):
        with pytest.raises(FormulaError, match="attribute access"):
            propcalc.activation("x.__class__")


def test_bad_parameter_values_name_the_parameter() -> None:
    with pytest.raises(InvalidParameterError, match=r"params.beta must be a finite real number"):
        propcalc.activation("x * beta", beta="1; import os")  # type: ignore[arg-type]
    with pytest.raises(InvalidParameterError, match=r"params.beta must be a finite real number"):
        propcalc.activation("x * beta", beta=float("nan"))
    with pytest.raises(InvalidParameterError, match=r"params.beta"):
        propcalc.activation("x * beta", beta=True)  # type: ignore[arg-type]


def test_non_string_specs_and_bare_unknown_names() -> None:
    with pytest.raises(UnknownActivationError, match="must be a name or formula string"):
        propcalc.activation(b"x")  # type: ignore[arg-type]
    with pytest.raises(UnknownActivationError, match=r"unknown activation 'tanhh' \(did you mean tanh\?\)"):
        propcalc.activation("tanhh")
    from propcalc.activations.formula import formula_activation

    with pytest.raises(FormulaError, match="a formula must be a string, got int"):
        formula_activation(3)  # type: ignore[arg-type]


def test_a_formula_error_is_a_value_error() -> None:
    # narrow errors also inherit the builtin they resemble (STYLE.md, errors)
    with pytest.raises(ValueError):
        propcalc.activation("x.__class__")
