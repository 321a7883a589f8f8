"""The resolver: names in any spelling, the nearest name for a typo, wrong types named.

Sources: issue 12 section 2 (``show Gelu`` answered "did you mean elu?", ``show leaky-relu``
answered with a formula error about 'leaky', "gleu" got no suggestion) and issue 13 (every
public analysis accepts a name, a formula or an Activation; a wrong type gets a PropcalcError
naming the parameter). The expected spellings are common practice, no source.
"""

from __future__ import annotations

import pytest

import propcalc
from propcalc.activations import (builtin_names, canonical_builtin_name, did_you_mean,
                                  nearest_name, resolve)
from propcalc.errors import (ActivationTypeError, FormulaError, InvalidParameterError,
                             PropcalcError, UnknownActivationError)


@pytest.mark.parametrize("typed, name", [
    ("Gelu", "gelu"), ("GELU", "gelu"), ("TANH", "tanh"), ("Relu", "relu"),
    ("leaky-relu", "leaky_relu"), ("Leaky-ReLU", "leaky_relu"), ("leaky relu", "leaky_relu"),
    ("LEAKY_RELU", "leaky_relu"), ("hardtanh", "hard_tanh"), ("Hard-Tanh", "hard_tanh"),
    ("gelu-tanh", "gelu_tanh"), (" SiLU ", "silu"), ("Softplus", "softplus"),
])
def test_spellings_of_builtin_names_resolve_to_the_builtin(typed: str, name: str) -> None:
    assert canonical_builtin_name(typed) == name
    assert resolve(typed) is propcalc.activation(name)
    assert propcalc.activation(typed) is propcalc.activation(name)


def test_spellings_keep_the_parameters() -> None:
    act = propcalc.activation("Leaky-ReLU", slope=0.2)
    assert act is propcalc.activation("leaky_relu", slope=0.2)
    assert act.label == "leaky_relu(slope=0.2)"


@pytest.mark.parametrize("text", ["x * tanh(x)", "tanh(x)", "x", "s - elu", "", "relu(x)", 3])
def test_formulas_and_non_names_are_not_builtin_names(text: object) -> None:
    assert canonical_builtin_name(text) is None  # type: ignore[arg-type]


@pytest.mark.parametrize("typed, nearest", [
    ("gleu", "gelu"), ("tanhh", "tanh"), ("leaky_rel", "leaky_relu"), ("sigmiod", "sigmoid"),
    ("hard-tan", "hard_tanh"), ("swsh", "swish"), ("Gelu", "gelu"), ("softmax", None),
])
def test_nearest_name(typed: str, nearest: str | None) -> None:
    assert nearest_name(typed, builtin_names()) == nearest


def test_did_you_mean_reads_as_a_hint() -> None:
    assert did_you_mean("gleu", builtin_names()) == " (did you mean gelu?)"
    assert did_you_mean("zzzz", builtin_names()) == ""
    assert nearest_name("plann", ["plan", "report", "edge"]) == "plan"  # any vocabulary
    assert nearest_name("x", []) is None


def test_unknown_names_suggest_the_nearest_builtin() -> None:
    with pytest.raises(UnknownActivationError, match=r"unknown activation 'gleu' \(did you mean gelu\?\)"):
        propcalc.activation("gleu")
    with pytest.raises(UnknownActivationError, match=r"unknown activation 'Gleu' \(did you mean gelu\?\)"):
        resolve("Gleu")


@pytest.mark.parametrize("spec", [3, 1.5, None, ["tanh"], b"tanh", {"name": "tanh"}])
def test_wrong_types_name_the_parameter(spec: object) -> None:
    with pytest.raises(ActivationTypeError) as info:
        resolve(spec, field="phi")
    err = info.value
    assert isinstance(err, InvalidParameterError) and isinstance(err, UnknownActivationError)
    assert isinstance(err, TypeError) and isinstance(err, PropcalcError)
    assert err.field == "phi" and err.value == spec
    assert str(err).startswith("phi must be a name or formula string, or an Activation, got ")


def test_parameters_with_an_activation_object_are_refused() -> None:
    act = propcalc.activation("tanh")
    assert resolve(act) is act
    with pytest.raises(InvalidParameterError, match=r"params must be empty when an Activation "
                                                    r"object is given"):
        resolve(act, slope=0.1)


def test_formulas_resolve_and_keep_their_errors() -> None:
    assert resolve("x * sigmoid(beta * x)", beta=1.5).params == {"beta": 1.5}
    with pytest.raises(FormulaError, match="unknown function 'Tanh' at column 1 "
                                           r"\(did you mean tanh\?\)"):
        resolve("Tanh(x)")


def test_unknown_builtin_parameters_suggest_the_nearest() -> None:
    with pytest.raises(InvalidParameterError, match=r"params.slop must be a parameter of leaky_relu "
                                                    r"\(slope\), got 0.1; did you mean slope\?"):
        propcalc.activation("leaky_relu", slop=0.1)
    with pytest.raises(InvalidParameterError) as info:  # nothing close: no hint (service text)
        propcalc.activation("leaky_relu", alpha=0.1)
    assert str(info.value) == "params.alpha must be a parameter of leaky_relu (slope), got 0.1"


def test_canonical_name_works_for_any_vocabulary() -> None:
    from propcalc.activations import canonical_name

    assert canonical_name("Edge-Of-Chaos", ["edge_of_chaos", "plan"]) == "edge_of_chaos"
    assert canonical_name("edgeofchaos", ["edge_of_chaos"]) == "edge_of_chaos"
    assert canonical_name("edge of", ["edge_of_chaos"]) is None


def test_builtin_activation_itself_suggests() -> None:
    from propcalc.activations import builtin_activation

    with pytest.raises(UnknownActivationError, match=r"unknown activation 'gleu' \(did you mean "
                                                     r"gelu\?\); built-ins are"):
        builtin_activation("gleu")


def test_very_long_names_are_refused_by_the_length_limit() -> None:
    # a megabyte of letters is neither matched nor echoed back (common practice, no source)
    with pytest.raises(FormulaError, match=r"formula is 1000000 characters long; the limit is 500"):
        propcalc.activation("a" * 10**6)
