"""propcalc against the mpmath reference table tests/reference/table.json.

The table was computed once, at 30 significant digits, by tests/reference/make_table.py
(the command is in its docstring; it takes minutes and is never run by pytest), from
activations written again in mpmath and fresh mpmath quadratures (tanh-sinh in 1-D, a
product Gauss-Legendre rule in 2-D, findroot for the fixed points).

Tolerances (DESIGN.md, "Accuracy targets"): 1e-12 relative for smooth activations, 1e-10
for piecewise ones. Two condition numbers are applied on top, because no method can beat
them when the maps are computed to the target accuracy:

* a fixed point q* of V moves by dV / (1 - chi_q) when V moves by dV, so quantities at a
  fixed point get the tolerance times ``max(1, 1 / |1 - chi_q|)`` (222 at gelu's chaotic
  point, chi_q = 0.9955; at most 4 elsewhere);
* xi_c = -1 / ln chi_c moves by xi_c * (d chi_c / chi_c) / |ln chi_c| = xi_c^2 d chi_c / chi_c,
  so xi_c gets the tolerance times ``max(1, xi_c)``.

Values that are 0 in the table (sigma_b2 of the rectifiers, V'(q) of the step) are compared
with an absolute tolerance of the same size on the scale 1 of q* = 1.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest

import propcalc
from propcalc.meanfield import maps

TABLE_PATH = Path(__file__).parent / "reference" / "table.json"
TABLE = json.loads(TABLE_PATH.read_text(encoding="utf-8"))
ENTRIES = TABLE["activations"]

SMOOTH_RTOL = 1e-12     # DESIGN.md accuracy target, smooth activations
PIECEWISE_RTOL = 1e-10  # DESIGN.md accuracy target, piecewise activations



def _activation(entry):
    return propcalc.activation(entry["name"], **entry["params"])


def _rtol(entry) -> float:
    return PIECEWISE_RTOL if entry["piecewise"] else SMOOTH_RTOL


def assert_matches(got, ref, rtol, what, floor=0.0):
    """|got - ref| <= rtol * max(|ref|, floor); "inf" must be +inf; None means absent."""
    if ref is None:
        assert got is None or not math.isfinite(got), (what, got)
        return
    if ref == "inf":
        assert got is not None and math.isinf(got) and got > 0, (what, got)
        return
    r = float(ref)
    assert got is not None and math.isfinite(got), (what, got)
    err = abs(got - r) / max(abs(r), floor, 1e-300)
    assert abs(got - r) <= rtol * max(abs(r), floor), \
        f"{what}: propcalc {got!r}, mpmath {ref}, relative error {err:.2e} > {rtol:.1e}"


def test_table_covers_every_builtin():
    # a new built-in must get reference values: rerun make_table.py
    names = {entry["name"] for entry in ENTRIES.values()}
    assert names == set(propcalc.builtin_names())
    assert TABLE["dps"] == 30


def test_table_self_checks_passed():
    # make_table.py reproduces closed forms (Williams 1997, Sheppard 1899, He et al. 2015,
    # Klambauer et al. 2017) below 1e-20 before writing the table
    checks = TABLE["self_checks"]
    assert set(checks) == {"erf_chaotic_vs_williams", "step_chaotic_vs_sheppard", "relu_vs_he",
                           "selu_vs_klambauer"}
    assert all(float(v) < 1e-20 for v in checks.values())
    assert float(TABLE["worst_1d_error_estimate"]) < 1e-25


@pytest.mark.parametrize("label", list(ENTRIES))
def test_gains(label):
    # forward gain 1 / sqrt(E[phi(z)^2]), backward gain 1 / sqrt(E[phi'(z)^2]) at q = 1
    entry = ENTRIES[label]
    act, rtol = _activation(entry), _rtol(entry)
    assert_matches(float(maps.second_moment(act, 1.0)), entry["second_moment_q1"], rtol,
                   f"{label} E[phi^2]")
    assert_matches(float(maps.derivative_second_moment(act, 1.0)),
                   entry["derivative_second_moment_q1"], rtol, f"{label} E[phi'^2]")
    g = propcalc.gains(act)
    assert_matches(g.forward, str(1 / math.sqrt(float(entry["second_moment_q1"]))), rtol,
                   f"{label} forward gain")
    if entry["derivative_second_moment_q1"] == "inf":
        assert g.backward == 0.0  # a jump: no gain preserves gradients
    else:
        assert_matches(g.backward, str(1 / math.sqrt(float(entry["derivative_second_moment_q1"]))),
                       rtol, f"{label} backward gain")


def _moment_cases():
    for label, entry in ENTRIES.items():
        for row in entry["moments"]:
            for key in ("second_moment", "derivative_second_moment"):
                yield pytest.param(label, row["q"], key, id=f"{label}-q{row['q']}-{key}")


@pytest.mark.parametrize("label,q,key", list(_moment_cases()))
def test_moments_over_scales(label, q, key):
    # E[phi(sqrt(q) z)^2], E[phi'(sqrt(q) z)^2] for q from 0.01 to 1e4
    entry = ENTRIES[label]
    act = _activation(entry)
    row = next(r for r in entry["moments"] if r["q"] == q)
    fn = maps.second_moment if key == "second_moment" else maps.derivative_second_moment
    assert_matches(float(fn(act, float(q))), row[key], _rtol(entry), f"{label} {key} at q = {q}")


def _point_cases():
    for label, entry in ENTRIES.items():
        for k, _ in enumerate(entry["points"]):
            yield pytest.param(label, k, id=f"{label}-point{k}")


@pytest.mark.parametrize("label,k", list(_point_cases()))
def test_fixed_points_chi_1_and_depth_scales(label, k):
    # q* (V(q*) = q*), chi_q = V'(q*), chi_1 = sw E[phi'(sqrt(q*) z)^2] (Schoenholz et al.
    # 2017, eq. 8), the phase, and c*, chi_c = C'(c*), xi_c = -1 / ln chi_c (eq. 9)
    entry = ENTRIES[label]
    point = entry["points"][k]
    act = _activation(entry)
    p = propcalc.propagation(act, float(point["sigma_w2"]), float(point["sigma_b2"]))
    assert p.phase == point["phase"]
    assert p.status == "fixed_point"
    chi_q_ref = float(point["chi_q"])
    rtol = _rtol(entry) * max(1.0, 1.0 / abs(1.0 - chi_q_ref))
    name = f"{label} ({point['sigma_w2']}, {point['sigma_b2']})"
    assert_matches(p.q_star, point["q_star"], rtol, f"{name} q*")
    assert_matches(p.chi_q, point["chi_q"], rtol, f"{name} chi_q", floor=1.0)
    assert_matches(p.chi_1, point["chi_1"], rtol, f"{name} chi_1")
    if point["c_star"] is None:
        return  # chaotic point not computed in 2-D mpmath (see make_table.py)
    assert_matches(p.c_star, point["c_star"], rtol, f"{name} c*")
    assert_matches(p.chi_c, point["chi_c"], rtol, f"{name} chi_c")
    xi = float(point["xi_c"])
    assert_matches(p.xi_c, point["xi_c"], rtol * max(1.0, xi), f"{name} xi_c")


@pytest.mark.parametrize("label", list(ENTRIES))
def test_critical_point_at_unit_fixed_point(label):
    # the edge-of-chaos point with q* = 1 (Poole et al. 2016; Schoenholz et al. 2017):
    # sigma_w2 = 1 / E[phi'(z)^2], sigma_b2 = 1 - sigma_w2 E[phi(z)^2], and chi_q = V'(1)
    entry = ENTRIES[label]
    ref = entry["critical_q1"]
    act, rtol = _activation(entry), _rtol(entry)
    cp = propcalc.edge_of_chaos(act, 1.0)
    assert cp.valid == ref["valid"]
    if ref["sigma_w2"] is None:
        assert cp.sigma_w2 is None
        return
    assert_matches(cp.sigma_w2, ref["sigma_w2"], rtol, f"{label} critical sigma_w2")
    if ref["valid"]:
        assert_matches(cp.sigma_b2, ref["sigma_b2"], rtol, f"{label} critical sigma_b2", floor=1.0)
        assert_matches(cp.chi_q, ref["chi_q"], rtol, f"{label} critical chi_q", floor=1.0)
    else:
        assert cp.sigma_b2 is None and float(ref["sigma_b2_needed"]) < 0


@pytest.mark.parametrize("label", ["elu", "selu", "hard_tanh"])
def test_kinked_chaotic_fixed_points_to_rounding(label):
    # The kinked activations with a closed-form smoothing find c* from a Hermite-series guess
    # polished by the exact 1-D route: c* and chi_c = C'(c*) (Schoenholz et al. 2017, eq. 9)
    # against the mpmath table well inside its 1e-10 piecewise tolerance (measured: <= 2e-14)
    entry = ENTRIES[label]
    act = _activation(entry)
    chaotic = [p for p in entry["points"] if p["phase"] == "chaotic" and p["c_star"] is not None]
    assert chaotic
    for point in chaotic:
        p = propcalc.propagation(act, float(point["sigma_w2"]), float(point["sigma_b2"]))
        name = f"{label} ({point['sigma_w2']}, {point['sigma_b2']})"
        assert_matches(p.c_star, point["c_star"], 1e-13, f"{name} c*")
        assert_matches(p.chi_c, point["chi_c"], 1e-13, f"{name} chi_c")
