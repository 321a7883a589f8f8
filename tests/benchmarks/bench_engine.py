"""Benchmark of propcalc's Gaussian quadrature against baselines measured side by side.

Run by hand from the repository root (not collected by pytest)::

    python tests/benchmarks/bench_engine.py            # full run, about 25 s
    python tests/benchmarks/bench_engine.py --quick    # fewer repeats, a few seconds less

What is measured, in the same process and the same run:

A. One point of the correlation map, C(c) = E[phi(u1) phi(u2)] / E[phi(u1)^2] at q = 1
   (sigma_w2 = 1, sigma_b2 = 0; Poole et al. 2016, eq. 5), for tanh, relu and gelu at
   c = 0.3, 0.9, 0.99, computed by
     * propcalc.correlation_map, one isolated call per point (Python overhead included),
       at a q seen before; for tanh also the first call at its q (below);
     * propcalc.correlation_map, per point of one vectorised call on 1003 points
       (c = linspace(-1, 1, 1000) with the three benchmark c appended, so the errors at
       those c come from that same call): the time of the call divided by 1003;
     * scipy.integrate.dblquad over the whole plane, epsabs = epsrel = 1e-12
       (and scipy.integrate.quad for the 1-D denominator);
     * numpy Monte Carlo with 1e6 seeded samples;
     * a plain tensor Gauss-Hermite rule without splitting at breakpoints, with as many
       phi evaluations as propcalc's isolated call and with 16 times as many.
   relu and gelu carry a closed-form Gaussian smoothing (propcalc.numerics.smoothing), so propcalc
   computes their pair expectation as a 1-D integral; tanh has none: it takes the Hermite
   series where the series' tail bound allows (all three c here), whose coefficients (1-D
   integrals) propcalc caches per (activation, q). So tanh's isolated call is timed twice:
   at a q seen before (a map iterated c_l -> c_(l+1) at q*) and with that cache emptied;
   every timed map call starts with it emptied. The evaluation counts are those of phi
   and phi' (counted by wrapping them in a twin activation that keeps the smoothing and the
   declared scale; a new twin has no cached coefficients, so tanh's count is that of a
   first call); the points at which the smoothing itself is evaluated (a few special
   functions each) are counted apart and not added in.
A2. A 1000-point correlation map (c = linspace(-1, 1, 1000), q = 1, sigma_w2 = 1,
   sigma_b2 = 0) for every built-in with its default parameters, with the route it takes.
B. A full ``propcalc.propagation`` call (q*, chi_1, c*, chi_c) against the same pipeline
   built on each baseline (Brent's method on V(q) - q and on C(c) - c, as propcalc does).
B2. Propagation across the built-ins: for each built-in the first critical sigma_w2 at
   sigma_b2 = 0.1 (propcalc.edge_of_chaos_at_bias), then propagation at 0.8, 1 and 1.25
   times it (ordered side, edge, chaotic side), plus the three points of B.
C. The targets, each judged on every row it concerns.

Every number of A and B is compared with an mpmath reference (24-digit arithmetic):
relu by the arc-cosine kernels of Cho & Saul 2009 (closed form); gelu by a 1-D mpmath.quad
whose inner Gaussian expectation is in closed form (E[X Phi(X)] for X ~ N(m, v)); tanh by a
composite Gauss-Legendre rule in mpmath (24 nodes per panel of width 2 on [-10, 10]^2, error
below 1e-20 for this analytic integrand); they take about 15 s of the run. Times are medians
of repeats; ratios are baseline time / propcalc time, so ">1" means propcalc is faster.
Nothing is asserted: the script prints the targets and whether each is met.
"""

from __future__ import annotations

import argparse
import contextlib
import gc
import math
import statistics
import sys
import time
from collections.abc import Callable, Iterator

import mpmath as mp
import numpy as np
from mpmath.calculus.quadrature import GaussLegendre
from scipy import integrate, optimize, special

import propcalc
from propcalc import Activation
from propcalc.meanfield import maps as pc_maps
from propcalc.numerics import hermite, quadrature
from propcalc.meanfield.edge import edge_of_chaos_line_arrays
from propcalc.numerics.smoothing import Smoothing

# ---------------------------------------------------------------------------------------------
# targets (from the project brief)
# ---------------------------------------------------------------------------------------------
TARGET_PROPAGATION_S = 5e-3       # one propagation call for a built-in
TARGET_MAP_1000_S = 20e-3         # a 1000-point correlation map
TARGET_SPEEDUP_VS_DBLQUAD = 1000  # per point, at equal or better error

MC_SAMPLES = 1_000_000
MC_SEED = 20240601
CS = (0.3, 0.9, 0.99)
PROPAGATION_POINTS = [  # (activation, sigma_w2, sigma_b2): a chaotic, an ordered, a chaotic point
    ("tanh", 2.5, 0.1),
    ("relu", 1.5, 0.2),
    ("gelu", 1.99, 0.2),
]
MAP_CS = np.linspace(-1.0, 1.0, 1000)  # the 1000-point correlation map
BUILTIN_SB2 = 0.1                      # sigma_b2 of the propagation points across the built-ins
BUILTIN_FACTORS = ((0.8, "0.8 x critical (ordered side)"), (1.0, "critical (edge)"),
                   (1.25, "1.25 x critical (chaotic side)"))
SQRT_2PI = math.sqrt(2.0 * math.pi)


# ---------------------------------------------------------------------------------------------
# the three activations in three arithmetics
# ---------------------------------------------------------------------------------------------
def _np_sech2(x):
    # sech(x)^2 = 4 e / (1 + e)^2 with e = exp(-2 |x|): no overflow of cosh at large |x|
    e = np.exp(-2.0 * np.abs(x))
    return 4.0 * e / (1.0 + e) ** 2


def _np_gelu(x):
    return x * special.ndtr(x)


def _np_gelu_d(x):
    return special.ndtr(x) + x * np.exp(-0.5 * x * x) / SQRT_2PI


def _py_gelu(x):
    return x * 0.5 * math.erfc(-x / math.sqrt(2.0))


def _py_gelu_d(x):
    return 0.5 * math.erfc(-x / math.sqrt(2.0)) + x * math.exp(-0.5 * x * x) / SQRT_2PI


NUMPY = {  # (phi, phi')
    "tanh": (np.tanh, _np_sech2),
    "relu": (lambda x: np.maximum(x, 0.0), lambda x: (x > 0).astype(float)),
    "gelu": (_np_gelu, _np_gelu_d),
}
SCALAR = {
    "tanh": (math.tanh, lambda x: 1.0 / math.cosh(x) ** 2 if abs(x) < 350 else 0.0),
    "relu": (lambda x: x if x > 0 else 0.0, lambda x: 1.0 if x > 0 else 0.0),
    "gelu": (_py_gelu, _py_gelu_d),
}


# ---------------------------------------------------------------------------------------------
# mpmath references
# ---------------------------------------------------------------------------------------------
REF_DPS = 24


def _mp_phi(name):
    if name == "tanh":
        return mp.tanh, lambda x: mp.sech(x) ** 2
    if name == "relu":
        return (lambda x: x if x > 0 else mp.mpf(0)), (lambda x: mp.mpf(1) if x > 0 else mp.mpf(0))
    return (lambda x: x * mp.ncdf(x)), (lambda x: mp.ncdf(x) + x * mp.npdf(x))


def mp_moment(name: str, q, which: int):
    """E[phi(sqrt(q) z)^2] (which=0) or E[phi'(sqrt(q) z)^2] (which=1) by mpmath.quad."""
    f = _mp_phi(name)[which]
    s = mp.sqrt(q)
    return mp.quad(lambda z: f(s * z) ** 2 * mp.npdf(z), [-mp.inf, 0, mp.inf])


_GL_CACHE: dict[int, list] = {}


def _gl_nodes():
    """Composite Gauss-Legendre in z on [-10, 10]: 10 panels x 24 nodes, weights times N(0,1)."""
    key = mp.mp.prec
    if key not in _GL_CACHE:
        base = GaussLegendre(mp.mp).calc_nodes(4, mp.mp.prec)  # 3 * 2^3 = 24 nodes on [-1, 1]
        pts = []
        for k in range(10):
            mid = mp.mpf(-9 + 2 * k)
            pts += [(mid + x, w * mp.npdf(mid + x)) for x, w in base]
        _GL_CACHE[key] = pts
    return _GL_CACHE[key]


def mp_pair(name: str, c, q, which: int = 0):
    """E[f(u1) f(u2)] with f = phi (which=0) or phi' (which=1), Var u = q, corr c."""
    c, q = mp.mpf(c), mp.mpf(q)
    s2 = 1 - c * c
    if name == "relu":
        # Cho & Saul 2009, arc-cosine kernels of degree 1 and 0, theta = arccos c
        th = mp.acos(c)
        if which == 0:
            return q / (2 * mp.pi) * (mp.sqrt(s2) + (mp.pi - th) * c)
        return (mp.pi - th) / (2 * mp.pi)
    if name == "gelu":
        # inner E[g(X)], X = u2 | z1 ~ N(m, v), m = sqrt(q) c z1, v = q (1 - c^2):
        # E[X Phi(X)] = m Phi(t) + v pdf(t) / sqrt(1 + v), t = m / sqrt(1 + v)   (Stein's lemma)
        # E[Phi(X) + X pdf(X)] = Phi(t) + pdf(t) m / (1 + v)^(3/2)
        v = q * s2
        r = mp.sqrt(1 + v)
        f = _mp_phi(name)[which]

        def inner(m):
            t = m / r
            if which == 0:
                return m * mp.ncdf(t) + v * mp.npdf(t) / r
            return mp.ncdf(t) + mp.npdf(t) * m / r**3

        sq = mp.sqrt(q)
        return mp.quad(lambda z: f(sq * z) * inner(sq * c * z) * mp.npdf(z), [-mp.inf, 0, mp.inf])
    # tanh: composite Gauss-Legendre in both variables
    f = _mp_phi(name)[which]
    sq, s = mp.sqrt(q), mp.sqrt(s2)
    nodes = _gl_nodes()
    total = mp.mpf(0)
    for z1, w1 in nodes:
        m = c * z1
        total += w1 * f(sq * z1) * mp.fsum(w2 * f(sq * (m + s * z2)) for z2, w2 in nodes)
    return total


def mp_correlation_point(name: str, c) -> float:
    with mp.workdps(REF_DPS):
        return float(mp_pair(name, c, 1) / mp_moment(name, 1, 0))


def mp_propagation(name: str, sw: float, sb: float, q_guess: float,
                   c_guess: tuple[float, float]):
    """(q*, chi_1, c*, chi_c) to 20 digits; Poole et al. 2016, Schoenholz et al. 2017."""
    with mp.workdps(REF_DPS):
        sw_, sb_ = mp.mpf(sw), mp.mpf(sb)
        if name == "relu":  # V(q) = sw q / 2 + sb, chi_1 = sw / 2 (closed forms); ordered here
            q = sb_ / (1 - sw_ / 2)
            chi1 = sw_ / 2
            return float(q), float(chi1), 1.0, float(chi1)
        q = mp.findroot(lambda t: sw_ * mp_moment(name, t, 0) + sb_ - t, mp.mpf(q_guess))
        chi1 = sw_ * mp_moment(name, q, 1)
        if chi1 <= 1:
            return float(q), float(chi1), 1.0, float(chi1)
        cstar = mp.findroot(lambda c: (sw_ * mp_pair(name, c, q) + sb_) / q - c,
                            tuple(mp.mpf(g) for g in c_guess), solver="secant")
        chic = sw_ * mp_pair(name, cstar, q, which=1)
        return float(q), float(chi1), float(cstar), float(chic)


# ---------------------------------------------------------------------------------------------
# baselines: each gives E1(f, q) = E[f(sqrt(q) z)] and E2(f, g, c, q) = E[f(u1) g(u2)]
# ---------------------------------------------------------------------------------------------
class Dblquad:
    label = "dblquad 1e-12"

    def e1(self, name, which, q):
        f = SCALAR[name][which]
        s = math.sqrt(q)

        def h(z):
            return f(s * z) ** 2 * math.exp(-0.5 * z * z) / SQRT_2PI

        return sum(integrate.quad(h, a, b, epsabs=1e-12, epsrel=1e-12, limit=200)[0]
                   for a, b in ((-np.inf, 0.0), (0.0, np.inf)))

    def e2(self, name, which, c, q):
        f = SCALAR[name][which]
        s, sq = math.sqrt(max(0.0, 1.0 - c * c)), math.sqrt(q)

        def h(z2, z1):
            return (f(sq * z1) * f(sq * (c * z1 + s * z2))
                    * math.exp(-0.5 * (z1 * z1 + z2 * z2)) / (2.0 * math.pi))

        return integrate.dblquad(h, -np.inf, np.inf, -np.inf, np.inf,
                                 epsabs=1e-12, epsrel=1e-12)[0]


class MonteCarlo:
    label = "Monte Carlo 1e6"

    def __init__(self):
        rng = np.random.default_rng(MC_SEED)
        self.z1, self.z2 = rng.standard_normal((2, MC_SAMPLES))

    def e1(self, name, which, q):
        f = NUMPY[name][which]
        return float(np.mean(f(math.sqrt(q) * self.z1) ** 2))

    def e2(self, name, which, c, q):
        f = NUMPY[name][which]
        s, sq = math.sqrt(max(0.0, 1.0 - c * c)), math.sqrt(q)
        return float(np.mean(f(sq * self.z1) * f(sq * (c * self.z1 + s * self.z2))))


class GaussHermite:
    """Tensor probabilists' Gauss-Hermite rule, n nodes per dimension, no splitting."""

    def __init__(self, n2: int, n1: int, tag: str):
        self.n2, self.n1 = n2, n1
        self.label = f"Gauss-Hermite {tag}"
        self.x2, self.w2 = self._rule(n2)
        self.x1, self.w1 = self._rule(n1)

    @staticmethod
    def _rule(n):
        # scipy's roots_hermitenorm stays accurate for large n (numpy's hermegauss overflows
        # beyond n ~ 700); weights normalised to the N(0, 1) density
        x, w = special.roots_hermitenorm(n)
        return x, w / SQRT_2PI

    def e1(self, name, which, q):
        f = NUMPY[name][which]
        return float(np.dot(self.w1, f(math.sqrt(q) * self.x1) ** 2))

    def e2(self, name, which, c, q):
        f = NUMPY[name][which]
        s, sq = math.sqrt(max(0.0, 1.0 - c * c)), math.sqrt(q)
        x, w = self.x2, self.w2
        inner = f(sq * (c * x[:, None] + s * x[None, :])) @ w
        return float(np.dot(w, f(sq * x) * inner))


# ---------------------------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------------------------
def median_time(fn: Callable[[], object], repeats: int, warm: bool = True
                ) -> tuple[float, object]:
    """Median wall time of ``repeats`` calls, after one untimed warm-up call if ``warm``
    (propcalc caches its quadrature nodes; cheap baselines get the same courtesy, the slow
    adaptive and sampling ones have no cache to warm). The garbage collector is paused
    during each timed call, as :mod:`timeit` does, for every method alike: this process
    holds many mpmath objects whose collection would otherwise land in random calls."""
    out = fn() if warm else None
    times = []
    for _ in range(repeats):
        with _no_gc():
            t0 = time.perf_counter()
            out = fn()
            times.append(time.perf_counter() - t0)
    return statistics.median(times), out


def fresh_series() -> None:
    """Forget the Hermite coefficients cached per (activation, q): a map at a new q pays for
    them, and only calls at a q seen before reuse them."""
    hermite.coefficients_at.cache_clear()


def first_at_q(fn: Callable[[], object], repeats: int) -> tuple[float, object]:
    """Median of ``repeats`` calls each made with the per-q series cache emptied (the node
    caches stay warm: they are per variance and grading level, not per activation)."""
    def call() -> object:
        fresh_series()
        return fn()
    return median_time(call, repeats)


@contextlib.contextmanager
def _no_gc() -> Iterator[None]:
    was = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was:
            gc.enable()


def counting(act: Activation) -> tuple[Activation, list[int]]:
    """A twin of ``act`` that counts evaluation points: ``box[0]`` of phi and phi',
    ``box[1]`` of the closed-form smoothing (its value and its slope).

    The twin keeps the smoothing and the declared scale, so propcalc takes the same route
    for it as for ``act`` (checked by the callers: the twin's results must be identical).
    """
    box = [0, 0]

    def wrap(fn):
        def inner(x):
            box[0] += int(np.size(x))
            return fn(x)
        return inner

    def wrap_smooth(fn):
        def inner(m, v):
            box[1] += int(np.broadcast(np.asarray(m), np.asarray(v)).size)
            return fn(m, v)
        return inner

    sm = act.smoothing
    twin_sm = (None if sm is None else
               Smoothing(value=wrap_smooth(sm.value), derivative=wrap_smooth(sm.derivative)))
    twin = Activation(name=act.name, value_fn=wrap(act.value_fn),
                      derivative_fn=wrap(act.derivative_fn), breakpoints=act.breakpoints,
                      params=act.params, declared_scale=act.declared_scale, smoothing=twin_sm)
    _ = twin.jumps, twin.kinks, twin.scale  # profile probes are not part of the integrals
    box[0] = box[1] = 0
    return twin, box


def rel_err(x: float | None, ref: float) -> float:
    if x is None or not math.isfinite(x):
        return math.inf
    return abs(x - ref) / abs(ref) if ref != 0 else abs(x)


def fmt_t(t: float) -> str:
    if not math.isfinite(t):
        return "failed"
    if t < 1e-3:
        return f"{t * 1e6:.3g} us"
    if t < 1.0:
        return f"{t * 1e3:.2f} ms"
    return f"{t:.2f} s"


def fmt_e(e: float) -> str:
    if e == 0.0:
        return "0"
    if not math.isfinite(e):
        return "failed"
    return f"{e:.1e}"


def fmt_r(r: float) -> str:
    """A time ratio: thousands separators from 100x up, 2-3 digits below."""
    if r >= 100:
        return f"{r:,.0f}x"
    return f"{r:.3g}x" if r >= 1 else f"{r:.2g}x"


def fmt_g(x: float | None) -> str:
    return "-" if x is None else f"{x:.6g}"


def table(rows: list[list[str]], header: list[str]) -> str:
    cells = [header] + rows
    widths = [max(len(r[i]) for r in cells) for i in range(len(header))]
    lines = ["  ".join(c.rjust(w) if i > 1 else c.ljust(w) for i, (c, w) in
                       enumerate(zip(r, widths))) for r in cells]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


# ---------------------------------------------------------------------------------------------
# A. correlation-map points
# ---------------------------------------------------------------------------------------------
def bench_points(repeats: int, slow_repeats: int, mc: MonteCarlo) -> dict:
    rows, speedups, oddities = [], [], []
    dbl = Dblquad()
    cs_map = np.concatenate([MAP_CS, CS])  # the benchmark c values ride along in the map
    n_map = cs_map.size
    for name in NUMPY:
        act = propcalc.activation(name)
        t_map, vals_map = first_at_q(
            lambda: propcalc.correlation_map(act, cs_map, 1.0, 0.0, 1.0), repeats)
        t_map_pt = t_map / n_map
        twin, box = counting(act)
        twin_map = propcalc.correlation_map(twin, cs_map, 1.0, 0.0, 1.0)
        map_evals, map_smooth = box[0] / n_map, box[1] / n_map
        if not np.array_equal(twin_map, vals_map):
            oddities.append(f"{name}: the counting twin's 1003-point map differs from propcalc's "
                            "(max |diff| = "
                            f"{float(np.max(np.abs(twin_map - vals_map))):.2e})")

        def smooth_note(k: float, smooth: bool = act.smoothing is not None) -> str:
            return f"{k:,.0f}" if smooth else "-"

        for i, c in enumerate(CS):
            ref = mp_correlation_point(name, c)
            t_pc, val = median_time(lambda: float(propcalc.correlation_map(act, c, 1.0, 0.0, 1.0)),
                                    repeats)
            twin, box = counting(act)
            v_twin = float(propcalc.correlation_map(twin, c, 1.0, 0.0, 1.0))
            n_eval, n_smooth = box
            if v_twin != val:
                oddities.append(f"{name} at c = {c:g}: the counting twin gives {v_twin!r}, "
                                f"propcalc {val!r}")
            e_pc = rel_err(val, ref)
            e_map = rel_err(float(vals_map[MAP_CS.size + i]), ref)
            rows.append([name, f"{c:g}", "propcalc, one isolated call", f"{n_eval:,}",
                         smooth_note(n_smooth), fmt_t(t_pc), fmt_e(e_pc), "1",
                         fmt_r(t_pc / t_map_pt)])
            t_cold = t_pc
            if act.smoothing is None:  # the series route: its coefficients cached per q
                t_cold, _ = first_at_q(
                    lambda: float(propcalc.correlation_map(act, c, 1.0, 0.0, 1.0)), repeats)
                rows.append(["", "", "propcalc, first isolated call at this q", "", "-",
                             fmt_t(t_cold), fmt_e(e_pc), fmt_r(t_cold / t_pc),
                             fmt_r(t_cold / t_map_pt)])
            rows.append(["", "", "propcalc, per point of a 1000-point map", f"{map_evals:,.0f}",
                         smooth_note(map_smooth), fmt_t(t_map_pt), fmt_e(e_map),
                         fmt_r(t_map_pt / t_pc), "1"])
            # dblquad: few repeats, it is slow
            t_dq, v_dq = median_time(lambda: dbl.e2(name, 0, c, 1.0) / dbl.e1(name, 0, 1.0),
                                     slow_repeats, warm=False)
            e_dq = rel_err(v_dq, ref)
            rows.append(["", "", dbl.label, "adaptive", "", fmt_t(t_dq), fmt_e(e_dq),
                         fmt_r(t_dq / t_pc), fmt_r(t_dq / t_map_pt)])
            speedups.append({"name": name, "c": c, "call": t_dq / t_pc, "map": t_dq / t_map_pt,
                             "cold": t_dq / t_cold, "e_call": e_pc, "e_map": e_map,
                             "e_cold": e_pc, "e_dq": e_dq})

            def mc_point():
                m = MonteCarlo.__new__(MonteCarlo)  # fresh seeded samples are part of the cost
                rng = np.random.default_rng(MC_SEED)
                m.z1, m.z2 = rng.standard_normal((2, MC_SAMPLES))
                return m.e2(name, 0, c, 1.0) / m.e1(name, 0, 1.0)

            t_mc, v_mc = median_time(mc_point, slow_repeats, warm=False)
            rows.append(["", "", mc.label, f"{2 * MC_SAMPLES:,}", "", fmt_t(t_mc),
                         fmt_e(rel_err(v_mc, ref)), fmt_r(t_mc / t_pc), fmt_r(t_mc / t_map_pt)])
            n_same = max(2, math.isqrt(max(n_eval, 4)))
            for n, tag in ((n_same, "same evals"), (4 * n_same, "16x evals")):
                gh = GaussHermite(n, n, f"n={n} ({tag})")
                t_gh, v_gh = median_time(lambda: gh.e2(name, 0, c, 1.0) / gh.e1(name, 0, 1.0),
                                         repeats)
                rows.append(["", "", gh.label, f"{n * n + 2 * n:,}", "", fmt_t(t_gh),
                             fmt_e(rel_err(v_gh, ref)), fmt_r(t_gh / t_pc),
                             fmt_r(t_gh / t_map_pt)])
    print("A. one point of the correlation map C(c) = E[phi(u1) phi(u2)] / E[phi^2], q = 1 "
          "(error: relative, against mpmath)\n")
    print(table(rows, ["activation", "c", "method", "evaluations", "smoothing evals",
                       "time/point", "error", "time / one call", "time / map point"]))
    print("\n   evaluations: points at which phi (or phi') is evaluated, per point; for the map "
          f"row, those of the whole {n_map}-point call / {n_map}.\n"
          "   smoothing evals: points (m, v) at which relu's and gelu's closed-form smoothing "
          "E[phi(m + sqrt(v) z)] (or its slope) is evaluated, a few special functions each; "
          "counted apart, not in 'evaluations' (tanh has no smoothing: '-').\n"
          "   Gauss-Hermite 'same evals' gets n^2 ~ the phi evaluations of the isolated call, "
          "without the smoothing's.\n"
          f"   map row: median of one vectorised correlation_map call on c = linspace(-1, 1, "
          f"1000) plus the three c above, after a warm-up (propcalc caches its quadrature "
          f"nodes), divided by {n_map}; its error is read from that same call.\n"
          "   time / one call, time / map point: this row's time over propcalc's isolated call, "
          "and over propcalc's time per point of the map.\n"
          "   tanh (no smoothing) takes the Hermite series where its tail bound allows, with the "
          "coefficients cached per (activation, q): 'one isolated call' is a call at a q seen "
          "before (iterating c_l layer by layer at q*), 'first isolated call at this q' pays "
          "for the coefficients; the map row pays for them in every timed call.")
    for line in oddities:
        print(f"   NOTE: {line}")
    return {"speedups": speedups}


# ---------------------------------------------------------------------------------------------
# A2. 1000-point maps for every built-in
# ---------------------------------------------------------------------------------------------
def bench_maps(repeats: int) -> dict[str, float]:
    rows, times = [], {}
    for name in propcalc.builtin_names():
        act = propcalc.activation(name)
        route = ("closed-form smoothing (1-D)" if act.smoothing is not None
                 else "Hermite series + 2-D near |c| = 1")
        t, out = first_at_q(lambda: propcalc.correlation_map(act, MAP_CS, 1.0, 0.0, 1.0),
                            repeats)
        out = np.asarray(out)
        times[name] = t
        finite = bool(np.all(np.isfinite(out)))
        # consistency: the pair expectation one point at a time (the 2-D rule where there is
        # no smoothing) at every 50th c and at c = 1, against the vectorised map
        idx = np.r_[0:MAP_CS.size:50, MAP_CS.size - 1]
        m2 = float(pc_maps.second_moment(act, 1.0))
        single = np.array([float(pc_maps.pair_expectation(act, np.array([MAP_CS[i]]), 1.0)[0])
                           for i in idx]) / m2
        rows.append([name, route, fmt_t(t), fmt_t(t / MAP_CS.size),
                     "yes" if finite else "NO", fmt_e(float(np.max(np.abs(single - out[idx]))))])
    print(f"\nA2. 1000-point correlation map (c = linspace(-1, 1, 1000), q = 1, sigma_w2 = 1, "
          f"sigma_b2 = 0, default parameters), one vectorised call; median of {repeats} after a "
          "warm-up (propcalc caches its quadrature nodes)\n")
    print(table(rows, ["activation", "route", "time", "time/point", "all finite",
                       "vs one-point calls"]))
    print(f"\n   vs one-point calls: max |C| difference between the map and {idx.size} one-point "
          "pair expectations (every 50th c and c = 1; without a smoothing those take the 2-D "
          "rule), a consistency check of the routes, not a reference; every timed map call "
          "starts with the per-q series coefficients forgotten")
    return times


# ---------------------------------------------------------------------------------------------
# B. full propagation reports
# ---------------------------------------------------------------------------------------------
def pipeline(method, name: str, sw: float, sb: float):
    """q*, chi_1, c*, chi_c by Brent's method on the baseline's expectations."""
    def gap_q(q):
        return sw * method.e1(name, 0, q) + sb - q

    try:
        q = optimize.brentq(gap_q, 1e-6, 1e4, xtol=1e-14, rtol=4e-15)
    except ValueError:
        return None, None, None, None
    chi1 = sw * method.e1(name, 1, q)
    if chi1 <= 1.0:
        return q, chi1, 1.0, chi1

    def gap_c(c):
        return (sw * method.e2(name, 0, c, q) + sb) / q - c

    try:
        cstar = optimize.brentq(gap_c, 0.0, 0.999, xtol=1e-14, rtol=4e-15)
    except ValueError:  # no sign change seen by this baseline
        return q, chi1, None, None
    return q, chi1, cstar, sw * method.e2(name, 1, cstar, q)


def bench_propagation(repeats: int, mc: MonteCarlo) -> None:
    rows, notes = [], []
    guesses = {"tanh": (1.0, (0.6, 0.7)), "gelu": (20.0, (0.985, 0.995)), "relu": (1.0, ())}
    for name, sw, sb in PROPAGATION_POINTS:
        act = propcalc.activation(name)
        ref = mp_propagation(name, sw, sb, *guesses[name])

        def pc_call():
            p = propcalc.propagation(act, sw, sb)
            return p.q_star, p.chi_1, p.c_star, p.chi_c

        t_pc, got = median_time(pc_call, repeats)
        phase = propcalc.propagation(act, sw, sb).phase

        # evaluations propcalc spends on one 1-D expectation and one correlation-map point
        twin, box = counting(act)
        propcalc.variance_map(twin, ref[0], sw, sb)
        n1 = box[0]
        box[0] = box[1] = 0
        propcalc.correlation_map(twin, min(ref[2], 0.9), sw, sb, ref[0])
        n_pair, n_smooth = box
        n2 = max(2, math.isqrt(max(n_pair, 4)))

        def add(label, t, vals, ratio):
            errs = [rel_err(v, r) for v, r in zip(vals, ref)]
            rows.append([name if label == "propcalc" else "",
                         f"{sw:g}, {sb:g}" if label == "propcalc" else "",
                         label, fmt_t(t)] + [fmt_e(e) for e in errs] + [fmt_e(max(errs)), ratio])

        add("propcalc", t_pc, got, "1")
        methods = [(Dblquad(), 1, False), (mc, 1, False),
                   (GaussHermite(n2, n1, f"n={n2}/{n1} (same)"), repeats, True),
                   (GaussHermite(4 * n2, 4 * n1, f"n={4 * n2}/{4 * n1} (16x/4x)"), repeats, True)]
        for method, rep, warm in methods:
            t, vals = median_time(lambda: pipeline(method, name, sw, sb), rep, warm)
            add(method.label, t, vals, fmt_r(t / t_pc))
        how = ("a 1-D integral with the closed-form smoothing, "
               f"{n_pair} phi evaluations plus {n_smooth} smoothing evaluations"
               if act.smoothing is not None else f"the 2-D rule, {n_pair} phi evaluations")
        notes.append(f"   {name} at sigma_w2 = {sw:g}, sigma_b2 = {sb:g}: {phase}; mpmath "
                     f"q* = {ref[0]:.15g}, chi_1 = {ref[1]:.15g}, c* = {ref[2]:.15g}, "
                     f"chi_c = {ref[3]:.15g}; propcalc used {n1} evaluations per 1-D "
                     f"expectation and, per correlation-map point, {how} "
                     f"(Gauss-Hermite 'same': n = {n2}, n^2 ~ the phi evaluations)")
    print("\nB. full propagation report: q*, chi_1, c*, chi_c (relative errors against mpmath); "
          "baselines run the same Brent pipeline on their own expectations\n")
    print(table(rows, ["activation", "sw2, sb2", "method", "time", "q*", "chi_1", "c*",
                       "chi_c", "max error", "time / propcalc"]))
    print("\n" + "\n".join(notes))


# ---------------------------------------------------------------------------------------------
# B2. propagation across the built-ins
# ---------------------------------------------------------------------------------------------
def no_edge_reason(act: Activation, sb: float) -> str:
    """Why edge_of_chaos_at_bias found no critical point at this sigma_b2."""
    if act.has_jumps:
        return "phi jumps, so chi_1 is infinite: no edge of chaos at any sigma_b2"
    q = np.geomspace(1e-8, 1e6, 281)  # the q* range edge_of_chaos_at_bias scans
    sw_line, sb_line = edge_of_chaos_line_arrays(act, q)
    ok = np.isfinite(sw_line)
    if not ok.any():
        return "E[phi'^2] is 0 or infinite at every q*: no critical sigma_w2"
    if np.all(np.abs(sb_line[ok]) <= 1e-10 * q[ok]):
        return ("the edge-of-chaos line has sigma_b2 = 0 at every q* (positively homogeneous "
                f"phi), so there is no critical point at sigma_b2 = {sb:g}")
    lo, hi = float(np.min(sb_line[ok])), float(np.max(sb_line[ok]))
    return (f"on the edge-of-chaos line sigma_b2 runs from {lo:.3g} to {hi:.3g} over q* in "
            f"[1e-8, 1e6], never {sb:g}")


def time_propagation(act: Activation, name: str, sw: float, sb: float, where: str,
                     repeats: int) -> dict:
    """Median after a warm-up, and the first call with the per-q node cache emptied.

    The first call is what a caller asking about a new point waits for: the
    quadrature nodes at its variances are built then (propcalc caches them per q;
    the q-independent Legendre rules and Hermite tables stay cached, as in use).
    """
    try:
        quadrature._scalar_nodes.cache_clear()
        fresh_series()
        with _no_gc():
            t0 = time.perf_counter()
            propcalc.propagation(act, sw, sb)
            first = time.perf_counter() - t0
        t, p = median_time(lambda: propcalc.propagation(act, sw, sb), repeats)
    except propcalc.PropcalcError as exc:
        return {"name": name, "where": where, "sw": sw, "sb": sb, "phase": f"error: {exc}",
                "q": None, "c": None, "t": math.inf, "first": math.inf}
    return {"name": name, "where": where, "sw": sw, "sb": sb, "phase": p.phase,
            "q": p.q_star, "c": p.c_star, "t": t, "first": first}


def bench_propagation_builtins(repeats: int) -> list[dict]:
    results, notes = [], []
    for name in propcalc.builtin_names():
        act = propcalc.activation(name)
        points = propcalc.edge_of_chaos_at_bias(act, BUILTIN_SB2)
        if not points:
            notes.append(f"   {name}: skipped, {no_edge_reason(act, BUILTIN_SB2)}")
            continue
        cp = points[0]
        notes.append(f"   {name}: critical sigma_w2 = {cp.sigma_w2:.6g} with q* = {cp.q_star:.6g}"
                     f" ({'attracting' if cp.stable else 'not attracting'}, chi_q = "
                     f"{fmt_g(cp.chi_q)}); first of {len(points)} critical point(s)")
        for factor, where in BUILTIN_FACTORS:
            results.append(time_propagation(act, name, factor * cp.sigma_w2, BUILTIN_SB2, where,
                                            repeats))
    for name, sw, sb in PROPAGATION_POINTS:
        results.append(time_propagation(propcalc.activation(name), name, sw, sb,
                                        "point of section B", repeats))
    rows = [[r["name"], r["where"], f"{r['sw']:.6g}, {r['sb']:g}", r["phase"], fmt_g(r["q"]),
             fmt_g(r["c"]), fmt_t(r["t"]), fmt_t(r["first"])] for r in results]
    print(f"\nB2. propagation across the built-ins: critical sigma_w2 at sigma_b2 = "
          f"{BUILTIN_SB2:g} from edge_of_chaos_at_bias (first point), propagation at 0.8, 1 and "
          f"1.25 times it, plus the points of B; 'time': median of {repeats} after a warm-up; "
          "'first call': one call with the per-q node cache emptied\n")
    print(table(rows, ["activation", "point", "sw2, sb2", "phase", "q*", "c*", "time",
                       "first call"]))
    print("\n" + "\n".join(notes))
    print("   A row reading 'unbounded variance' has a first-layer variance sigma_w2 + sigma_b2 "
          "(q_input = 1) above every attracting fixed point the engine found, so the variance "
          "grows from there (see the critical points' stability above).")
    slowest = sorted(results, key=lambda r: r["t"], reverse=True)[:5]
    print("\n   slowest rows: " + "; ".join(
        f"{r['name']} {r['where']} {fmt_t(r['t'])} ({r['phase']})" for r in slowest))
    return results


# ---------------------------------------------------------------------------------------------
# C. targets
# ---------------------------------------------------------------------------------------------
def speedup_verdict(speedups: list[dict], key: str, tag: str, what: str) -> None:
    # "equal or better": propcalc's error <= dblquad's, errors below 1e-14 counting as equal
    # (both at the rounding level of a double-precision sum of ~1e4-1e5 terms)
    err = "e_" + key
    ok = [s for s in speedups if s[err] <= max(s["e_dq"], 1e-14)]
    ratios = [s[key] for s in speedups]
    lo = min(ratios)
    slow = [s for s in speedups if s[key] < TARGET_SPEEDUP_VS_DBLQUAD]
    worse = [s for s in speedups if s not in ok]
    met = lo >= TARGET_SPEEDUP_VS_DBLQUAD and not worse
    print(f"   ({tag}) {what}: speed-up {lo:,.0f}x to "
          f"{max(ratios):,.0f}x, >= {TARGET_SPEEDUP_VS_DBLQUAD}x at "
          f"{len(ratios) - len(slow)}/{len(ratios)} points; error equal or better "
          f"(<= dblquad's, or both < 1e-14) at {len(ok)}/{len(ratios)} points -> "
          f"{'MET' if met else 'NOT MET'}")
    if slow:
        print("       below the speed-up: " + ", ".join(
            f"{s['name']} c = {s['c']:g} {fmt_r(s[key])}" for s in slow))
    if worse:
        print("       error worse than dblquad's: " + ", ".join(
            f"{s['name']} c = {s['c']:g} ({fmt_e(s[err])} vs {fmt_e(s['e_dq'])})" for s in worse))


def print_targets(a: dict, maps: dict[str, float], props: list[dict]) -> None:
    print("\nC. targets (each first as set, then stricter views that are reported, not judged "
          "as the target: a first call, an isolated call)")
    for key, what in (("t", f"propagation for a built-in < {fmt_t(TARGET_PROPAGATION_S)}, over "
                            f"all {len(props)} rows of B2 (median)"),
                      ("first", "   stricter view: the first call at each point (node cache "
                                "emptied; a table built once per process lands in one row)")):
        worst = max(props, key=lambda r: r[key])
        over = [r for r in props if not r[key] < TARGET_PROPAGATION_S]
        print(f"   {what}: slowest {fmt_t(worst[key])} ({worst['name']}, {worst['where']}); "
              f"{len(props) - len(over)}/{len(props)} rows under -> "
              f"{'MET' if not over else 'NOT MET'}")
        if over:
            print("       above: " + "; ".join(
                f"{r['name']} at sigma_w2 = {r['sw']:.6g}, sigma_b2 = {r['sb']:g} ({r['where']}, "
                f"{r['phase']}) {fmt_t(r[key])}" for r in over))
    worst_map = max(maps, key=maps.get)
    over_map = [n for n, t in maps.items() if not t < TARGET_MAP_1000_S]
    print(f"   1000-point correlation map < {fmt_t(TARGET_MAP_1000_S)}, over all {len(maps)} "
          f"built-ins of A2: slowest {fmt_t(maps[worst_map])} ({worst_map}); "
          f"{len(maps) - len(over_map)}/{len(maps)} under -> "
          f"{'MET' if not over_map else 'NOT MET'}")
    if over_map:
        print("       above: " + ", ".join(f"{n} {fmt_t(maps[n])}" for n in over_map))
    print(f"   >= {TARGET_SPEEDUP_VS_DBLQUAD}x faster than dblquad per correlation-map point at "
          "equal or better error (section A, 9 points):")
    speedup_verdict(a["speedups"], "map", "a", "per point of a vectorised 1000-point map (the target)")
    speedup_verdict(a["speedups"], "call", "b",
                    "stricter view: one isolated call per point (at a q seen before)")
    speedup_verdict(a["speedups"], "cold", "c", "stricter view: the first isolated call at its q")


# ---------------------------------------------------------------------------------------------
def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true",
                    help="fewer repeats (3; slow baselines and the maps of A2: 1)")
    args = ap.parse_args(argv)
    repeats, slow = (3, 1) if args.quick else (7, 3)
    map_repeats = 1 if args.quick else repeats
    t0 = time.perf_counter()
    print(f"propcalc {propcalc.__version__}, numpy {np.__version__}, "
          f"python {sys.version.split()[0]}; medians of {repeats} repeats after a warm-up "
          f"(per point: dblquad and Monte Carlo {slow}, no warm-up; A2 maps {map_repeats} after "
          "a warm-up; baseline propagation pipelines: dblquad and Monte Carlo 1 run)\n")
    mc = MonteCarlo()
    a = bench_points(repeats, slow, mc)
    maps = bench_maps(map_repeats)
    bench_propagation(repeats, mc)
    props = bench_propagation_builtins(repeats)
    print_targets(a, maps, props)
    print(f"\ntotal run time {time.perf_counter() - t0:.0f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
