"""Tests of propcalc.meanfield.sweep: grids of propagation quantities, tables, executors.

The reference is propcalc.propagation itself, point by point (the engine,
whose numbers are checked against papers and mpmath in its own tests).
Agreement is required to 1e-9 relative, with two stated refinements:

* a depth scale xi = -1 / ln(chi) turns a relative error e of the slope chi
  into a relative error e * xi of xi (d xi / xi = xi d chi / chi), so xi_q,
  xi_c and 6 xi_c are compared at 1e-9 * max(1, xi) relative;
* where V is exactly flat (the step function: V(q) = sigma_w2 / 2 + sigma_b2),
  chi_q is rounding noise of order 1e-16 in both codes: chi_q is compared
  with an absolute floor of 1e-12 and xi_q (< 0.04 layers there) is skipped.
"""

from __future__ import annotations

import csv
import io
import json
import math
import multiprocessing
from concurrent.futures import ProcessPoolExecutor

import numpy as np
import pytest

import propcalc
from propcalc import Activation, InvalidParameterError
from propcalc.meanfield.sweep import (
    QUANTITIES,
    EdgeSweepResult,
    SweepResult,
    propagation_arrays,
    sweep,
    sweep_edge,
)

SW = [0.3, 0.9, 1.0, 1.4, 2.0, 2.6, 3.5]
SB = [0.0, 0.02, 0.3]
RTOL = 1e-9


def assert_agrees(fast: SweepResult, ref: SweepResult) -> None:
    assert fast.shape == ref.shape
    np.testing.assert_array_equal(fast.status, ref.status)
    np.testing.assert_array_equal(fast.phase, ref.phase)
    flat_v = np.abs(ref.chi_q) < 1e-12
    for k in QUANTITIES:
        a, b = getattr(fast, k), getattr(ref, k)
        np.testing.assert_array_equal(np.isnan(a), np.isnan(b), err_msg=k)
        np.testing.assert_array_equal(np.isposinf(a), np.isposinf(b), err_msg=k)
        fin = np.isfinite(a) & np.isfinite(b)
        if k in ("xi_q", "xi_c", "trainable_depth"):
            scale = np.maximum(1.0, np.abs(b) / (6.0 if k == "trainable_depth" else 1.0))
            if k == "xi_q":
                fin &= ~flat_v
            rel = RTOL * scale
            atol = 0.0
        else:
            rel = RTOL
            atol = 1e-12 if k == "chi_q" else 0.0
        with np.errstate(invalid="ignore"):  # inf - inf where both are inf (checked above)
            err = np.abs(a - b)
        ok = err <= rel * np.abs(b) + atol
        assert np.all(ok[fin]), (k, a[fin & ~ok], b[fin & ~ok])


@pytest.mark.parametrize("name, params", [
    ("tanh", {}), ("relu", {}), ("leaky_relu", {"slope": 0.2}), ("gelu", {}), ("erf", {}),
    ("selu", {}), ("sigmoid", {}), ("softplus", {}), ("linear", {}), ("step", {}),
    ("elu", {}), ("swish", {"beta": 1.5}),
])
def test_vectorised_sweep_equals_propagation(name, params):
    act = propcalc.activation(name, **params)
    fast = sweep(act, SW, SB, progress=False)
    ref = sweep(act, SW, SB, progress=False, method="pointwise")
    assert fast.method == "vectorised" and ref.method == "pointwise"
    assert_agrees(fast, ref)


def test_hard_tanh_away_from_its_degenerate_point():
    # at (1, 0) V(q) - q vanishes to rounding for small q and the engine's roots there are
    # rounding noise (reported separately); every other point must agree
    act = propcalc.activation("hard_tanh")
    sw = [0.3, 0.9, 1.4, 2.0, 3.5]
    assert_agrees(sweep(act, sw, SB, progress=False),
                  sweep(act, sw, SB, progress=False, method="pointwise"))


@pytest.mark.parametrize("name, sw, sb, status, phase", [
    ("tanh", 1.0, 0.0, "collapse", "edge of chaos"),       # Poole et al. 2016: tanh critical at 1
    ("relu", 2.0, 0.0, "neutral", "edge of chaos"),        # He et al. 2015: sigma_w2 = 2
    ("linear", 1.0, 0.0, "neutral", "edge of chaos"),
    ("relu", 3.0, 0.1, "unbounded", "unbounded variance"),  # V(q) = 1.5 q + 0.1 (closed form)
    ("relu", 1.0, 0.0, "collapse", "ordered"),
])
def test_special_points(name, sw, sb, status, phase):
    r = sweep(name, sw, sb, progress=False)
    p = propcalc.propagation(propcalc.activation(name), sw, sb)
    assert r.status[0, 0, 0] == p.status == status
    assert r.phase[0, 0, 0] == p.phase == phase
    for k in QUANTITIES:
        v, ref = r.__getattribute__(k)[0, 0, 0], getattr(p, k)
        if ref is None:
            assert math.isnan(v), k
        elif math.isinf(ref):
            assert v == ref, k
        else:
            assert v == pytest.approx(ref, rel=1e-9, abs=1e-15), k


def test_relu_closed_forms():
    # ReLU with sigma_b2 > 0 and sigma_w2 < 2: V(q) = sigma_w2 q / 2 + sigma_b2 (Cho & Saul 2009,
    # arc-cosine kernel of degree 1 at c = 1), so q* = sigma_b2 / (1 - sigma_w2 / 2),
    # chi_1 = chi_q = sigma_w2 / 2, ordered with xi_c = -1 / ln(sigma_w2 / 2)
    sw = np.array([0.5, 1.0, 1.5, 1.9])
    r = sweep("relu", sw, [0.1, 0.4], progress=False)
    for j, sb in enumerate([0.1, 0.4]):
        np.testing.assert_allclose(r.q_star[0, :, j], sb / (1 - sw / 2), rtol=1e-12)
        np.testing.assert_allclose(r.chi_1[0, :, j], sw / 2, rtol=1e-13)
        np.testing.assert_allclose(r.chi_q[0, :, j], sw / 2, rtol=1e-12)
        np.testing.assert_allclose(r.xi_c[0, :, j], -1 / np.log(sw / 2), rtol=1e-12)
        np.testing.assert_allclose(r.trainable_depth[0, :, j], -6 / np.log(sw / 2), rtol=1e-12)


def test_several_activations_and_shapes():
    r = sweep(["tanh", propcalc.activation("leaky_relu", slope=0.1)], [0.5, 1.5, 2.5],
              [0.0, 0.1], progress=False)
    assert r.shape == (2, 3, 2)
    assert r.activations == ("tanh", "leaky_relu(slope=0.1)")
    assert r.q_star.shape == r.phase.shape == (2, 3, 2)
    assert r.grid("chi_1", "leaky_relu(slope=0.1)").shape == (3, 2)
    assert not r.q_star.flags.writeable
    with pytest.raises(InvalidParameterError, match="quantity must be one of"):
        r.grid("chi_2")
    with pytest.raises(InvalidParameterError, match="activation must be one of tanh"):
        r.grid("chi_1", "relu")


def test_propagation_arrays_broadcast():
    act = propcalc.activation("tanh")
    sw = np.array([[0.5], [1.5], [2.5]])
    out = propagation_arrays(act, sw, [0.0, 0.05])
    assert out["q_star"].shape == (3, 2)
    p = propcalc.propagation(act, 2.5, 0.05)
    assert out["c_star"][2, 1] == pytest.approx(p.c_star, rel=1e-9)
    assert out["phase"][2, 1] == p.phase


def test_custom_activation_runs_in_process():
    cube = Activation(name="softsign", value_fn=lambda x: x / (1 + np.abs(x)),
                      derivative_fn=lambda x: 1 / (1 + np.abs(x)) ** 2)
    r = sweep(cube, [0.8, 2.0], [0.05], progress=False)
    p = propcalc.propagation(cube, 2.0, 0.05)
    assert r.q_star[0, 1, 0] == pytest.approx(p.q_star, rel=1e-9)
    with ProcessPoolExecutor(max_workers=1) as ex:
        with pytest.raises(InvalidParameterError, match="built-in or formula activations when an "
                           "executor is used"):
            sweep(cube, [0.8], [0.05], executor=ex, progress=False)


def _same(a: SweepResult, b: SweepResult) -> None:
    # the same chunks run the same arithmetic; allow for numpy's SIMD sums, whose last bit
    # can depend on memory alignment, which differs between processes
    for k in ("status", "phase"):
        np.testing.assert_array_equal(getattr(a, k), getattr(b, k), err_msg=k)
    for k in QUANTITIES:
        x, y = getattr(a, k), getattr(b, k)
        np.testing.assert_array_equal(np.isnan(x), np.isnan(y), err_msg=k)
        np.testing.assert_array_equal(np.isinf(x), np.isinf(y), err_msg=k)
        fin = np.isfinite(y)
        rel = 1e-12 * (np.maximum(1.0, np.abs(y[fin])) if k in ("xi_q", "xi_c", "trainable_depth")
                       else 1.0)
        assert np.all(np.abs(x[fin] - y[fin]) <= rel * np.abs(y[fin]) + 1e-300), k


def test_process_pool_gives_the_serial_result():
    sw, sb = np.linspace(0.4, 3.0, 9), [0.0, 0.05, 0.2]
    # a typed formula travels to the workers as its text and parameters
    swish = propcalc.activation("x * sigmoid(beta * x)", beta=1.5)
    serial = sweep(["tanh", swish], sw, sb, chunk_size=7, progress=False)
    ctx = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(max_workers=2, mp_context=ctx) as ex:
        par = sweep(["tanh", swish], sw, sb, executor=ex, chunk_size=7, progress=False)
    _same(serial, par)
    assert par.activations == ("tanh", "x * sigmoid(beta * x) with beta=1.5")


def test_dask_local_cluster_gives_the_serial_result():
    distributed = pytest.importorskip("distributed")
    sw, sb = np.linspace(0.4, 3.0, 7), [0.0, 0.1]
    serial = sweep(["tanh", "relu"], sw, sb, chunk_size=5, progress=False)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                  protocol="tcp", host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        with distributed.Client(cluster) as client:
            par = sweep(["tanh", "relu"], sw, sb, executor=client.get_executor(),
                        chunk_size=5, progress=False)
    _same(serial, par)


def test_progress_bar_on_request_goes_to_stderr(capsys):
    sweep("relu", [1.0, 1.5], [0.1], progress=True)
    captured = capsys.readouterr()
    assert "point" in captured.err and captured.out == ""
    sweep("relu", [1.0, 1.5], [0.1])  # None: hidden when stderr is not a terminal
    assert capsys.readouterr().err == ""


def _relu_table() -> SweepResult:
    return sweep("relu", [1.0, 2.0, 3.0], [0.0, 0.1], progress=False)


def test_csv_table():
    r = _relu_table()
    text = r.to_csv()
    rows = list(csv.DictReader(io.StringIO(text)))
    assert len(rows) == 6
    assert list(rows[0]) == ["activation", "sigma_w2", "sigma_b2", "q_input", "status", "phase",
                             *QUANTITIES]
    edge = rows[2]  # (2, 0): neutral ReLU, exactly critical
    assert (edge["sigma_w2"], edge["sigma_b2"], edge["phase"]) == ("2.0", "0.0", "edge of chaos")
    assert edge["xi_c"] == "inf" and edge["trainable_depth"] == "inf"
    unb = rows[5]  # (3, 0.1): unbounded, q* does not exist
    assert unb["status"] == "unbounded" and unb["q_star"] == ""
    # chi_1 of an exploding ReLU network: sigma_w2 / 2 (closed form), by quadrature at q = 1e12
    assert float(unb["chi_1"]) == pytest.approx(1.5, rel=1e-14)
    assert float(rows[0]["xi_c"]) == pytest.approx(-1 / math.log(0.5), rel=1e-12)
    buf = io.StringIO()
    assert r.to_csv(buf) == buf.getvalue() == text


def test_json_lines_table(tmp_path):
    r = _relu_table()
    path = tmp_path / "sweep.jsonl"
    text = r.to_json_lines(path)
    assert path.read_text() == text

    def refuse(token: str) -> None:
        raise ValueError(f"non-standard JSON token {token}")

    rows = [json.loads(line, parse_constant=refuse) for line in text.splitlines()]
    assert len(rows) == 6
    assert rows[2]["xi_c"] == "inf"          # propcalc.jsonable's convention
    assert rows[5]["q_star"] is None         # absent -> null
    assert rows[5]["chi_1"] == pytest.approx(1.5, rel=1e-14)
    assert rows[0]["activation"] == "relu"


def test_to_dict_is_strict_json():
    d = _relu_table().to_dict()
    assert d["shape"] == [1, 3, 2]
    assert d["q_star"][0][2][1] is None
    text = json.dumps(propcalc.jsonable(d), allow_nan=False)
    assert '"inf"' in text


@pytest.mark.parametrize("kwargs, match", [
    (dict(sigma_w2=[1.0, -1.0], sigma_b2=0.0), r"sigma_w2\[1\] must be finite and > 0, got -1.0"),
    (dict(sigma_w2=1.0, sigma_b2=[0.0, float("nan")]), r"sigma_b2\[1\] must be finite and >= 0"),
    (dict(sigma_w2=[], sigma_b2=0.0), "sigma_w2 must be a number or a non-empty 1-D array"),
    (dict(sigma_w2=[[1.0]], sigma_b2=0.0), "sigma_w2 must be a number or a non-empty 1-D"),
    (dict(sigma_w2="x", sigma_b2=0.0), "sigma_w2 must be a number or a 1-D array"),
    (dict(sigma_w2=1.0, sigma_b2=0.0, method="fast"), "method must be one of vectorised"),
    (dict(sigma_w2=1.0, sigma_b2=0.0, chunk_size=0), "chunk_size must be an integer >= 1"),
    (dict(sigma_w2=1.0, sigma_b2=0.0, q_input=-1.0), "q_input must be >= 0"),
    (dict(sigma_w2=1.0, sigma_b2=0.0, executor=object()), "executor must be a concurrent"),
])
def test_bad_input_names_the_field(kwargs, match):
    with pytest.raises(InvalidParameterError, match=match):
        sweep("tanh", progress=False, **kwargs)


def test_unknown_activation():
    with pytest.raises(propcalc.UnknownActivationError, match="unknown activation"):
        sweep("tanhh", 1.0, 0.0)


@pytest.mark.parametrize("name", ["tanh", "gelu", "relu", "erf", "step"])
def test_sweep_edge_equals_edge_of_chaos(name):
    act = propcalc.activation(name)
    qs = [0.01, 0.1, 1.0, 3.0, 30.0]
    e = sweep_edge(act, qs)
    assert isinstance(e, EdgeSweepResult)
    for j, q in enumerate(qs):
        cp = propcalc.edge_of_chaos(act, q)
        assert bool(e.valid[0, j]) == cp.valid, q
        if not cp.valid:
            assert math.isnan(e.sigma_w2[0, j]) or cp.sigma_w2 is not None
            continue
        assert e.sigma_w2[0, j] == pytest.approx(cp.sigma_w2, rel=1e-12)
        assert e.sigma_b2[0, j] == pytest.approx(cp.sigma_b2, rel=1e-9, abs=1e-15)
        assert e.chi_q[0, j] == pytest.approx(cp.chi_q, rel=1e-9)
        assert bool(e.stable[0, j]) == cp.stable
    rows = list(csv.DictReader(io.StringIO(e.to_csv())))
    assert len(rows) == len(qs)


@pytest.mark.parametrize("name", ["tanh", "gelu", "erf"])
def test_plans_start_on_their_fixed_point(name):
    # recommend() picks q_input so that q_1 = q*: the "start at a fixed point" branch
    act = propcalc.activation(name)
    p = propcalc.recommend(act, depth=10).propagation
    r = sweep(act, p.sigma_w2, p.sigma_b2, q_input=p.q_input, progress=False)
    assert r.status[0, 0, 0] == p.status and r.phase[0, 0, 0] == p.phase == "edge of chaos"
    assert r.q_star[0, 0, 0] == pytest.approx(p.q_star, rel=1e-9)
    assert r.xi_c[0, 0, 0] == p.xi_c == math.inf


def test_step_closed_form_including_a_root_on_a_round_number():
    # step: V(q) = sigma_w2 P(z >= 0) + sigma_b2 = sigma_w2 / 2 + sigma_b2 for q > 0 (closed
    # form), so q* = sigma_w2 / 2 + sigma_b2, chi_q = 0, and chi_1 is infinite (a jump):
    # chaotic everywhere (Schoenholz et al. 2017 treat the jump through the Dirac mass)
    sw = np.array([0.2, 0.5, 1.0, 3.0])
    r = sweep("step", sw, [0.0, 0.05], progress=False)
    for j, sb in enumerate([0.0, 0.05]):
        np.testing.assert_allclose(r.q_star[0, :, j], sw / 2 + sb, rtol=1e-13)
        assert np.all(np.abs(r.chi_q[0, :, j]) < 1e-12)
        assert np.all(np.isposinf(r.chi_1[0, :, j]))
        assert np.all(r.phase[0, :, j] == "chaotic")


@pytest.mark.parametrize("name", ["tanh", "erf", "selu", "hard_tanh", "step"])
def test_hermite_series_agrees_with_the_2d_integrals(name):
    # Mehler's formula E[phi(u1) phi(u2)] = sum_k a_k^2 c^k (Daniely, Frostig & Singer 2016,
    # section 6) against the engine's 2-D quadrature at the chaotic fixed point c*
    from propcalc.numerics.hermite import SERIES_PASSES as _SERIES_PASSES
    from propcalc.meanfield.correlation import series_fixed_points as _series_fixed_points

    act = propcalc.activation(name)
    pts = []
    for sw in (1.3, 1.8, 2.5, 3.5):
        for sb in (0.0, 0.02, 0.2):
            p = propcalc.propagation(act, sw, sb)
            if p.phase == "chaotic" and p.status == "fixed_point":
                pts.append((sw, sb, p.q_star, p.c_star, p.chi_c))
    a = np.array(pts)
    accepted = 0
    for kmax, rule in _SERIES_PASSES:  # 160 terms, then 640 on finer panels
        c, chi, ok = _series_fixed_points(act, a[:, 0], a[:, 1], a[:, 2], kmax, rule)
        np.testing.assert_allclose(c[ok], a[ok, 3], rtol=0, atol=1e-11)
        np.testing.assert_allclose(chi[ok], a[ok, 4], rtol=1e-11)
        assert not np.any(ok & (c > 0.99))  # near c* = 1 the series is refused (2-D instead)
        accepted = max(accepted, int(ok.sum()))
    assert accepted >= len(a) // 2
