"""Compute the mpmath reference table that tests/test_reference_table.py checks propcalc against.

Command (from the repository root; about 4 minutes on one core with mpmath's pure-Python
backend; never run by pytest)::

    python tests/reference/make_table.py --out tests/reference/table.json

Nothing here imports propcalc: every activation is written again with mpmath functions
(independently of the numpy code of propcalc/activations.py) and every expectation is a
fresh mpmath quadrature, with the arithmetic at 30 significant digits (``mp.dps = 30``).

What is computed, for every built-in activation (and a few non-default parameters):

* ``E[phi(z)^2]`` and ``E[phi'(z)^2]`` at q = 1 (the inverse squares of the forward and
  backward gains), by ``mpmath.quad`` (tanh-sinh) with the breakpoints of phi passed as
  interval ends;
* at two points (sigma_w2, sigma_b2): the variance fixed point q* (``mpmath.findroot``,
  bracketing solver, on V(q) - q after a sign scan that checks the root is unique on
  [1e-6, 1e4]), chi_q = V'(q*) by the chain rule ``d/dq E[phi(x)^2] = E[x phi(x) phi'(x)] / q``
  (deliberately not Stein's identity, which propcalc uses), and
  chi_1 = sigma_w2 E[phi'(sqrt(q*) z)^2]
  (Schoenholz et al. 2017, eq. 8);
* xi_c at an ordered point, ``-1 / ln chi_1`` (Schoenholz et al. 2017, eq. 9 with c* = 1);
* xi_c at a chaotic point for a subset of activations (``CHAOTIC``): c* solves C(c) = c
  with ``mpmath.findroot`` (Newton; the derivative C'(c) = sigma_w2 E[phi'(u1) phi'(u2)] comes
  from the same nodes) on a 2-D product Gauss-Legendre rule in mpmath (the inner rule is
  split, for each outer node, where u2 crosses a breakpoint). The 2-D quadrature is much
  slower in mpmath than the 1-D one (seconds per evaluation), so only tanh, erf (smooth),
  selu, elu, hard_tanh (piecewise) and step (jump) get a chaotic point, each chosen with
  q* near 1; the other activations either have no chaotic phase with a finite q* (linear,
  relu, leaky_relu, softplus, silu/swish at these sigma_b2) or are left out for time:
  gelu, gelu_tanh and mish are chaotic with an attracting q* only at large q* (about 25-50
  here), where the 2-D rule needs many more panels, and sigmoid only at sigma_w2 > 100;
* ``E[phi(sqrt(q) z)^2]`` and ``E[phi'(sqrt(q) z)^2]`` at twelve q from 0.01 to 1e4;
* the critical point at q* = 1: ``sigma_w2 = 1 / E[phi'(z)^2]``,
  ``sigma_b2 = 1 - sigma_w2 E[phi(z)^2]`` (Poole et al. 2016; Schoenholz et al. 2017),
  marked invalid when sigma_b2 < 0, and its chi_q.

``self_checks`` records how the machinery reproduces closed forms (erf's chaotic point
against Williams 1997, the step's against Sheppard 1899, ReLU's q* and chi_1, SELU's
moments); each must agree below 1e-20.

Accuracy: the 1-D results carry mpmath.quad's error estimate (checked below 1e-25). For
c*, Newton's iterations run on a 2-D rule with 12 nodes per panel, then one Newton step
is taken on a rule with 24 nodes per panel and a longer range, which gives the stored
c* and chi_c; the change that step makes (a bound on the coarser rule's error, of order
1e-19) is stored as ``quad_error_2d`` and checked below 1e-17. Numbers are stored
as 30-digit strings; ``"inf"`` is infinity, ``null`` means "does not exist".
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from collections.abc import Callable
from typing import Any

import mpmath as mp
from mpmath.calculus.quadrature import GaussLegendre

__all__ = ["ACTIVATIONS", "POINTS", "CHAOTIC", "MOMENT_Q", "build_table", "self_checks", "main"]

mp.mp.dps = 30
DIGITS = 30
MPF = Any  # mpmath.mpf

# ------------------------------------------------------------------------------------------
# activations, written with mpmath only
# ------------------------------------------------------------------------------------------
# Klambauer et al. 2017, "Self-normalizing neural networks", eq. (14) (the digits from memory;
# they solve E[selu(z)] = 0, E[selu(z)^2] = 1 to 1e-32, checked in tests/test_maps.py).
SELU_ALPHA = mp.mpf("1.6732632423543772848170429916717")
SELU_SCALE = mp.mpf("1.0507009873554804934193349852946")
GELU_TANH_C = mp.mpf("0.044715")  # Hendrycks & Gimpel 2016


def _sigmoid(x: MPF) -> MPF:
    return 1 / (1 + mp.exp(-x))


def _softplus(x: MPF) -> MPF:
    return mp.log1p(mp.exp(x)) if x < 0 else x + mp.log1p(mp.exp(-x))


def _sech2(x: MPF) -> MPF:
    return 1 / mp.cosh(x) ** 2


def _gelu_tanh(x: MPF) -> MPF:
    u = mp.sqrt(2 / mp.pi) * (x + GELU_TANH_C * x**3)
    return x * (1 + mp.tanh(u)) / 2


def _gelu_tanh_d(x: MPF) -> MPF:
    k = mp.sqrt(2 / mp.pi)
    u = k * (x + GELU_TANH_C * x**3)
    return (1 + mp.tanh(u)) / 2 + x * _sech2(u) * k * (1 + 3 * GELU_TANH_C * x * x) / 2


def _mish(x: MPF) -> MPF:
    return x * mp.tanh(_softplus(x))


def _mish_d(x: MPF) -> MPF:
    sp = _softplus(x)
    return mp.tanh(sp) + x * _sech2(sp) * _sigmoid(x)


def _silu_beta(beta: MPF) -> tuple[Callable[[MPF], MPF], Callable[[MPF], MPF]]:
    def value(x: MPF) -> MPF:
        return x * _sigmoid(beta * x)

    def deriv(x: MPF) -> MPF:
        s = _sigmoid(beta * x)
        return s + beta * x * s * (1 - s)

    return value, deriv


def _leaky(a: MPF) -> tuple[Callable[[MPF], MPF], Callable[[MPF], MPF]]:
    return (lambda x: x if x > 0 else a * x), (lambda x: mp.mpf(1) if x > 0 else a)


def _elu(alpha: MPF, scale: MPF = mp.mpf(1)) -> tuple[Callable[[MPF], MPF], Callable[[MPF], MPF]]:
    return ((lambda x: scale * x if x > 0 else scale * alpha * mp.expm1(x)),
            (lambda x: scale if x > 0 else scale * alpha * mp.exp(x)))


def _entry(value: Callable[[MPF], MPF], deriv: Callable[[MPF], MPF], breakpoints: tuple = (),
           jumps: tuple = (), name: str | None = None, params: dict | None = None) -> dict:
    return {"value": value, "deriv": deriv, "breakpoints": tuple(mp.mpf(b) for b in breakpoints),
            "jumps": tuple(mp.mpf(j) for j in jumps), "name": name, "params": params or {}}


_silu_v, _silu_d = _silu_beta(mp.mpf(1))
_swish15_v, _swish15_d = _silu_beta(mp.mpf("1.5"))

#: label -> mpmath activation; ``name``/``params`` say how propcalc.activation builds it.
ACTIVATIONS: dict[str, dict] = {
    "linear": _entry(lambda x: x, lambda x: mp.mpf(1)),
    # Heaviside with H(0) = 1; phi' = delta(x): a jump of 1 at 0
    "step": _entry(lambda x: mp.mpf(1) if x >= 0 else mp.mpf(0), lambda x: mp.mpf(0), (0,), (1,)),
    "sigmoid": _entry(_sigmoid, lambda x: _sigmoid(x) * _sigmoid(-x)),
    "tanh": _entry(mp.tanh, _sech2),
    "relu": _entry(lambda x: x if x > 0 else mp.mpf(0), lambda x: mp.mpf(1 if x > 0 else 0), (0,)),
    "leaky_relu": _entry(*_leaky(mp.mpf("0.01")), (0,)),
    "elu": _entry(*_elu(mp.mpf(1)), (0,)),
    "selu": _entry(*_elu(SELU_ALPHA, SELU_SCALE), (0,)),
    "softplus": _entry(_softplus, _sigmoid),
    # Hendrycks & Gimpel 2016: x Phi(x), Phi the standard normal CDF
    "gelu": _entry(lambda x: x * mp.ncdf(x), lambda x: mp.ncdf(x) + x * mp.npdf(x)),
    "gelu_tanh": _entry(_gelu_tanh, _gelu_tanh_d),
    "silu": _entry(_silu_v, _silu_d),
    "swish": _entry(_silu_v, _silu_d),
    "mish": _entry(_mish, _mish_d),
    "erf": _entry(mp.erf, lambda x: 2 / mp.sqrt(mp.pi) * mp.exp(-x * x)),
    "hard_tanh": _entry(lambda x: max(mp.mpf(-1), min(mp.mpf(1), x)),
                        lambda x: mp.mpf(1) if abs(x) < 1 else mp.mpf(0), (-1, 1)),
    # non-default parameters
    "leaky_relu(slope=0.2)": _entry(*_leaky(mp.mpf("0.2")), (0,), name="leaky_relu",
                                    params={"slope": 0.2}),
    "elu(alpha=0.5)": _entry(*_elu(mp.mpf("0.5")), (0,), name="elu", params={"alpha": 0.5}),
    "swish(beta=1.5)": _entry(_swish15_v, _swish15_d, name="swish", params={"beta": 1.5}),
}

#: two (sigma_w2, sigma_b2) points per activation: the first ordered, the second chaotic
#: where the activation has a chaotic phase with a finite q* (else a second ordered point).
_DEFAULT_POINTS = (("1.5", "0.1"), ("1.0", "0.5"))
POINTS: dict[str, tuple[tuple[str, str], ...]] = {
    "linear": (("0.5", "0.1"), ("0.9", "0.5")),
    "step": (("1.0", "0.5"), ("2.0", "0.1")),
    "sigmoid": (("4.0", "0.1"), ("60.0", "0.1")),
    "tanh": (("1.5", "0.3"), ("2.0", "0.05")),
    "erf": (("1.0", "0.2"), ("2.0", "0.05")),
    "selu": (("0.8", "0.1"), ("1.0", "0.02")),
    "elu": (("1.2", "0.1"), ("1.6", "0.05")),
    "hard_tanh": (("1.2", "0.5"), ("1.6", "0.1")),
    "gelu": (("1.5", "0.1"), ("1.99", "0.3")),
    "gelu_tanh": (("1.5", "0.1"), ("1.99", "0.3")),
    "mish": (("1.5", "0.1"), ("1.98", "0.3")),
    "softplus": (("1.0", "0.1"), ("1.5", "0.5")),
    "silu": (("1.5", "0.1"), ("1.99", "0.3")),
    "swish": (("1.5", "0.1"), ("1.9", "0.5")),
}

#: variances at which E[phi^2] and E[phi'^2] are tabulated as well (a scan over scales; the
#: window 3 <= q <= 300 is where a coarse grading of the Gaussian rule would show)
MOMENT_Q = ("0.01", "0.1", "1", "3", "10", "15", "30", "46", "100", "300", "1000", "10000")

#: activations whose second point gets c*, chi_c and xi_c from the 2-D mpmath quadrature
CHAOTIC = ("tanh", "erf", "selu", "elu", "hard_tanh", "step")


# ------------------------------------------------------------------------------------------
# 1-D Gaussian expectations (tanh-sinh, split at breakpoints)
# ------------------------------------------------------------------------------------------
_INV_SQRT_2PI = 1 / mp.sqrt(2 * mp.pi)
_WORST_1D = [mp.mpf(0)]


def _density(z: MPF) -> MPF:
    return _INV_SQRT_2PI * mp.exp(-z * z / 2)


def expect(f: Callable[[MPF], MPF], q: MPF, breakpoints: tuple = ()) -> MPF:
    """E[f(sqrt(q) z)], z ~ N(0, 1), split at 0, at x = +-1, +-3 and at the breakpoints."""
    sq = mp.sqrt(q)
    cuts = {mp.mpf(0)} | {mp.mpf(b) / sq for b in breakpoints} | {s * k / sq for s in (-1, 1)
                                                                    for k in (1, 3)}
    pts = [-mp.inf] + sorted(c for c in cuts if abs(c) < 40) + [mp.inf]
    val, err = mp.quad(lambda z: f(sq * z) * _density(z), pts, error=True)
    rel = err / max(mp.mpf(1), abs(val))
    _WORST_1D[0] = max(_WORST_1D[0], rel)
    if rel > mp.mpf("1e-25"):
        raise RuntimeError(f"1-D quadrature error estimate {mp.nstr(err, 3)} too large")
    return val


def second_moment(act: dict, q: MPF) -> MPF:
    return expect(lambda x: act["value"](x) ** 2, q, act["breakpoints"])


def derivative_second_moment(act: dict, q: MPF) -> MPF:
    if act["jumps"]:
        return mp.inf
    return expect(lambda x: act["deriv"](x) ** 2, q, act["breakpoints"])


def variance_slope(act: dict, q: MPF, sw: MPF) -> MPF:
    """V'(q) = sigma_w2 E[x phi(x) phi'(x)] / q, x = sqrt(q) z (chain rule on E[phi(sqrt(q) z)^2]).

    The only jump among the built-ins is the step's, at x = 0, where the factor x kills the
    Dirac mass of phi': V is constant for the step and V'(q) = 0.
    """
    if any(b != 0 for b in act["breakpoints"] if act["jumps"]):
        raise NotImplementedError("jumps away from 0")
    return sw * expect(lambda x: x * act["value"](x) * act["deriv"](x), q, act["breakpoints"]) / q


# ------------------------------------------------------------------------------------------
# the variance fixed point
# ------------------------------------------------------------------------------------------
def variance_fixed_point(act: dict, sw: MPF, sb: MPF) -> MPF:
    """The unique root of V(q) - q on [1e-6, 1e4] (a sign scan checks uniqueness)."""
    def gap(q: MPF) -> MPF:
        return sw * second_moment(act, q) + sb - q

    grid = [mp.mpf(10) ** (mp.mpf(k) / 4) for k in range(-24, 17)]
    vals = [gap(q) for q in grid]
    brackets = [(a, b) for a, b, fa, fb in zip(grid[:-1], grid[1:], vals[:-1], vals[1:])
                if fa * fb < 0 or fa == 0]
    if len(brackets) != 1:
        raise RuntimeError(f"expected one fixed point, found {len(brackets)} sign changes")
    a, b = brackets[0]
    root = mp.findroot(gap, (a, b), solver="anderson", verify=False)
    if abs(gap(root)) > mp.mpf("1e-26") * max(1, root):
        raise RuntimeError("fixed point residual too large")
    return root


# ------------------------------------------------------------------------------------------
# 2-D: a product Gauss-Legendre rule in mpmath
# ------------------------------------------------------------------------------------------
class ProductRule:
    """E[g(u1, u2)] for u1 = sqrt(q) z1, u2 = sqrt(q) (c z1 + sqrt(1 - c^2) z2).

    Panels of width 1 in z on [-z_max, z_max], each with ``degree`` mpmath Gauss-Legendre
    nodes (3 * 2^(degree - 1) of them); the outer panels are also cut at the breakpoints,
    the inner panels, per outer node, where u2 crosses a breakpoint. When a standard
    deviation exceeds 1.5 (not at the table's points, which have q* near 1) the panels are
    also cut at x = k, |k| <= 12, where the activation changes on its own scale.
    """

    def __init__(self, degree: int, z_max: int) -> None:
        self.nodes = GaussLegendre(mp.mp).calc_nodes(degree, mp.mp.prec)
        self.z_max = mp.mpf(z_max)
        self.uniform = [mp.mpf(k) for k in range(-z_max, z_max + 1)]
        self._cache: dict[tuple, list] = {}

    def _panel(self, a: MPF, b: MPF) -> list[tuple[MPF, MPF]]:
        key = (a, b)
        hit = self._cache.get(key)
        if hit is not None:
            return hit
        h, m = (b - a) / 2, (a + b) / 2
        out = [(m + h * t, h * w * _density(m + h * t)) for t, w in self.nodes]
        if len(self._cache) < 4096:
            self._cache[key] = out
        return out

    def rule(self, mean: MPF, std: MPF, breakpoints: tuple) -> list[tuple[MPF, MPF]]:
        """Nodes (x, w) with sum w g(x) ~ E[g(mean + std z)]."""
        cuts = set(self.uniform)
        marks = list(breakpoints)
        if std > 1.5:
            marks += [mp.mpf(k) for k in range(-12, 13)]
        for b in marks:
            zb = (b - mean) / std
            if -self.z_max < zb < self.z_max:
                cuts.add(zb)
        edges = sorted(cuts)
        out = []
        for a, b in zip(edges[:-1], edges[1:]):
            out.extend((mean + std * z, w) for z, w in self._panel(a, b))
        return out

    def pair(self, act: dict, q: MPF, c: MPF) -> tuple[MPF, MPF]:
        """(E[phi(u1) phi(u2)], E[phi'(u1) phi'(u2)]); the second without Dirac masses."""
        sq, s = mp.sqrt(q), mp.sqrt(1 - c * c)
        bps = act["breakpoints"]
        f, d = act["value"], act["deriv"]
        acc_f, acc_d = [], []
        for x1, w1 in self.rule(mp.mpf(0), sq, bps):
            inner = self.rule(c * x1, sq * s, bps)
            f1, d1 = f(x1), d(x1)
            acc_f.append(w1 * f1 * mp.fsum(w2 * f(x2) for x2, w2 in inner))
            if d1 != 0:
                acc_d.append(w1 * d1 * mp.fsum(w2 * d(x2) for x2, w2 in inner))
        return mp.fsum(acc_f), mp.fsum(acc_d)


def _dirac_part(act: dict, q: MPF, c: MPF) -> MPF:
    """E[phi'(u1) phi'(u2)] from phi' = J delta(x) at 0 (the step): J^2 p(0, 0).

    p(0, 0) = 1 / (2 pi q sqrt(1 - c^2)), the bivariate normal density at the origin;
    the cross terms vanish because the step's regular derivative is 0.
    """
    (j,) = act["jumps"]
    return j * j / (2 * mp.pi * q * mp.sqrt(1 - c * c))


def chaotic_fixed_point(act: dict, sw: MPF, sb: MPF, q: MPF) -> dict[str, Any]:
    """c* of C(c) = (sigma_w2 E[phi(u1) phi(u2)] + sigma_b2) / q* and C'(c*), by findroot."""
    coarse = ProductRule(degree=2, z_max=8)    # 6 nodes per panel: the starting value
    fine = ProductRule(degree=3, z_max=10)     # 12 nodes per panel: Newton's iterations
    finer = ProductRule(degree=4, z_max=11)    # 24 nodes per panel: the table value

    def cmap(rule: ProductRule, c: MPF) -> tuple[MPF, MPF]:
        e_f, e_d = rule.pair(act, q, c)
        if act["jumps"]:
            e_d = e_d + _dirac_part(act, q, c)
        # Poole et al. 2016, eq. (5); slope by Price's theorem: sigma_w2 q E[phi' phi'] / q*
        return (sw * e_f + sb) / q, sw * e_d

    with mp.workdps(15):
        lo, hi = mp.mpf(0), mp.mpf("0.999")
        if cmap(coarse, lo)[0] - lo <= 0 or cmap(coarse, hi)[0] - hi >= 0:
            raise RuntimeError("C(c) - c has no sign change on [0, 0.999]")
        start = mp.findroot(lambda c: cmap(coarse, c)[0] - c, (lo, hi), solver="anderson",
                            tol=mp.mpf("1e-20"), maxsteps=40, verify=False)
    memo: dict[MPF, tuple[MPF, MPF]] = {}

    def both(c: MPF) -> tuple[MPF, MPF]:
        if c not in memo:
            memo[c] = cmap(fine, c)
        return memo[c]

    c_12 = mp.findroot(lambda c: both(c)[0] - c, mp.mpf(start), solver="newton",
                       df=lambda c: both(c)[1] - 1, verify=False)
    # one Newton step on the finer rule: its error is quadratic in the rules' difference
    val, slope = cmap(finer, c_12)
    c_star = c_12 - (val - c_12) / (slope - 1)
    val12, slope12 = both(c_12)
    err = max(abs(c_star - c_12), abs(slope - slope12) / max(1, abs(slope)))
    if abs(val12 - c_12) > mp.mpf("1e-25") or err > mp.mpf("1e-17"):
        raise RuntimeError(f"c* not resolved: residual {mp.nstr(val12 - c_12, 3)}, "
                           f"rule difference {mp.nstr(err, 3)}")
    return {"c_star": c_star, "chi_c": slope, "xi_c": -1 / mp.log(slope), "quad_error_2d": err}


# ------------------------------------------------------------------------------------------
# the table
# ------------------------------------------------------------------------------------------
def _s(x: Any) -> Any:
    """30-digit string, "inf", or None."""
    if x is None:
        return None
    if mp.isinf(x):
        return "inf" if x > 0 else "-inf"
    return mp.nstr(mp.mpf(x), DIGITS) if x != 0 else "0"


def _point(label: str, act: dict, sw_text: str, sb_text: str, chaotic: bool) -> dict[str, Any]:
    sw, sb = mp.mpf(sw_text), mp.mpf(sb_text)
    q = variance_fixed_point(act, sw, sb)
    chi_q = variance_slope(act, q, sw)
    c1 = sw * derivative_second_moment(act, q)
    phase = "chaotic" if c1 > 1 else "ordered"
    out: dict[str, Any] = {"sigma_w2": sw_text, "sigma_b2": sb_text, "q_star": _s(q),
                           "chi_q": _s(chi_q), "chi_1": _s(c1), "phase": phase}
    if phase == "ordered":
        # Schoenholz et al. 2017, eq. (9) with c* = 1: xi_c = -1 / ln chi_1
        out.update(c_star="1", chi_c=_s(c1), xi_c=_s(-1 / mp.log(c1)))
    elif chaotic:
        res = chaotic_fixed_point(act, sw, sb, q)
        out.update({k: _s(v) for k, v in res.items()})
    else:
        out.update(c_star=None, chi_c=None, xi_c=None)
    return out


def _critical(act: dict) -> dict[str, Any]:
    """The edge-of-chaos point with q* = 1 (Poole et al. 2016; Schoenholz et al. 2017)."""
    d2 = derivative_second_moment(act, mp.mpf(1))
    if mp.isinf(d2) or d2 == 0:
        return {"sigma_w2": None, "sigma_b2": None, "chi_q": None, "valid": False}
    sw = 1 / d2
    sb = 1 - sw * second_moment(act, mp.mpf(1))
    valid = sb >= -mp.mpf("1e-28")
    if abs(sb) < mp.mpf("1e-28"):
        sb = mp.mpf(0)
    return {"sigma_w2": _s(sw), "sigma_b2": _s(sb) if valid else None,
            "sigma_b2_needed": _s(sb), "chi_q": _s(variance_slope(act, mp.mpf(1), sw)) if valid
            else None, "valid": bool(valid)}


def build_table(labels: list[str] | None = None, log: Any = sys.stderr) -> dict[str, Any]:
    """The whole table as a JSON-ready dict."""
    out: dict[str, Any] = {
        "description": "propcalc reference values computed with mpmath; see make_table.py",
        "command": "python tests/reference/make_table.py --out tests/reference/table.json",
        "mpmath_version": mp.__version__,
        "dps": mp.mp.dps,
        "activations": {},
    }
    for label in labels or list(ACTIVATIONS):
        t0 = time.time()
        act = ACTIVATIONS[label]
        base = act["name"] or label
        one = mp.mpf(1)
        m2 = second_moment(act, one)
        d2 = derivative_second_moment(act, one)
        entry: dict[str, Any] = {
            "name": base,
            "params": act["params"],
            "piecewise": bool(act["breakpoints"]),
            "second_moment_q1": _s(m2),
            "derivative_second_moment_q1": _s(d2),
            "points": [],
            "critical_q1": _critical(act),
        }
        for k, (sw, sb) in enumerate(POINTS.get(base, _DEFAULT_POINTS) if not act["params"]
                                     else _DEFAULT_POINTS):
            entry["points"].append(_point(label, act, sw, sb,
                                          chaotic=(k == 1 and label in CHAOTIC)))
        entry["moments"] = [
            {"q": qt, "second_moment": _s(second_moment(act, mp.mpf(qt))),
             "derivative_second_moment": _s(derivative_second_moment(act, mp.mpf(qt)))}
            for qt in MOMENT_Q]
        out["activations"][label] = entry
        print(f"{label}: {time.time() - t0:.1f} s", file=log, flush=True)
    out["worst_1d_error_estimate"] = _s(_WORST_1D[0])
    if labels is None:
        out["self_checks"] = {k: _s(v) for k, v in self_checks(out).items()}
    return out


def self_checks(table: dict[str, Any]) -> dict[str, MPF]:
    """Check the table's machinery on closed forms; return the differences found.

    * erf's chaotic point against Williams 1997: V(q) = sw (2/pi) arcsin(2q / (1 + 2q)) + sb,
      C(c) = (sw (2/pi) arcsin(2 q c / (1 + 2q)) + sb) / q* (roots by mpmath.findroot);
    * the step's chaotic point against Sheppard 1899: q* = sw / 2 + sb,
      C(c) = (sw (1/4 + arcsin(c) / (2 pi)) + sb) / q*, C'(c) = sw / (2 pi sqrt(1 - c^2) q*);
    * ReLU's fixed point q* = sb / (1 - sw / 2) and chi_1 = sw / 2 (He et al. 2015);
    * SELU's moments E[selu(z)] = 0, E[selu(z)^2] = 1 (Klambauer et al. 2017).
    """
    acts = table["activations"]
    out: dict[str, MPF] = {}
    # erf
    p = acts["erf"]["points"][1]
    sw, sb = mp.mpf(p["sigma_w2"]), mp.mpf(p["sigma_b2"])
    q = mp.findroot(lambda x: sw * 2 / mp.pi * mp.asin(2 * x / (1 + 2 * x)) + sb - x, mp.mpf(1))
    r = 2 * q / (1 + 2 * q)
    c = mp.findroot(lambda x: (sw * 2 / mp.pi * mp.asin(r * x) + sb) / q - x, mp.mpf("0.5"))
    slope = sw * 2 / mp.pi * r / mp.sqrt(1 - (r * c) ** 2) / q
    out["erf_chaotic_vs_williams"] = max(abs(q - mp.mpf(p["q_star"])), abs(c - mp.mpf(p["c_star"])),
                                         abs(slope - mp.mpf(p["chi_c"])))
    # step
    p = acts["step"]["points"][1]
    sw, sb = mp.mpf(p["sigma_w2"]), mp.mpf(p["sigma_b2"])
    q = sw / 2 + sb
    c = mp.findroot(lambda x: (sw * (mp.mpf(1) / 4 + mp.asin(x) / (2 * mp.pi)) + sb) / q - x,
                    mp.mpf("0.8"))
    slope = sw / (2 * mp.pi * mp.sqrt(1 - c * c) * q)
    out["step_chaotic_vs_sheppard"] = max(abs(q - mp.mpf(p["q_star"])),
                                          abs(c - mp.mpf(p["c_star"])),
                                          abs(slope - mp.mpf(p["chi_c"])))
    # relu
    worst = mp.mpf(0)
    for p in acts["relu"]["points"]:
        sw, sb = mp.mpf(p["sigma_w2"]), mp.mpf(p["sigma_b2"])
        worst = max(worst, abs(sb / (1 - sw / 2) - mp.mpf(p["q_star"])),
                    abs(sw / 2 - mp.mpf(p["chi_1"])))
    out["relu_vs_he"] = worst
    # selu
    selu = ACTIVATIONS["selu"]
    out["selu_vs_klambauer"] = max(abs(expect(selu["value"], mp.mpf(1), (0,))),
                                   abs(mp.mpf(acts["selu"]["second_moment_q1"]) - 1))
    for key, val in out.items():
        if val > mp.mpf("1e-20"):
            raise RuntimeError(f"self-check {key} failed: difference {mp.nstr(val, 3)}")
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default="tests/reference/table.json")
    parser.add_argument("--only", nargs="*", help="labels to compute (default: all)")
    args = parser.parse_args(argv)
    t0 = time.time()
    table = build_table(args.only)
    with open(args.out, "w", encoding="utf-8") as fh:
        json.dump(table, fh, indent=1, sort_keys=False)
        fh.write("\n")
    print(f"wrote {args.out} in {time.time() - t0:.0f} s", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
