"""Layers as the user describes them (issue 12, section 2).

Sources: issue 12 section 2 ("conv layers whose channels do not chain (--conv 3:64:3x3 --conv
32:64:3x3) are accepted"; "module_layers silently skips LayerNorm and other layers it does not
model: warn, naming them"; "Layer for a Conv2d(3, 16, 3) reads in_features=27,
out_features=16: name fans as fans"). Fans of a convolution: fan_in = in_channels * prod(kernel),
fan_out = out_channels * prod(kernel) (He et al. 2015, section 2.2; torch.nn.init's
_calculate_fan_in_and_fan_out computes the same, checked below when torch is installed).
"""

from __future__ import annotations

import warnings

import pytest

import propcalc
from propcalc import InvalidParameterError, Layer

from cli_helpers import run


def test_a_convolution_reads_in_fans_and_channels() -> None:
    layer = Layer.conv(3, 16, (3, 3))
    assert repr(layer) == ("Layer(fan_in=27, fan_out=144, kind='conv', weight_shape=(16, 3, 3, 3), "
                           "kernel_size=(3, 3))")
    assert "in_features" not in repr(layer) and "out_features" not in repr(layer)
    assert (layer.in_channels, layer.out_channels) == (3, 16)
    assert "in_features" not in layer.to_dict()
    dense = Layer.dense(784, 512)
    assert (dense.fan_in, dense.fan_out, dense.in_channels, dense.out_channels) == (784, 512,
                                                                                    784, 512)


def test_fans_agree_with_torch() -> None:
    torch = pytest.importorskip("torch")
    from torch.nn.init import _calculate_fan_in_and_fan_out

    conv = torch.nn.Conv2d(3, 16, 3)
    layer = Layer.conv(3, 16, (3, 3))
    assert _calculate_fan_in_and_fan_out(conv.weight) == (layer.fan_in, layer.fan_out) == (27, 144)
    assert tuple(conv.weight.shape) == layer.weight_shape


def test_a_plain_stack_must_chain() -> None:
    ok = Layer.chain([Layer.conv(3, 64, (3, 3)), Layer.conv(64, 64, (3, 3)),
                      Layer.dense(1024, 10)])  # a flattening before the dense layer: unchecked
    assert len(ok) == 3
    with pytest.raises(InvalidParameterError, match=r"^layers\[1\] must be a layer with 64 input "
                                                    r"channels, the outputs of layers\[0\], in a "
                                                    r"plain stack, got 32$"):
        Layer.chain([Layer.conv(3, 64, (3, 3)), Layer.conv(32, 64, (3, 3))])
    with pytest.raises(InvalidParameterError, match=r"^layers\[2\] must be a layer with 10 "
                                                    r"inputs"):
        Layer.chain([Layer.dense(5, 7), Layer.dense(7, 10), Layer.dense(12, 3)])
    with pytest.raises(InvalidParameterError, match=r"^layers\[0\] must be a Layer"):
        Layer.chain(["dense"])  # type: ignore[list-item]


def test_the_command_line_refuses_conv_layers_that_do_not_chain() -> None:
    code, out, err = run("plan", "tanh", "--conv", "3:64:3x3", "--conv", "32:64:3x3")
    assert code == 2 and out == ""
    assert "--conv[1] must be a layer with 64 input channels, the outputs of --conv[0]" in err
    code, out, _ = run("plan", "tanh", "--conv", "3:64:3x3", "--conv", "64:64:3x3", "--json")
    assert code == 0


def test_the_service_refuses_layers_that_do_not_chain() -> None:
    pytest.importorskip("flask")
    from propcalc_api import create_app

    client = create_app().test_client()
    conv = lambda i, o: {"kind": "conv", "in_channels": i, "out_channels": o,  # noqa: E731
                         "kernel_size": [3, 3]}
    r = client.post("/v1/plan", json={"activation": "tanh", "layers": [conv(3, 64), conv(32, 64)]})
    assert r.status_code == 422
    [entry] = r.get_json()["errors"]
    assert entry["pointer"] == "/layers/1" and "64 input channels" in entry["detail"]


def test_module_layers_names_the_layers_it_skips() -> None:
    torch = pytest.importorskip("torch")
    from propcalc.init.torch_adapter import UnmodelledLayerWarning, module_layers

    nn = torch.nn
    model = nn.Sequential(nn.Linear(4, 8), nn.LayerNorm(8), nn.Tanh(), nn.Dropout(0.1),
                          nn.Linear(8, 8), nn.Tanh(), nn.Linear(8, 2))
    with pytest.warns(UnmodelledLayerWarning, match=r"the plan does not model LayerNorm '1', "
                                                    r"Dropout '3': use propcalc.plan_module"):
        layers = module_layers(model)
    assert [la.weight_shape for la in layers] == [(8, 4), (8, 8), (2, 8)]
    plain = nn.Sequential(nn.Conv2d(3, 16, 3), nn.Tanh(), nn.Flatten(), nn.Linear(64, 10))
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # activations and reshapes are what the plan models
        assert len(module_layers(plain)) == 2
    assert propcalc.recommend("tanh", layers=module_layers(plain)).depth == 2
