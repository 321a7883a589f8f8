"""Tests of the documented numeric domains (propcalc.domains) and their enforcement.

Each domain is tested at its bounds and just beyond them (the next double outside, by
numpy.nextafter); the messages name the field, the constraint and the value (STYLE.md).
The inputs of issue 11 section 2 that raised OverflowError or leaked a RuntimeWarning are
here as the failing inputs themselves.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import propcalc
from propcalc import InvalidParameterError, domains
from propcalc.domains import DOMAINS, Domain, check, check_array, domain, domain_table
from propcalc.meanfield import maps

A = propcalc.activation


def _outside(d: Domain) -> list[float]:
    """The nearest doubles just beyond each finite bound."""
    out = [float(np.nextafter(d.lower, -np.inf)), float(np.nextafter(d.upper, np.inf))]
    if d.integer:
        out = [d.lower - 1, d.upper + 1]
    return out


@pytest.mark.parametrize("name", list(DOMAINS))
def test_bounds_are_inside_and_the_next_doubles_outside(name):
    d = domain(name)
    for v in (d.lower, d.upper):
        assert d.contains(v) != (d.lower_open if v == d.lower else d.upper_open)
        if d.contains(v):
            got = d.check(int(v) if d.integer else v)
            assert got == v and type(got) is (int if d.integer else float)
    for v in _outside(d):
        if d.zero and v == 0.0:
            continue
        assert not d.contains(v)
        with pytest.raises(InvalidParameterError) as info:
            d.check(v)
        err = info.value
        assert err.field == name and err.value == v
        assert str(err).startswith(f"{name} must be ")


@pytest.mark.parametrize("name", [n for n, d in DOMAINS.items() if d.zero])
def test_zero_is_allowed_where_documented(name):
    assert check(name, 0.0) == 0.0
    tiny = float(np.nextafter(domain(name).lower, 0.0))
    with pytest.raises(InvalidParameterError, match=rf"^{name} must be 0 or in \["):
        check(name, tiny)


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf, None, "1.0", True, [1.0], 1j])
def test_non_numbers_are_refused_with_the_field_named(bad):
    with pytest.raises(InvalidParameterError) as info:
        check("sigma_w2", bad, field="point.sigma_w2")
    assert info.value.field == "point.sigma_w2"
    assert "finite real number" in str(info.value)


def test_messages_keep_the_basic_constraint_for_a_wrong_sign():
    with pytest.raises(InvalidParameterError, match=r"^sigma_w2 must be > 0, got -1.0$"):
        check("sigma_w2", -1.0)
    with pytest.raises(InvalidParameterError, match=r"^sigma_b2 must be >= 0, got -0.5$"):
        check("sigma_b2", -0.5)
    with pytest.raises(InvalidParameterError, match=r"^q must be finite and >= 0, got -1.0$"):
        check("q", -1.0)
    with pytest.raises(InvalidParameterError,
                       match=r"^sigma_w2 must be in \[1e-6, 10000\], got 1e\+300$"):
        check("sigma_w2", 1e300)
    with pytest.raises(InvalidParameterError, match=r"^q must be 0 or in \[1e-200, 1e12\]"):
        check("q", 1e300)


def test_integers():
    assert check("depth", 3) == 3 and check("depth", 3.0) == 3
    assert check("depth", np.int64(7)) == 7 and type(check("depth", np.int64(7))) is int
    for bad in (2.5, 0, -3, True, "3", math.nan):
        with pytest.raises(InvalidParameterError, match=r"^depth must be an integer >= 1, got "):
            check("depth", bad)
    with pytest.raises(InvalidParameterError, match=r"^depth must be an integer in \[1, 1000000\]"):
        check("depth", 1_000_001)
    # an integer beyond the range of doubles: refused by the bound, shown shortened
    with pytest.raises(InvalidParameterError) as info:
        check("depth", 10**400)
    assert "an integer in [1, 1000000]" in str(info.value) and "(401 characters)" in str(info.value)
    with pytest.raises(InvalidParameterError, match="finite real number"):
        check("sigma_w2", 10**400)


def test_arrays_name_the_first_bad_entry():
    out = check_array("c", [-1.0, 0.0, 1.0])
    assert out.dtype == float and out.shape == (3,)
    with pytest.raises(InvalidParameterError, match=r"^c must be in \[-1, 1\], got 1.5$"):
        check_array("c", [0.0, 1.5, -2.0])
    with pytest.raises(InvalidParameterError, match=r"^q must be finite and >= 0, got nan$"):
        check_array("q", [1.0, math.nan])
    with pytest.raises(InvalidParameterError, match=r"^q must be 0 or in \[1e-200, 1e12\], got 1e-250$"):
        check_array("q", np.array([[0.0, 1e-250]]))
    with pytest.raises(InvalidParameterError, match="a number or an array of numbers"):
        check_array("q", ["a"])
    assert check_array("depth", [1, 2.0]).tolist() == [1.0, 2.0]
    with pytest.raises(InvalidParameterError, match="depth must be an integer"):
        check_array("depth", [1, 2.5])


def test_unknown_domain_is_a_key_error_listing_the_known():
    with pytest.raises(KeyError, match="known: q, c, sigma_w2"):
        domain("sigma_w")


def test_table_rows_are_plain_and_complete():
    rows = domain_table()
    assert [r["name"] for r in rows] == list(DOMAINS)
    for r in rows:
        assert set(r) == {"name", "lower", "upper", "lower_inclusive", "upper_inclusive",
                          "zero_allowed", "integer", "constraint", "units", "reason"}
        assert r["lower"] < r["upper"] and r["reason"] and r["units"]
        assert domains.DOMAINS[r["name"]].constraint == r["constraint"]
    # the table cannot be changed by a caller
    with pytest.raises(TypeError):
        DOMAINS["q"] = DOMAINS["c"]  # type: ignore[index]


def test_the_q_floor_keeps_products_near_c_1_normal():
    # the reason stated for Q_POSITIVE_MIN: q (1 - c^2) at 1 - c = 2^-53 stays a normal double
    gap = 2.0**-53
    assert domains.Q_POSITIVE_MIN * gap * (2 - gap) > np.finfo(float).tiny


# ---------------------------------------------------------------------------------------------
# enforcement (issue 11 section 2: the failing inputs)
# ---------------------------------------------------------------------------------------------
def test_maps_enforce_the_q_domain():
    tanh = A("tanh")
    for q in (1e300, 5e-324, 1e-310, 1e-201, float(np.nextafter(1e12, np.inf))):
        with pytest.raises(InvalidParameterError, match=r"^q must be 0 or in \[1e-200, 1e12\]"):
            maps.correlation_map(tanh, [0.5], 1.5, 0.0, q=q)
        with pytest.raises(InvalidParameterError, match=r"^q must be 0 or in"):
            maps.variance_map(tanh, [1.0, q], 1.5, 0.0)
    assert np.all(np.isfinite(maps.correlation_map(tanh, [0.5], 1.5, 0.0, q=1e12)))
    assert np.all(np.isfinite(maps.correlation_map(tanh, [0.5], 1.5, 0.0, q=1e-200)))


def test_huge_integer_parameter_is_a_propcalc_error():
    # issue 11: beta=10**400 raised OverflowError
    with pytest.raises(InvalidParameterError, match=r"^params.beta must be a finite real number"):
        A("swish", beta=10**400)


def test_alpha_dropout_huge_mean_is_refused():
    # issue 11: alpha_dropout(..., 1e300) raised OverflowError
    with pytest.raises(InvalidParameterError, match=r"^mean must be in \[-100, 100\], got 1e\+300$"):
        propcalc.alpha_dropout(0.9, 1e300)
    with pytest.raises(InvalidParameterError, match=r"^alpha_prime must be in"):
        propcalc.alpha_dropout(0.9, 0.0, 1.0, -1e200)
    with pytest.raises(InvalidParameterError, match=r"^variance must be in"):
        propcalc.alpha_dropout(0.9, 0.0, 1e300)
    d = propcalc.alpha_dropout(1e-3, 100.0, 1e4, -1e3)  # every bound at once: finite a, b
    assert math.isfinite(d.a) and math.isfinite(d.b)


def test_edge_of_chaos_of_a_constant_formula_leaks_no_warning():
    # issue 11: edge_of_chaos("0*x") leaked a RuntimeWarning (inf * 0); pytest runs with
    # warnings as errors, so the call itself is the check
    point = propcalc.edge_of_chaos(A("0*x"))
    assert not point.valid and "no gradient" in point.message


def test_a_probability_above_1_gets_the_definition_not_the_bounds():
    with pytest.raises(InvalidParameterError, match=r"^keep_rate must be in \(0, 1\], got 1.5$"):
        check("keep_rate", 1.5)
    with pytest.raises(InvalidParameterError, match=r"^keep_rate must be in \[0.001, 1\], got 0.0001$"):
        check("keep_rate", 1e-4)
