"""The Result base: every result's dict form is derived from its dataclass fields.

References: the dict convention is propcalc's own (DESIGN.md, "Public Python API": results are
frozen dataclasses with ``to_dict()`` derived from the fields); the JSON convention for
infinities and absent values is :mod:`propcalc.jsonable`'s. No external source is needed for
these structural checks.
"""

from __future__ import annotations

import dataclasses
import importlib
import inspect
import json
import math
import pkgutil
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import pytest

import propcalc
from propcalc.results import ABSENT_AS_NONE, OMIT, Result, inline, plain

#: exported dataclasses that are inputs or settings, not results (a Network's dict form is its
#: description, :meth:`propcalc.Network.describe`, the input format)
NOT_RESULTS = {"QuadratureRule", "Network"}


def _engine_classes() -> list[type]:
    out = []
    for info in pkgutil.walk_packages(propcalc.__path__, "propcalc."):
        if info.name.startswith("propcalc.cli"):
            continue
        module = importlib.import_module(info.name)
        for _, obj in inspect.getmembers(module, inspect.isclass):
            if obj.__module__ == module.__name__:
                out.append(obj)
    return out


def test_no_hand_written_to_dict_in_the_engine():
    hand_written = [f"{c.__module__}.{c.__qualname__}" for c in _engine_classes()
                    if c is not Result and "to_dict" in c.__dict__]
    assert hand_written == []


def test_every_class_with_a_dict_form_is_a_result_dataclass():
    for cls in _engine_classes():
        if hasattr(cls, "to_dict") and cls is not Result:
            assert issubclass(cls, Result), cls
            assert dataclasses.is_dataclass(cls), cls
            assert cls.__dataclass_params__.frozen, cls  # type: ignore[attr-defined]


def test_every_exported_dataclass_is_a_result():
    for name in propcalc.__all__:
        obj = getattr(propcalc, name)
        if inspect.isclass(obj) and dataclasses.is_dataclass(obj) and name not in NOT_RESULTS:
            assert issubclass(obj, Result), name


# ---- the derivation rules, on small examples of our own ------------------------------------
@dataclass(frozen=True)
class _Inner(Result):
    a: float
    b: tuple[int, ...] = (1, 2)


@dataclass(frozen=True)
class _Outer(Result):
    name: str
    inner: _Inner | None
    helper: object = field(default=None, metadata=OMIT)
    table: np.ndarray = field(default_factory=lambda: np.array([[1.0, np.nan], [np.inf, 2.0]]),
                              metadata=ABSENT_AS_NONE)
    merged: _Inner | None = field(default=None, metadata=inline(absent={"a": None}))
    constant: str = field(default="a fixed sentence", init=False)

    dict_properties = ("lazy",)

    @cached_property
    def lazy(self) -> float:
        return np.float64(0.5)  # type: ignore[return-value]


def test_fields_in_order_nested_results_as_dicts_tuples_as_lists():
    d = _Outer("x", _Inner(1.5)).to_dict()
    assert list(d) == ["name", "inner", "table", "a", "constant", "lazy"]
    assert d["inner"] == {"a": 1.5, "b": [1, 2]}
    assert d["name"] == "x"


def test_omitted_field_is_absent():
    assert "helper" not in _Outer("x", None, helper=object()).to_dict()


def test_absent_as_none_turns_nan_into_none_and_keeps_infinities():
    d = _Outer("x", None).to_dict()
    assert d["table"] == [[1.0, None], [math.inf, 2.0]]
    assert json.loads(json.dumps(propcalc.jsonable(d)))["table"] == [[1.0, None], ["inf", 2.0]]


def test_inline_merges_entries_and_writes_the_placeholder_when_absent():
    assert _Outer("x", None).to_dict()["a"] is None
    d = _Outer("x", None, merged=_Inner(3.0, (4,))).to_dict()
    assert d["a"] == 3.0 and d["b"] == [4]
    assert "merged" not in d


def test_constant_field_and_lazy_property_are_in_the_dict_as_plain_python():
    d = _Outer("x", None).to_dict()
    assert d["constant"] == "a fixed sentence"
    assert d["lazy"] == 0.5 and type(d["lazy"]) is float


def test_plain_converts_numpy_and_enums():
    import enum

    class Colour(enum.Enum):
        RED = "red"

    assert plain({"k": (np.int64(3), np.array([1.0, 2.0]), Colour.RED)}) == {"k": [3, [1.0, 2.0], "red"]}
    assert type(plain(np.float64(1.0))) is float


# ---- dicts that are a documented contract (the service and --json) ---------------------
def test_propagation_dict_keeps_the_trainable_depth_rule_key():
    d = propcalc.propagation("tanh", 1.5, 0.05).to_dict()
    assert d["trainable_depth_rule"] == ("about 6 xi_c layers (empirical rule of "
                                         "Schoenholz et al. 2017)")
    assert list(d)[:2] == ["activation", "sigma_w2"]
    assert isinstance(d["variance_fixed_points"], dict)


def test_plan_layers_are_flat_with_the_layer_shape_inlined():
    plan = propcalc.recommend("relu", widths=[4, 8, 3])
    first = plan.to_dict()["layers"][0]
    assert {"index", "kind", "fan_in", "fan_out", "weight_shape", "kernel_size",
            "sigma_w2", "value"} <= set(first)
    assert first["kind"] == "dense" and first["weight_shape"] == [8, 4]
    depth_only = propcalc.recommend("relu", depth=2).to_dict()["layers"][0]
    assert depth_only["kind"] is None and "fan_in" not in depth_only


def test_drawn_arrays_show_shapes_and_sample_stds_not_the_arrays():
    arrays = propcalc.draw_plan(propcalc.recommend("tanh", widths=[5, 7, 2]), seed=0)
    d = arrays.to_dict()["layers"][0]
    assert "weight" not in d and "bias" not in d
    assert d["weight_shape"] == [7, 5] and d["bias_shape"] == [7]
    assert d["sample_weight_std"] == pytest.approx(float(np.sqrt(np.mean(arrays.layers[0].weight ** 2))))


def test_sweep_tables_mark_absent_values_as_none():
    # relu at sigma_w2 = 4 > 2: the variance grows without bound, q* does not exist
    d = propcalc.sweep("relu", [1.0, 4.0], [0.0]).to_dict()
    assert d["q_star"][0][1] == [None]
    assert d["shape"] == [1, 2, 1]
    json.dumps(propcalc.jsonable(d), allow_nan=False)


def test_activation_dict_has_label_and_profile_but_no_functions():
    d = propcalc.activation("leaky_relu", slope=0.2).to_dict()
    assert d["label"] == "leaky_relu(slope=0.2)"
    assert d["params"] == {"slope": 0.2}
    assert "value_fn" not in d and "smoothing" not in d and "declared_scale" not in d
    assert set(d["properties"]) >= {"output_range", "parity", "smoothness"}
