"""Root finding for the whole engine: bracket scans on grids, Brent polishing, elementwise solves.

Every root propcalc reports (variance fixed points, points of the edge-of-chaos
line, self-normalising fixed points, spectral targets...) is found here, in
three steps that each caller combines:

1. **Scan**: the function is tabulated on a grid (one row per problem) and
   brackets are read off where two neighbouring values are clearly signed and
   differ in sign (:func:`grid_brackets`). A root sitting on a grid point,
   where the value is within rounding of 0, is bracketed by its neighbours
   (:func:`grid_zeros`). Two roots closer together than the grid step leave no
   sign change, only a local extremum of one sign (:func:`grid_dips`); the
   extremum is then located (:func:`find_extrema`) and, if it crosses zero,
   gives a bracket on each side (the "hidden pair").
2. **Polish**: every bracket is solved to ``ROOT_RTOL`` relative. Elementwise
   over arrays of brackets by Chandrupatla's method (Chandrupatla 1997), written
   here step for step as :func:`scipy.optimize.elementwise.find_root` (scipy
   1.17) computes it, so the roots are its roots to the last bit, without its
   general machinery (array namespaces, result objects), which cost about half of
   a polish (64 x 64 tanh sweep: 68 -> 48 ms); a handful of brackets by
   :func:`scipy.optimize.brentq` one at a time, which is faster there:
   measured on this project's variance map (tanh, one bracket), brentq takes
   0.33 ms and scipy's elementwise solver 3.2 ms, of which about 1.2 ms is its
   fixed cost per call, so below :data:`SCALAR_LIMIT` brackets the loop wins.
   Both stop at the same relative width, so the answers agree to it.
3. Callers decide what the roots mean (stability, which one the flow reaches).

Conventions: an elementwise function is called as ``fun(x, *args)`` where
``x`` and every array of ``args`` have one entry per problem, and returns an
array of the same shape (it must not mix entries); a scalar function takes
and returns a float.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
from scipy import optimize

__all__ = [
    "ROOT_RTOL",
    "SCALAR_LIMIT",
    "brent",
    "find_extrema",
    "find_roots",
    "grid_brackets",
    "grid_dips",
    "grid_zeros",
    "hidden_pair",
    "roots_on_grid",
]

Array = np.ndarray
ScalarFn = Callable[[float], float]

#: Relative width at which a bracketed root counts as found: about 18 ulps, the rounding
#: floor of a quadrature-computed map (its last digits are noise, so a tighter width only
#: moves the root within that noise).
ROOT_RTOL = 4e-15
#: Up to this many brackets are polished one by one by brentq (see the module notes).
SCALAR_LIMIT = 8
#: How far below the neighbouring values a grid extremum must reach to count as a dip
#: (relative to the grid value and the function's size: rounding noise is no dip).
DIP_FLOOR = 1e-12


def brent(fun: ScalarFn, a: float, b: float, fa: float | None = None, fb: float | None = None,
          *, rtol: float = ROOT_RTOL) -> float:
    """The root of a scalar function in [a, b] by Brent's method (scipy's brentq).

    ``fa`` and ``fb`` are the values at the ends when the caller has them. An
    end where the function is exactly 0 is returned as is; ends of the same
    sign (the bracket was read off rounded values) give the end with the
    smaller ``|f|``.
    """
    fa = fun(a) if fa is None else fa
    fb = fun(b) if fb is None else fb
    if fa == 0.0:
        return float(a)
    if fb == 0.0:
        return float(b)
    if fa * fb > 0.0 or not (math.isfinite(fa) and math.isfinite(fb)):
        return float(a) if abs(fa) < abs(fb) else float(b)
    return float(optimize.brentq(fun, a, b, xtol=1e-300, rtol=rtol, maxiter=200))


def find_roots(fun: Callable[..., Array], a: Array, b: Array, args: Sequence[Array] = (), *,
               fa: Array | None = None, fb: Array | None = None,
               rtol: float = ROOT_RTOL) -> Array:
    """Elementwise roots of ``fun(x, *args)`` in the brackets ``[a[i], b[i]]``.

    Parameters
    ----------
    fun : callable
        Elementwise: ``fun(x, *args)[i]`` depends only on ``x[i]`` and ``args[k][i]``.
    a, b : ndarray
        Bracket ends (``a < b``), 1-D, one per problem.
    args : sequence of ndarray
        Per-problem parameters, each of the shape of ``a``.
    fa, fb : ndarray, optional
        The values at the ends, when known; ends of the same sign give the end
        with the smaller value, ends at 0 themselves.
    rtol : float
        Relative width of the final bracket.

    Returns
    -------
    ndarray
        The roots, one per bracket.
    """
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    n = a.size
    if n == 0:
        return np.zeros(0)
    args = tuple(np.asarray(x, dtype=float) for x in args)
    if n <= SCALAR_LIMIT and (fa is None or fb is None):
        out = np.empty(n)
        for i in range(n):
            row = tuple(x[i] for x in args)

            def scalar(t: float, row: tuple[Any, ...] = row) -> float:
                return float(fun(np.float64(t), *row))

            out[i] = brent(scalar, float(a[i]), float(b[i]), rtol=rtol)
        return out
    if fa is None or fb is None:
        fa = np.asarray(fun(a, *args), dtype=float)
        fb = np.asarray(fun(b, *args), dtype=float)
    out = np.where(np.abs(fa) <= np.abs(fb), a, b)  # unusable brackets: the better end
    good = (fa * fb < 0.0) & np.isfinite(fa) & np.isfinite(fb)
    out[fa == 0.0] = a[fa == 0.0]
    out[(fb == 0.0) & (fa != 0.0)] = b[(fb == 0.0) & (fa != 0.0)]
    idx = np.flatnonzero(good)
    if idx.size == 0:
        return out
    if idx.size <= SCALAR_LIMIT:
        for i in idx:
            row = tuple(x[i] for x in args)

            def scalar(t: float, row: tuple[Any, ...] = row) -> float:
                return float(fun(np.float64(t), *row))

            out[i] = brent(scalar, float(a[i]), float(b[i]), float(fa[i]), float(fb[i]),
                           rtol=rtol)
        return out
    sub = tuple(x[idx] for x in args)
    out[idx] = _chandrupatla(fun, a[idx], b[idx], sub, rtol, 4 * np.finfo(float).tiny)
    return out


def _chandrupatla(fun: Callable[..., Array], a: Array, b: Array, args: tuple[Array, ...],
                  xrtol: float, xatol: float) -> Array:
    """Chandrupatla's bracketing method elementwise (Chandrupatla 1997, Adv. Eng. Softw. 28).

    The iteration, the stopping rules (``|x2 - x1| < |x_min| xrtol + xatol`` or
    ``f(x_min) = 0``) and the order of every operation are those of
    :func:`scipy.optimize.elementwise.find_root` (scipy 1.17, ``fatol = frtol = 0``),
    so the roots are the same to the last bit; only its general machinery (array
    namespaces, result objects, callbacks) is left out, which was about half the cost of
    a polish. Converged problems leave the active set after each step, as there: ``fun``
    sees the same arrays. A bracket whose ends have one sign gives NaN.
    """
    x1, x2 = a.astype(float, copy=True), b.astype(float, copy=True)
    f1 = np.array(fun(x1, *args), dtype=float)
    f2 = np.array(fun(x2, *args), dtype=float)
    frtol = 0.0 * np.minimum(np.abs(f1), np.abs(f2))
    out = np.zeros(x1.size)
    active = np.arange(x1.size)
    x3 = f3 = t = None
    max_steps = math.log2(np.finfo(float).max) - math.log2(np.finfo(float).tiny)
    steps = 0
    while True:
        # the termination check (scipy's check_termination)
        i = np.abs(f1) < np.abs(f2)
        xmin = np.where(i, x1, x2)
        fmin = np.where(i, f1, f2)
        stop = np.abs(fmin) <= 0.0 + frtol
        bad = (np.sign(f1) == np.sign(f2)) & ~stop
        bad |= (~(np.isfinite(x1) & np.isfinite(x2)) | (np.isnan(f1) & np.isnan(f2))) & ~stop
        xmin[bad] = np.nan
        stop |= bad
        dx = np.abs(x2 - x1)
        tol = np.abs(xmin) * xrtol + xatol
        stop |= dx < tol
        if stop.any():
            out[active[stop]] = xmin[stop]
            keep = ~stop
            active = active[keep]
            x1, f1, x2, f2, frtol, dx, tol = (v[keep] for v in (x1, f1, x2, f2, frtol, dx, tol))
            if x3 is not None:
                x3, f3 = x3[keep], f3[keep]
            args = tuple(v[keep] for v in args)
        if active.size == 0:
            return out
        if steps >= max_steps:
            out[active] = xmin[~stop] if stop.any() else xmin
            return out
        if x3 is not None:
            # the next point: inverse quadratic interpolation where it is safe, else bisection
            xi1 = (x1 - x2) / (x3 - x2)
            with np.errstate(divide="ignore", invalid="ignore"):
                phi1 = (f1 - f2) / (f3 - f2)
            alpha = (x3 - x1) / (x2 - x1)
            j = ((1 - np.sqrt(1 - xi1)) < phi1) & (phi1 < np.sqrt(xi1))
            f1j, f2j, f3j, alphaj = f1[j], f2[j], f3[j], alpha[j]
            t = np.full_like(alpha, 0.5)
            t[j] = (f1j / (f1j - f2j) * f3j / (f3j - f2j)
                    - alphaj * f1j / (f3j - f1j) * f2j / (f2j - f3j))
            tl = 0.5 * tol / dx
            lo, hi = tl, 1 - tl
            t = np.where((t < lo) | np.isnan(lo), lo, t)
            t = np.where((t > hi) | np.isnan(hi), hi, t)
        x = x1 + (0.5 if t is None else t) * (x2 - x1)
        f = np.asarray(fun(x, *args), dtype=float)
        x3, f3 = x2.copy(), f2.copy()
        j = np.sign(f) == np.sign(f1)
        nj = ~j
        x3[j], f3[j] = x1[j], f1[j]
        x2[nj], f2[nj] = x1[nj], f1[nj]
        x1, f1 = x, f
        steps += 1


def grid_brackets(values: Array, usable: Array | None = None) -> tuple[Array, Array]:
    """Sign changes between neighbouring usable grid values.

    Parameters
    ----------
    values : ndarray
        Shape ``(n_problems, n_grid)`` (or 1-D for one problem).
    usable : ndarray of bool, optional
        Values clear of rounding (a sign that can be trusted); default all.

    Returns
    -------
    rows, cols : ndarray of int
        Bracket k is ``[grid[cols[k]], grid[cols[k] + 1]]`` of problem ``rows[k]``.
    """
    v = np.atleast_2d(values)
    ok = np.ones(v.shape, dtype=bool) if usable is None else np.atleast_2d(usable)
    change = ok[:, :-1] & ok[:, 1:] & (np.sign(v[:, :-1]) * np.sign(v[:, 1:]) < 0)
    rows, cols = np.nonzero(change)
    return rows, cols


def grid_zeros(values: Array, usable: Array) -> tuple[Array, Array]:
    """Single unusable grid points (a value within rounding of 0) between neighbours of opposite sign.

    Returns ``(rows, cols)``: the root is bracketed by ``grid[cols - 1]`` and
    ``grid[cols + 1]``.
    """
    v = np.atleast_2d(values)
    ok = np.atleast_2d(usable)
    hit = (~ok[:, 1:-1] & ok[:, :-2] & ok[:, 2:] & (v[:, :-2] * v[:, 2:] < 0))
    rows, cols = np.nonzero(hit)
    return rows, cols + 1


def grid_dips(grid: Array, values: Array, usable: Array | None = None) -> tuple[Array, Array, Array]:
    """Grid points where a one-signed function has a local extremum towards zero.

    A positive local minimum (or a negative local maximum) that lies clearly
    below (above) both neighbours, by more than ``DIP_FLOOR (x + |value|)``,
    may hide two roots between its neighbours. Returns ``(rows, cols, side)``
    with ``side = +1`` for a minimum of a positive function and ``-1`` for a
    maximum of a negative one.
    """
    v = np.atleast_2d(values)
    x = np.broadcast_to(np.atleast_2d(grid), v.shape)
    if v.shape[1] < 3:
        empty = np.zeros(0, dtype=int)
        return empty, empty, np.zeros(0)
    left, mid, right = v[:, :-2], v[:, 1:-1], v[:, 2:]
    # candidates first (strict extrema of one sign), the margin only where there are some
    low = (left > 0) & (mid > 0) & (right > 0) & (mid < left) & (mid < right)
    high = (left < 0) & (mid < 0) & (right < 0) & (mid > left) & (mid > right)
    found = low | high
    if usable is not None:
        ok = np.atleast_2d(usable)
        found &= ok[:, :-2] & ok[:, 1:-1] & ok[:, 2:]
    rows, cols = np.nonzero(found)
    lo, m, hi = left[rows, cols], mid[rows, cols], right[rows, cols]
    dip = DIP_FLOOR * (x[rows, cols + 1] + np.abs(m))
    is_low = low[rows, cols]
    clear = np.where(is_low, (m < lo - dip) & (m < hi - dip), (m > lo + dip) & (m > hi + dip))
    rows, cols = rows[clear], cols[clear]
    side = np.where(is_low[clear], 1.0, -1.0)
    return rows, cols + 1, side


def find_extrema(fun: ScalarFn, lo: float, hi: float, side: float, *, coarse_value: float,
                 xatol: float = 1e-12) -> tuple[float, float] | None:
    """The extremum of a scalar ``fun`` towards zero on [lo, hi] (log scale), or None.

    ``side * fun`` is minimised over ``t = ln x`` in ``[ln lo, ln hi]``, first
    coarsely (``xatol = 1e-3`` in t, about half the evaluations): if that
    minimum stays above 1% of ``side * coarse_value`` (the grid value: the
    function is smooth on this scale) there is no root and None is returned;
    otherwise the minimum is refined to ``xatol`` and ``(x, fun(x))`` returned.
    """
    t_lo, t_hi = math.log(lo), math.log(hi)

    def objective(t: float) -> float:
        return side * fun(math.exp(t))

    coarse = optimize.minimize_scalar(objective, bounds=(t_lo, t_hi), method="bounded",
                                      options={"xatol": 1e-3})
    if float(coarse.fun) > 0.01 * side * coarse_value:
        return None
    res = optimize.minimize_scalar(objective, bounds=(t_lo, t_hi), method="bounded",
                                   options={"xatol": xatol})
    return math.exp(float(res.x)), side * float(res.fun)


def hidden_pair(fun: ScalarFn, lo: float, hi: float, side: float, coarse_value: float,
                tangent_tol: float = 1e-13) -> list[float]:
    """The roots around a grid dip (see :func:`grid_dips`): none, one double root, or two.

    A tangential extremum (within ``tangent_tol x`` of zero) is one double root;
    an extremum across zero gives a root on each side by Brent's method.
    """
    found = find_extrema(fun, lo, hi, side, coarse_value=coarse_value)
    if found is None:
        return []
    x_min, f_min = found
    if side * f_min > tangent_tol * x_min:
        return []  # the extremum stays clear of zero: no root here
    if abs(f_min) <= tangent_tol * x_min:
        return [x_min]  # tangential: a double root
    roots = []
    for a, b in ((lo, x_min), (x_min, hi)):
        fa, fb = fun(a), fun(b)
        if fa * fb < 0:
            roots.append(brent(fun, a, b, fa, fb))
    return roots


def roots_on_grid(fun: ScalarFn, grid: Array, values: Array | None = None,
                  usable: Array | None = None, *, hidden_pairs: bool = True) -> list[float]:
    """Every root of a scalar function found from its values on a grid, ascending.

    Sign changes between usable neighbours are polished by Brent's method (the
    ends re-evaluated by ``fun``: a vectorised table can differ from the scalar
    function by an ulp); a usable value that is exactly 0 is a root; an
    unusable single point between neighbours of opposite sign is bracketed by
    them; with ``hidden_pairs`` the dips of :func:`grid_dips` are searched for
    two close roots. ``grid`` must be positive when ``hidden_pairs`` is on (the
    dips are searched in log scale).
    """
    grid = np.asarray(grid, dtype=float)
    values = np.array([fun(float(x)) for x in grid]) if values is None else np.asarray(values)
    ok = np.ones(grid.shape, dtype=bool) if usable is None else np.asarray(usable, dtype=bool)
    roots: list[float] = [float(x) for x, v, u in zip(grid, values, ok) if u and v == 0.0]
    for _, i in zip(*grid_brackets(values, ok)):
        roots.append(brent(fun, float(grid[i]), float(grid[i + 1])))
    if hidden_pairs:
        for _, i, side in zip(*grid_dips(grid, values, ok)):
            roots += hidden_pair(fun, float(grid[i - 1]), float(grid[i + 1]), float(side),
                                 float(values[i]))
    for _, i in zip(*grid_zeros(values, ok)):
        a, b = float(grid[i - 1]), float(grid[i + 1])
        fa, fb = fun(a), fun(b)
        roots.append(brent(fun, a, b, fa, fb) if fa * fb < 0 else float(grid[i]))
    return sorted(roots)
