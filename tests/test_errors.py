"""Tests of propcalc's exceptions (propcalc.errors): hierarchy and message format.

The contract (STYLE.md, after marshmallow and mpmath): one base class, narrow subclasses that
also inherit the builtin they resemble, and messages of the form
"<field> must be <constraint>, got <value>" (e.g. "sigma_w2 must be > 0, got -1.0").
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import propcalc
from propcalc import (
    ComputationError,
    FormulaError,
    InvalidParameterError,
    PropcalcError,
    UnknownActivationError,
    activation,
    errors,
)
from propcalc.errors import check_finite, check_int, check_nonnegative, check_positive


# ---------------------------------------------------------------------------------------------
# hierarchy
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("cls,builtin", [
    (InvalidParameterError, ValueError),
    (UnknownActivationError, ValueError),
    (FormulaError, ValueError),
    (ComputationError, ArithmeticError),
])
def test_subclasses_inherit_the_base_and_a_builtin(cls, builtin):
    assert issubclass(cls, PropcalcError)
    assert issubclass(cls, builtin)
    assert issubclass(PropcalcError, Exception) and not issubclass(PropcalcError, ValueError)


def test_exported_names():
    for name in ("PropcalcError", "InvalidParameterError", "UnknownActivationError",
                 "FormulaError", "ComputationError"):
        assert name in propcalc.__all__ and name in errors.__all__
        assert getattr(propcalc, name) is getattr(errors, name)


def test_callers_who_do_not_know_propcalc_can_catch_builtins():
    with pytest.raises(ValueError):
        propcalc.propagation(activation("tanh"), -1.0, 0.0)
    with pytest.raises(ValueError):
        activation("no_such_activation")
    with pytest.raises(ArithmeticError):
        propcalc.recommend(activation("relu"), depth=3, sigma_b2=0.5)


# ---------------------------------------------------------------------------------------------
# InvalidParameterError
# ---------------------------------------------------------------------------------------------
def test_invalid_parameter_message_and_attributes():
    err = InvalidParameterError("sigma_w2", "> 0", -1.0)
    assert str(err) == "sigma_w2 must be > 0, got -1.0"  # the example of STYLE.md
    assert (err.field, err.constraint, err.value) == ("sigma_w2", "> 0", -1.0)
    assert err.args == ("sigma_w2 must be > 0, got -1.0",)


def test_invalid_parameter_hint():
    err = InvalidParameterError("depth", "an integer >= 1", 0, hint="a network has layers")
    assert str(err) == "depth must be an integer >= 1, got 0; a network has layers"


def test_values_are_shown_with_repr():
    assert str(InvalidParameterError("name", "a string", None)) == "name must be a string, got None"
    assert str(InvalidParameterError("x", "a number", "abc")) == "x must be a number, got 'abc'"


def test_a_missing_value_is_said_to_be_missing():
    # issue 12 section 2: "depth must be given when neither widths nor layers are, got None"
    # spoke the code's language; an absent value is now called missing
    err = InvalidParameterError("depth", "given when neither widths nor layers are", None)
    assert str(err) == "depth must be given when neither widths nor layers are; it is missing"
    assert (err.field, err.value) == ("depth", None)


def test_numpy_scalars_are_shown_as_plain_numbers():
    assert str(InvalidParameterError("q", "> 0", np.float64(0.0))) == "q must be > 0, got 0.0"


def test_other_errors_carry_their_message():
    assert str(UnknownActivationError("unknown activation 'x'")) == "unknown activation 'x'"
    assert str(ComputationError("no root")) == "no root"
    f = FormulaError("bad token", column=4)
    assert str(f) == "bad token" and f.column == 4
    assert FormulaError("bad").column is None


# ---------------------------------------------------------------------------------------------
# the checkers
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("value,expected", [(1, 1.0), (-2.5, -2.5), (np.float32(0.5), 0.5),
                                            (np.int64(7), 7.0)])
def test_check_finite_accepts_real_numbers(value, expected):
    out = check_finite("x", value)
    assert out == expected and type(out) is float


@pytest.mark.parametrize("value", [math.nan, math.inf, -math.inf, True, None, "abc", [1.0],
                                   complex(1, 1)])
def test_check_finite_rejects(value):
    with pytest.raises(InvalidParameterError) as info:
        check_finite("sigma_b2", value)
    assert str(info.value) == f"sigma_b2 must be a finite real number, got {value!r}"


def test_check_positive_and_nonnegative():
    assert check_positive("q", 1e-300) == 1e-300
    assert check_nonnegative("q", 0) == 0.0
    with pytest.raises(InvalidParameterError, match=r"^q must be > 0, got 0$"):
        check_positive("q", 0)
    with pytest.raises(InvalidParameterError, match=r"^q must be >= 0, got -1e-300$"):
        check_nonnegative("q", -1e-300)
    with pytest.raises(InvalidParameterError, match=r"^q must be a finite real number, got inf$"):
        check_positive("q", math.inf)


def test_check_int():
    assert check_int("depth", 3) == 3
    assert check_int("depth", 3.0) == 3 and type(check_int("depth", 3.0)) is int
    assert check_int("n", 5, minimum=0, maximum=5) == 5
    for bad in (0, -1, 2.5, math.nan, math.inf, True, "3", None):
        with pytest.raises(InvalidParameterError, match=r"^depth must be an integer >= 1, got "):
            check_int("depth", bad)
    with pytest.raises(InvalidParameterError, match=r"^n must be an integer <= 5, got 6$"):
        check_int("n", 6, minimum=0, maximum=5)


def test_check_int_accepts_numpy_integers():
    assert check_int("depth", np.int64(3)) == 3


# ---------------------------------------------------------------------------------------------
# messages raised by the engine keep the format
# ---------------------------------------------------------------------------------------------
T = activation("tanh")


@pytest.mark.parametrize("call,message", [
    (lambda: propcalc.propagation(T, -1.0, 0.0), "sigma_w2 must be > 0, got -1.0"),
    (lambda: propcalc.propagation(T, 1.0, -0.5), "sigma_b2 must be >= 0, got -0.5"),
    (lambda: propcalc.propagation(T, math.nan, 0.0), "sigma_w2 must be a finite real number, got nan"),
    (lambda: propcalc.propagation(T, 1.0, 0.0, depth=0), "depth must be an integer >= 1, got 0"),
    (lambda: propcalc.variance_map(T, -1.0, 1.0, 0.0), "q must be finite and >= 0, got -1.0"),
    (lambda: propcalc.correlation_map(T, 2.0, 1.0, 0.0, 1.0), "c must be in [-1, 1], got 2.0"),
    (lambda: propcalc.edge_of_chaos(T, 0.0), "q_star must be > 0, got 0.0"),
    (lambda: activation("leaky_relu", slope=math.inf),
     "params.slope must be a finite real number, got inf"),
])
def test_engine_messages(call, message):
    with pytest.raises(InvalidParameterError) as info:
        call()
    assert str(info.value) == message
    assert info.value.field == message.split(" must be ")[0]


def test_unknown_activation_lists_the_choices():
    with pytest.raises(UnknownActivationError) as info:
        activation("tanhh")
    msg = str(info.value)
    assert msg.startswith("unknown activation 'tanhh'")
    assert "built-ins are: " + ", ".join(propcalc.builtin_names()) in msg


def test_computation_error_names_what_failed_and_a_next_step():
    with pytest.raises(ComputationError) as info:
        propcalc.recommend(activation("step"), depth=3, target="edge")
    msg = str(info.value)
    assert "step" in msg and "try target 'variance'" in msg


def test_nan_never_leaves_through_jsonable():
    # propcalc.jsonable: NaN reaching the output is a bug and raises; inf becomes "inf"
    assert propcalc.jsonable({"a": math.inf, "b": -math.inf, "c": (1, 2)}) == {
        "a": "inf", "b": "-inf", "c": [1, 2]}
    with pytest.raises(ValueError, match="NaN reached the output"):
        propcalc.jsonable({"x": [1.0, math.nan]})


def test_check_finite_refuses_an_integer_beyond_doubles():
    # issue 11 section 2: float(10**400) raises OverflowError, which must not escape
    with pytest.raises(InvalidParameterError) as info:
        check_finite("params.beta", 10**400)
    text = str(info.value)
    assert text.startswith("params.beta must be a finite real number, got 1000")
    assert text.endswith("... (401 characters)")  # the value is shortened, not printed in full
    assert info.value.value == 10**400


def test_a_typo_of_a_choice_gets_the_nearest():
    # issue 12 section 2: "suggest the nearest name (difflib) everywhere"; every engine check
    # that lists its choices ("one of ...") now says which one was probably meant
    err = InvalidParameterError("distribution", "one of normal, uniform, orthogonal", "normall")
    assert str(err) == ("distribution must be one of normal, uniform, orthogonal, got 'normall'; "
                        "did you mean normal?")
    assert str(InvalidParameterError("method", "one of 'tat', 'dks'", "tatt")).endswith(
        "; did you mean tat?")
    assert str(InvalidParameterError("x", "one of a, b", "zzzz")) == "x must be one of a, b, got 'zzzz'"
    assert str(InvalidParameterError("x", "one of a, b", "c", hint="given")).endswith("; given")


def test_the_engine_suggests_the_nearest_choice_at_its_boundaries():
    import propcalc

    for call, hint in [(lambda: propcalc.recommend("tanh", 3, distribution="normall"), "normal"),
                       (lambda: propcalc.recommend("tanh", 3, target="edg"), "edge"),
                       (lambda: propcalc.shape_activation("relu", 10, method="tatt"), "tat"),
                       (lambda: propcalc.network({"blocks": [{"dens": {"width": 3}}]}), "dense"),
                       (lambda: propcalc.network({"blocks": [{"dense": {"widht": 3}}]}),
                        "width")]:
        with pytest.raises(InvalidParameterError, match=rf"; did you mean {hint}\?$"):
            call()


def test_a_missing_field_of_a_network_block_is_said_to_be_missing():
    import propcalc

    with pytest.raises(InvalidParameterError, match=r"^/blocks/0/dense/sigma_w2 must be present "
                                                    r"\(.*\); it is missing$"):
        propcalc.network({"blocks": [{"dense": {}}]})
