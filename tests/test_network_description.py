"""The network description format: validation, error paths, round trips, limits, schema.

The format is ours (propcalc.networks.fields); the references here are the format's own
rules as documented there, and RFC 6901 for JSON pointer escaping.
"""

from __future__ import annotations

import json

import pytest

import propcalc
from propcalc.networks import (
    Attention,
    Convolution,
    Dense,
    Network,
    NetworkDescriptionError,
    Pooling,
    description_fields,
    description_schema,
    network,
)
from propcalc.networks.fields import (
    BLOCK_SPECS,
    MAX_DESCRIBED_BLOCKS,
    MAX_EXPANDED_BLOCKS,
    MAX_NESTING,
    MAX_POSITIONS,
)

DENSE = {"dense": {"sigma_w2": 2.0, "sigma_b2": 0.0}}
RELU = {"activation": "relu"}


def _every_kind() -> dict:
    return {"input_width": 64, "blocks": [
        {"dense": {"sigma_w2": 2.0, "sigma_b2": 0.1, "width": 64, "weights": "orthogonal"}},
        {"activation": {"formula": "leaky_relu", "params": {"slope": 0.1}}},
        {"repeat": {"times": 3, "blocks": [
            {"residual": {"branch": [{"norm": "layer"}, DENSE, RELU,
                                     {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 64}}],
                          "weight": 0.25, "shortcut": 0.9}}]}},
        {"attention": {"tokens": 16, "heads": 4, "width": 64, "query_key_scale": 0.5,
                       "value_sigma_w2": 1.5}},
        {"norm": {"kind": "rms", "gain": 2.0, "eps": 1e-5}},
        {"convolution": {"sigma_w2": 2.0, "sigma_b2": 0.0, "kernel": [3, 3], "stride": 2,
                         "width": 32, "weights": "delta_orthogonal"}},
        {"pooling": {"kind": "average", "window": [2, 2]}},
        {"pooling": {"kind": "max", "window": 3, "stride": 2}},
        {"dropout": {"keep_rate": 0.9}},
        {"norm": "batch"},
        {"pooling": {"kind": "global_average", "positions": 49}},
        {"activation": "x * tanh(softplus(x))"},
    ]}


def test_every_block_kind_parses_and_round_trips():
    # the format's rule: network(net.describe()) == net, and describe() is JSON as given
    net = network(_every_kind())
    again = network(json.loads(json.dumps(net.describe())))
    assert again == net
    assert again.describe() == net.describe()
    kinds = {b.KIND for b in net.blocks}
    assert kinds == set(BLOCK_SPECS) - {"residual"} | {"repeat"}
    conv = net.blocks[5]
    assert isinstance(conv, Convolution)
    assert conv.kernel == (3, 3) and conv.stride == (2, 2) and conv.taps == 9
    pool = net.blocks[7]
    assert isinstance(pool, Pooling) and pool.window == (3,) and pool.stride == (2,)


def test_counts_expand_repeats_and_count_residuals_once():
    net = network({"blocks": [DENSE, {"repeat": {"times": 48, "blocks": [
        {"residual": {"branch": [DENSE, RELU, DENSE], "weight": 0.1}}, RELU]}}]})
    # the contract: a residual block is one position whatever its branch holds
    assert net.n_positions == 1 + 48 * 2
    assert net.n_expanded_blocks == 1 + 48 * (1 + 3 + 1)
    infos = list(net.positions())
    assert [p.index for p in infos] == list(range(1, 98))
    assert infos[1].path == "/blocks/1/repeat/blocks/0" and infos[1].repetitions == (0,)
    assert infos[-1].path == "/blocks/1/repeat/blocks/1" and infos[-1].repetitions == (47,)
    assert infos[-1].label == "/blocks/1/repeat/blocks/1 (copy 48)"


def test_defaults_and_shorthands():
    net = network({"blocks": [RELU, {"norm": "layer"},
                              {"residual": {"branch": [DENSE]}}, {"attention": {"tokens": 4}}]})
    assert net.blocks[0].activation is propcalc.activation("relu")
    assert net.blocks[1].gain == 1.0 and net.blocks[1].eps == 0.0
    assert net.blocks[2].weight == 1.0 and net.blocks[2].shortcut == 1.0
    att = net.blocks[3]
    assert att == Attention(tokens=4)
    assert net.describe()["blocks"][1] == {"norm": "layer"}
    assert net.describe()["blocks"][3] == {"attention": {"tokens": 4}}


def test_network_passes_a_network_through():
    net = network({"blocks": [DENSE]})
    assert network(net) is net
    assert isinstance(net.blocks[0], Dense) and net.blocks[0].width is None


@pytest.mark.parametrize(("description", "path", "words"), [
    ({"blocks": [{"dense": {"sigma_w2": -1.0, "sigma_b2": 0.0}}]},
     "/blocks/0/dense/sigma_w2", "> 0"),
    ({"blocks": [DENSE, DENSE, DENSE, {"residual": {"branch": [
        {"dense": {"sigma_w2": "2", "sigma_b2": 0.0}}]}}]},
     "/blocks/3/residual/branch/0/dense/sigma_w2", "a finite real number"),
    ({"blocks": [{"residual": {"branch": [RELU]}}]}, "/blocks/0/residual/branch",
     "dense, convolution or attention"),
    ({"blocks": [{"activation": "relux"}]}, "/blocks/0/activation/formula", "did you mean relu"),
    ({"blocks": [{"activation": {"formula": "x * a", "params": {"a": float("inf")}}}]},
     "/blocks/0/activation/params/a", "finite"),
    ({"blocks": [{"activation": {"formula": "x * a", "params": {"a/b": 1.0}}}]},
     "/blocks/0/activation/params/a~1b", "identifier"),
    ({"blocks": [{"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0}, "x": 1}]}, "/blocks/0",
     "exactly one key"),
    ({"blocks": [{"conv": {}}]}, "/blocks/0/conv", "block kind"),
    ({"blocks": [{"dense": {"sigma_w2": 1.0}}]}, "/blocks/0/dense/sigma_b2", "present"),
    ({"blocks": [{"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "bias": 0}}]},
     "/blocks/0/dense/bias", "a field of dense"),
    ({"blocks": [{"dense": {"sigma_w2": True, "sigma_b2": 0.0}}]}, "/blocks/0/dense/sigma_w2",
     "a finite real number"),
    ({"blocks": [{"dense": {"sigma_w2": float("nan"), "sigma_b2": 0.0}}]},
     "/blocks/0/dense/sigma_w2", "a finite real number"),
    # the bounds of propcalc.domains (sigma_w2 in [1e-6, 1e4])
    ({"blocks": [{"dense": {"sigma_w2": 1e300, "sigma_b2": 0.0}}]},
     "/blocks/0/dense/sigma_w2", "in [1e-6, 10000]"),
    ({"blocks": [{"dense": {"sigma_w2": 1.0, "sigma_b2": 1e-300}}]},
     "/blocks/0/dense/sigma_b2", "0 or in [1e-100, 10000]"),
    ({"blocks": [{"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 2.5}}]},
     "/blocks/0/dense/width", "integer"),
    ({"blocks": [{"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 10**400}}]},
     "/blocks/0/dense/width", "integer"),
    ({"blocks": []}, "/blocks", "non-empty list"),
    ({"blocks": "dense"}, "/blocks", "non-empty list"),
    ({"layers": []}, "/layers", "top-level field"),
    ({}, "/blocks", "present"),
    ([DENSE], "", "object"),
    ({"blocks": [{"norm": "group"}]}, "/blocks/0/norm/kind", '"layer", "rms", "batch"'),
    ({"blocks": [{"norm": 3}]}, "/blocks/0/norm", "a string or an object"),
    ({"blocks": [{"dropout": {"keep_rate": 0.0}}]}, "/blocks/0/dropout/keep_rate", "in (0, 1]"),
    ({"blocks": [{"dropout": {"keep_rate": 1.5}}]}, "/blocks/0/dropout/keep_rate", "in (0, 1]"),
    ({"blocks": [{"dropout": {"keep_rate": 1e-4}}]}, "/blocks/0/dropout/keep_rate",
     "in [0.001, 1]"),
    ({"blocks": [{"repeat": {"times": 0, "blocks": [DENSE]}}]}, "/blocks/0/repeat/times", ">= 1"),
    ({"blocks": [{"convolution": {"sigma_w2": 1.0, "sigma_b2": 0.0, "kernel": [3, 3],
                                  "stride": [1, 2, 3]}}]}, "/blocks/0/convolution/stride",
     "one size or 2 sizes"),
    ({"blocks": [{"convolution": {"sigma_w2": 1.0, "sigma_b2": 0.0, "kernel": [3, 0]}}]},
     "/blocks/0/convolution/kernel/1", ">= 1"),
    ({"blocks": [{"convolution": {"sigma_w2": 1.0, "sigma_b2": 0.0,
                                  "kernel": [3, 3, 3, 3]}}]}, "/blocks/0/convolution/kernel",
     "1 to 3 integers"),
    ({"blocks": [{"pooling": {"kind": "global_average"}}]}, "/blocks/0/pooling/positions",
     "present"),
    ({"blocks": [{"pooling": {"kind": "average"}}]}, "/blocks/0/pooling/window", "present"),
    ({"blocks": [{"pooling": {"kind": "average", "window": 2, "positions": 4}}]},
     "/blocks/0/pooling/positions", "absent"),
    ({"blocks": [{"pooling": {"kind": "max", "window": 2, "stride": 3}}]},
     "/blocks/0/pooling/stride", "at most the window"),
    ({"blocks": [{"attention": {"tokens": 8, "heads": 3, "width": 64}}]},
     "/blocks/0/attention/width", "multiple of heads"),
    ({"blocks": [{"attention": {"tokens": 8, "query_key_scale": -1.0}}]},
     "/blocks/0/attention/query_key_scale", ">= 0"),
    ({"input_width": 16, "blocks": [{"residual": {"branch": [
        {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 32}}]}}]},
     "/blocks/0/residual/branch", "output width equals its input width (16)"),
])
def test_errors_name_path_constraint_and_value(description, path, words):
    with pytest.raises(NetworkDescriptionError, match=None) as info:
        network(description)
    err = info.value
    assert err.path == path
    assert words in str(err)
    assert isinstance(err, propcalc.InvalidParameterError)  # the service maps these to problems
    if path:
        assert str(err).startswith(path + " must be")


def test_limits_on_size_and_nesting():
    nested: dict = {"blocks": [DENSE]}
    for _ in range(MAX_NESTING + 1):
        nested = {"blocks": [{"repeat": {"times": 1, "blocks": nested["blocks"]}}]}
    with pytest.raises(NetworkDescriptionError, match="nested at most"):
        network(nested)
    with pytest.raises(NetworkDescriptionError, match=f"at most {MAX_DESCRIBED_BLOCKS} blocks"):
        network({"blocks": [RELU] * (MAX_DESCRIBED_BLOCKS + 1)})
    big = {"blocks": [{"repeat": {"times": 100_000, "blocks": [
        {"repeat": {"times": 100_000, "blocks": [RELU]}}]}}]}
    with pytest.raises(NetworkDescriptionError, match=f"at most {MAX_POSITIONS} stream") as info:
        network(big)
    assert info.value.path == "/blocks" and "10000000000 positions" in str(info.value)
    wide = {"blocks": [{"repeat": {"times": 90_000, "blocks": [
        {"residual": {"branch": [DENSE] * 20}}]}}]}
    with pytest.raises(NetworkDescriptionError, match=f"at most {MAX_EXPANDED_BLOCKS} elementary"):
        network(wide)


def test_formula_is_compiled_not_evaluated():
    # no eval of user text: an attribute access is refused by the formula reader
    with pytest.raises(NetworkDescriptionError) as info:
        network({"blocks": [{"activation": "__import__('os').system('true')"}]})
    assert info.value.path == "/blocks/0/activation/formula"


def test_schema_describes_every_field_of_the_table():
    schema = description_schema()
    assert schema["$schema"].endswith("2020-12/schema")
    assert set(schema["$defs"]) == set(BLOCK_SPECS) | {"blocks"}
    for kind, spec in BLOCK_SPECS.items():
        body = schema["$defs"][kind]["properties"][kind]
        if spec.shorthand:
            body = body["oneOf"][1]
        assert set(body["properties"]) == {f.name for f in spec.fields}
        assert set(body["required"]) == {f.name for f in spec.fields if f.required}
        assert body["additionalProperties"] is False
    dense = schema["$defs"]["dense"]["properties"]["dense"]["properties"]
    assert dense["sigma_w2"]["minimum"] == propcalc.domains.SIGMA_W2_MIN  # propcalc.domains
    assert dense["sigma_b2"]["anyOf"][0] == {"const": 0}
    json.dumps(schema)  # plain JSON
    rows = description_fields()
    assert {(r["kind"], r["field"]) for r in rows} == {
        (k, f.name) for k, s in BLOCK_SPECS.items() for f in s.fields}


def test_schema_accepts_what_the_validator_accepts():
    jsonschema = pytest.importorskip("jsonschema")  # shipped with the test tools
    validator = jsonschema.Draft202012Validator(description_schema())
    validator.validate(_every_kind())
    assert list(validator.iter_errors({"blocks": [{"dense": {"sigma_w2": 0.0,
                                                             "sigma_b2": 0.0}}]}))
    assert isinstance(network(_every_kind()), Network)
