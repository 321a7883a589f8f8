"""Tests of propcalc.read_module: torch modules read into network descriptions.

References
----------
* torch's default initialisation, read from torch's own source (``nn.Linear.reset_parameters``,
  ``_ConvNd.reset_parameters``, ``nn.MultiheadAttention._reset_parameters``): weights and
  biases of Linear/Conv ``U(-1/sqrt(fan_in), 1/sqrt(fan_in))``, variance ``1 / (3 fan_in)``
  (the variance of U(-a, a) is a^2 / 3), so sigma_w2 = 1/3; attention projections
  ``xavier_uniform_`` on the (3E, E) matrix, variance 2 / (4E) (Glorot & Bengio 2010), so
  sigma_w2 = 1/2, zero biases.
* Sampling error of a measured sigma_w2: the mean square of n independent entries has relative
  standard error sqrt((k - 1) / n), k the kurtosis (9/5 uniform; Kendall & Stuart vol. 1,
  section 10.5); 5 standard errors are allowed.
* Activations: torch's own modules evaluated on a grid are the reference for the activation
  each one is read as (torch as a reference library).
* Exact identities: a module and a copy of it written another way (nn.TransformerEncoderLayer
  and the same layer written by hand with the same weights; MultiheadAttention and
  scaled_dot_product_attention with the same projections) are read into the same numbers.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import propcalc

torch = pytest.importorskip("torch")
nn = torch.nn
F = torch.nn.functional
torch.set_num_threads(1)

from propcalc.init.torch_reader import ModuleReadError, read_module  # noqa: E402


def kinds(blocks):
    return [next(iter(b)) for b in blocks]


def mlp(widths=(64, 256, 256, 10), act=nn.Tanh, seed=0):
    torch.manual_seed(seed)
    layers = []
    for i, (a, b) in enumerate(zip(widths[:-1], widths[1:])):
        layers.append(nn.Linear(a, b))
        if i < len(widths) - 2:
            layers.append(act())
    return nn.Sequential(*layers)


# ----------------------------------------------------------------- plain stacks and scales
def test_mlp_is_read_block_by_block():
    r = read_module(mlp(), (8, 64))
    assert kinds(r.description["blocks"]) == ["dense", "activation", "dense", "activation",
                                             "dense"]
    assert r.description["input_width"] == 64
    assert [b["dense"]["width"] for b in r.description["blocks"][::2]] == [256, 256, 10]
    assert r.positions == ("_0", "_1", "_2", "_3", "_4")
    assert r.block("/blocks/2").module == "2"
    assert r.network.n_positions == 5


def test_measured_scales_follow_torch_default_law():
    r = read_module(mlp((256, 512, 512)), (4, 256))
    n = 256 * 512
    se = math.sqrt((9 / 5 - 1) / n)  # kurtosis of the uniform law
    sw = r.description["blocks"][0]["dense"]["sigma_w2"]
    assert sw == pytest.approx(1 / 3, rel=5 * se)
    sb = r.description["blocks"][0]["dense"]["sigma_b2"]
    assert sb == pytest.approx(1 / (3 * 256), rel=5 * math.sqrt(0.8 / 512))


def test_default_scales_are_torchs_law_exactly():
    r = read_module(mlp(), (8, 64), scales="default")
    d = r.description["blocks"]
    assert d[0]["dense"]["sigma_w2"] == 1 / 3 and d[0]["dense"]["sigma_b2"] == 1 / (3 * 64)
    assert d[2]["dense"]["sigma_b2"] == 1 / (3 * 256)


def test_measured_scales_are_the_second_moments_of_the_tensors():
    m = mlp()
    with torch.no_grad():
        m[0].weight.normal_(0.0, 0.1)
        m[0].bias.zero_()
    r = read_module(m, (8, 64))
    w = m[0].weight.detach().double()
    assert r.description["blocks"][0]["dense"]["sigma_w2"] == pytest.approx(
        64 * float(w.square().mean()), rel=1e-12)
    assert r.description["blocks"][0]["dense"]["sigma_b2"] == 0.0


def test_orthogonal_weights_are_recognised():
    m = mlp((128, 128, 64))
    nn.init.orthogonal_(m[0].weight, gain=1.3)
    nn.init.orthogonal_(m[2].weight)
    r = read_module(m, (4, 128))
    assert r.description["blocks"][0]["dense"]["weights"] == "orthogonal"
    assert r.description["blocks"][0]["dense"]["sigma_w2"] == pytest.approx(
        1.69, rel=1e-6)  # gain 1.3 squared, float32 weights
    assert r.description["blocks"][2]["dense"]["weights"] == "orthogonal"  # wide: through W^T
    assert "weights" not in read_module(mlp(), (8, 64)).description["blocks"][0]["dense"]


@pytest.mark.parametrize("module, name, params", [
    (nn.ReLU(), "relu", {}), (nn.Tanh(), "tanh", {}), (nn.Sigmoid(), "sigmoid", {}),
    (nn.GELU(), "gelu", {}), (nn.GELU(approximate="tanh"), "gelu_tanh", {}),
    (nn.SiLU(), "silu", {}), (nn.Mish(), "mish", {}), (nn.SELU(), "selu", {}),
    (nn.ELU(alpha=0.7), "elu", {"alpha": 0.7}), (nn.LeakyReLU(0.2), "leaky_relu",
                                                  {"slope": 0.2}),
    (nn.Softplus(beta=2.0), "softplus(beta * x) / beta", {"beta": 2.0}),
    (nn.Hardtanh(-2.0, 3.0), "min(max(x, low), high)", {"low": -2.0, "high": 3.0}),
    (nn.ReLU6(), "min(max(x, low), high)", {"low": 0.0, "high": 6.0}),
    (nn.Softsign(), "x / (1 + abs(x))", {}), (nn.Hardswish(), None, {}),
    (nn.CELU(alpha=0.5), None, {"alpha": 0.5}), (nn.LogSigmoid(), None, {}),
])
def test_activation_modules_compute_what_torch_computes(module, name, params):
    m = nn.Sequential(nn.Linear(8, 8), module)
    r = read_module(m, (2, 8))
    act = r.network.blocks[1].activation
    if name is not None:
        assert r.network.blocks[1].formula == name and dict(r.network.blocks[1].params) == params
    x = np.linspace(-8.0, 8.0, 401)
    want = module(torch.from_numpy(x)).numpy()
    np.testing.assert_allclose(act(x), want, rtol=1e-12, atol=1e-12)


def test_activation_functions_and_methods():
    class Net(nn.Module):
        def __init__(self):
            super().__init__()
            self.a, self.b, self.c, self.d = (nn.Linear(8, 8) for _ in range(4))

        def forward(self, x):
            x = torch.relu(self.a(x))
            x = F.leaky_relu(self.b(x), 0.3)
            x = self.c(x).tanh()
            return F.gelu(self.d(x), approximate="tanh")

    r = read_module(Net(), (2, 8))
    acts = [(b.formula, dict(b.params)) for b in r.network.blocks[1::2]]
    assert acts == [("relu", {}), ("leaky_relu", {"slope": 0.3}), ("tanh", {}),
                    ("gelu_tanh", {})]


# ----------------------------------------------------------------- residual sums and numbers
class Branchy(nn.Module):
    """x -> stem -> (the sum under test) with a branch relu -> linear."""

    def __init__(self, form):
        super().__init__()
        self.form = form
        self.stem, self.fc = nn.Linear(16, 16), nn.Linear(16, 16)
        self.alpha = nn.Parameter(torch.tensor(0.25))
        self.gamma = nn.Parameter(torch.full((16,), 0.1))

    def forward(self, x):
        x = self.stem(x)
        f = self.fc(torch.relu(x))
        if self.form == "plain":
            return x + f
        if self.form == "scaled":
            return x + 0.5 * f
        if self.form == "reversed":
            return f / 4 + x
        if self.form == "alpha":
            return torch.add(x, f, alpha=0.3)
        if self.form == "method":
            return x.add(f)
        if self.form == "minus":
            return x - f
        if self.form == "shortcut":
            return 0.9 * x + f
        if self.form == "rezero":
            return x + self.alpha * f
        if self.form == "layerscale":
            return x + self.gamma * f
        y = x
        y += f
        return y


@pytest.mark.parametrize("form, weight, shortcut", [
    ("plain", 1.0, 1.0), ("scaled", 0.5, 1.0), ("reversed", 0.25, 1.0), ("alpha", 0.3, 1.0),
    ("method", 1.0, 1.0), ("minus", -1.0, 1.0), ("shortcut", 1.0, 0.9), ("rezero", 0.25, 1.0),
    ("layerscale", 0.1, 1.0), ("inplace", 1.0, 1.0)])
def test_residual_sums(form, weight, shortcut):
    r = read_module(Branchy(form), (4, 16))
    res = r.network.blocks[1]
    assert kinds(r.description["blocks"]) == ["dense", "residual"]
    assert res.weight == pytest.approx(weight, rel=1e-6) and res.shortcut == pytest.approx(
        shortcut, rel=1e-12)
    assert kinds(r.description["blocks"][1]["residual"]["branch"]) == ["activation", "dense"]
    assert r.block("/blocks/1/residual/branch/1").module == "fc"


def test_numbers_next_to_layers_become_their_scale():
    class Net(nn.Module):
        def __init__(self):
            super().__init__()
            self.a, self.b = nn.Linear(8, 8), nn.Linear(8, 8)

        def forward(self, x):
            x = torch.tanh(self.a(x) * 2.0)
            return self.b(x / 2.0)

    m = Net()
    r = read_module(m, (2, 8))
    plain = read_module(nn.Sequential(m.a, nn.Tanh(), m.b), (2, 8))
    a, b = r.network.blocks[0], r.network.blocks[2]
    assert a.sigma_w2 == pytest.approx(4 * plain.network.blocks[0].sigma_w2, rel=1e-12)
    assert a.sigma_b2 == pytest.approx(4 * plain.network.blocks[0].sigma_b2, rel=1e-12)
    assert b.sigma_w2 == pytest.approx(plain.network.blocks[2].sigma_w2 / 4, rel=1e-12)
    assert b.sigma_b2 == pytest.approx(plain.network.blocks[2].sigma_b2, rel=1e-12)
    assert r.block("/blocks/0").weight_factor == 4.0 and r.block("/blocks/0").node == "mul"
    assert r.block("/blocks/2").weight_factor == 0.25 and r.block("/blocks/2").bias_factor == 1


# ----------------------------------------------------------------- a residual CNN
class ResCNN(nn.Module):
    """A small pre-activation residual CNN (circular padding), a strided stage, a head."""

    def __init__(self, width=32, blocks=2, weight=0.5):
        super().__init__()
        self.weight = weight
        self.stem = nn.Conv2d(3, width, 3, padding=1, padding_mode="circular")
        conv = lambda: nn.Conv2d(width, width, 3, padding=1, padding_mode="circular")  # noqa
        self.blocks = nn.ModuleList(
            nn.Sequential(nn.BatchNorm2d(width), nn.ReLU(), conv(), nn.BatchNorm2d(width),
                          nn.ReLU(), conv()) for _ in range(blocks))
        self.down = nn.Conv2d(width, 2 * width, 2, stride=2)
        self.head = nn.Linear(2 * width * 16, 10)

    def forward(self, x):
        x = self.stem(x)
        for b in self.blocks:
            x = x + self.weight * b(x)
        x = F.relu(self.down(x))
        return self.head(torch.flatten(F.avg_pool2d(x, 2), 1))


def test_residual_cnn():
    r = read_module(ResCNN(), (2, 3, 16, 16))
    d = r.description
    assert kinds(d["blocks"]) == ["convolution", "residual", "residual", "convolution",
                                  "activation", "pooling", "convolution"]
    assert d["input_width"] == 3
    assert kinds(d["blocks"][1]["residual"]["branch"]) == ["norm", "activation", "convolution",
                                                           "norm", "activation", "convolution"]
    assert d["blocks"][1]["residual"]["weight"] == 0.5
    assert d["blocks"][3]["convolution"]["stride"] == [2, 2]
    assert d["blocks"][5]["pooling"] == {"kind": "average", "window": [2, 2]}
    head = d["blocks"][6]["convolution"]  # a Linear over 4 x 4 positions of 64 channels
    assert head["kernel"] == [4, 4] and head["stride"] == [4, 4] and head["width"] == 10
    assert any("flattened" in n for n in r.notes)
    p = propcalc.network_propagation(d, 1.0, 0.5)
    assert len(p.q) == 8 and all(x is not None for x in p.q)


def test_global_average_and_mean_over_positions():
    class Net(nn.Module):
        def __init__(self, how):
            super().__init__()
            self.how = how
            self.conv, self.fc = nn.Conv2d(4, 16, 3), nn.Linear(16, 5)
            self.pool = nn.AdaptiveAvgPool2d(1)

        def forward(self, x):
            x = F.relu(self.conv(x))
            if self.how == "module":
                x = self.pool(x).flatten(1)
            elif self.how == "mean":
                x = x.mean((2, 3))
            else:
                x = torch.sum(x, dim=(-1, -2)) / 36
            return self.fc(x)

    for how in ("module", "mean", "sum"):
        r = read_module(Net(how), (2, 4, 8, 8))
        assert r.description["blocks"][2] == {"pooling": {"kind": "global_average",
                                                          "positions": 36}}, how
    sum_read = read_module(Net("sum"), (2, 4, 8, 8))
    assert sum_read.network.blocks[3].sigma_w2 == pytest.approx(
        read_module(Net("mean"), (2, 4, 8, 8)).network.blocks[3].sigma_w2, rel=0.3)


# ----------------------------------------------------------------- transformers
class Layer(nn.Module):
    """A transformer-style layer with MultiheadAttention, pre-norm or post-norm."""

    def __init__(self, d=32, heads=4, pre=True, act=nn.GELU):
        super().__init__()
        self.pre = pre
        self.ln1, self.ln2 = nn.LayerNorm(d), nn.LayerNorm(d)
        self.att = nn.MultiheadAttention(d, heads, batch_first=True)
        self.ff = nn.Sequential(nn.Linear(d, 4 * d), act(), nn.Linear(4 * d, d))

    def forward(self, x):
        if self.pre:
            y = self.ln1(x)
            x = x + self.att(y, y, y, need_weights=False)[0]
            return x + self.ff(self.ln2(x))
        x = self.ln1(x + self.att(x, x, x)[0])
        return self.ln2(x + self.ff(x))


def test_pre_norm_and_post_norm_stacks():
    pre = read_module(nn.Sequential(Layer(), Layer()), (2, 12, 32))
    assert kinds(pre.description["blocks"]) == ["residual"] * 4
    branch = pre.description["blocks"][0]["residual"]["branch"]
    assert kinds(branch) == ["norm", "attention"]
    att = branch[1]["attention"]
    assert (att["tokens"], att["heads"], att["width"]) == (12, 4, 32)
    se = 5 * math.sqrt(0.8 / (32 * 32))
    assert att["value_sigma_w2"] == pytest.approx(0.5, rel=se)  # Xavier: 2 / (E + 3E) * E
    assert att["query_key_sigma_w2"] == pytest.approx(0.5, rel=se)
    assert att["output_sigma_w2"] == pytest.approx(1 / 3, rel=se)  # Linear's default
    assert "sigma_b2" not in att  # zero biases
    post = read_module(nn.Sequential(Layer(pre=False), Layer(pre=False)), (2, 12, 32))
    assert kinds(post.description["blocks"]) == ["residual", "norm"] * 4
    assert post.positions == ("add", "_0_ln1", "add_1", "_0_ln2", "add_2", "_1_ln1", "add_3",
                              "_1_ln2")
    p = propcalc.network_propagation(post.description, 1.0, 0.3, c0_within=0.2,
                                     c0_between=0.1)
    assert p.q[2] == pytest.approx(1.0, rel=1e-4)  # layer norm resets q (gain 1, eps 1e-5)


def test_encoder_layer_is_written_out_as_the_same_layer_by_hand():
    torch.manual_seed(3)
    for norm_first in (True, False):
        enc = nn.TransformerEncoderLayer(32, 4, 64, dropout=0.0, activation="gelu",
                                         batch_first=True, norm_first=norm_first)
        hand = Layer(32, 4, pre=norm_first)
        hand.ff = nn.Sequential(enc.linear1, nn.GELU(), enc.linear2)
        hand.att, hand.ln1, hand.ln2 = enc.self_attn, enc.norm1, enc.norm2
        a = read_module(nn.Sequential(enc), (2, 10, 32))
        b = read_module(hand, (2, 10, 32))
        assert a.description == b.description
        assert a.positions[-1] == "_0" and a.positions[0] == ""
        ff = "/blocks/1/residual/branch/1" if norm_first else "/blocks/2/residual/branch/0"
        assert a.block(ff).module == "0.linear1"
    stack = nn.TransformerEncoder(nn.TransformerEncoderLayer(32, 4, 64, batch_first=True), 3,
                                  norm=nn.LayerNorm(32), enable_nested_tensor=False)
    r = read_module(stack, (2, 10, 32))
    assert r.network.n_positions == 3 * 4 + 1
    assert kinds(r.description["blocks"][0]["residual"]["branch"]) == ["attention", "dropout"]
    assert any("attention weights" in n for n in r.notes)
    assert r.block("/blocks/0/residual/branch/0").roles == {"output": "layers.0.self_attn.out_proj"}


class Handmade(nn.Module):
    """Self-attention by scaled_dot_product_attention over a fused q, k, v projection."""

    def __init__(self, d=32, heads=4):
        super().__init__()
        self.heads = heads
        self.qkv, self.out = nn.Linear(d, 3 * d), nn.Linear(d, d)

    def forward(self, x):
        n, t, d = x.shape
        q, k, v = self.qkv(x).view(n, t, 3, self.heads, d // self.heads).permute(
            2, 0, 3, 1, 4).unbind(0)
        a = F.scaled_dot_product_attention(q, k, v)
        return x + self.out(a.transpose(1, 2).reshape(n, t, d))


def test_scaled_dot_product_attention_reads_as_multihead_attention():
    mha = nn.MultiheadAttention(32, 4, batch_first=True)
    hand = Handmade()
    with torch.no_grad():
        hand.qkv.weight.copy_(mha.in_proj_weight)
        hand.qkv.bias.copy_(mha.in_proj_bias)
        hand.out.weight.copy_(mha.out_proj.weight)
        hand.out.bias.copy_(mha.out_proj.bias)

    class Wrapped(nn.Module):
        def __init__(self):
            super().__init__()
            self.mha = mha

        def forward(self, x):
            return x + self.mha(x, x, x)[0]

    a = read_module(hand, (2, 9, 32)).description
    b = read_module(Wrapped(), (2, 9, 32)).description
    att_a = a["blocks"][0]["residual"]["branch"][0]["attention"]
    att_b = b["blocks"][0]["residual"]["branch"][0]["attention"]
    assert att_a.keys() == att_b.keys()
    for key in att_a:
        assert att_a[key] == pytest.approx(att_b[key], rel=1e-12), key


# ----------------------------------------------------------------- refusals
class Two(nn.Module):
    def __init__(self, kind):
        super().__init__()
        self.kind = kind
        self.a, self.b = nn.Linear(8, 8), nn.Linear(8, 8)
        self.mha = nn.MultiheadAttention(8, 2, batch_first=True)
        self.gn = nn.GroupNorm(2, 8)
        self.pos = nn.Parameter(torch.zeros(8))

    def forward(self, x):
        if self.kind == "groupnorm":
            return self.gn(self.a(x).transpose(1, 2))
        if self.kind == "projection":
            return self.a(x) + self.b(torch.relu(x))
        if self.kind == "product":
            return self.a(x) * self.b(x)
        if self.kind == "shift":
            return self.a(x + self.pos)
        if self.kind == "mask":
            return self.mha(x, x, x, attn_mask=torch.ones(5, 5, dtype=torch.bool))[0]
        if self.kind == "cross":
            return self.mha(x, self.a(x), self.a(x))[0]
        if self.kind == "index":
            return self.a(x[:, 0])
        if self.kind == "control":
            return self.a(x) if x.sum() > 0 else self.b(x)
        if self.kind == "softmax":
            return torch.softmax(self.a(x), -1)
        return self.a(x) * 3.0 + 1.0


@pytest.mark.parametrize("kind, node, words", [
    ("groupnorm", "gn", "GroupNorm"),
    ("projection", "add", "neither operand of the sum is the other's shortcut"),
    ("product", "mul", "not a number"),
    ("shift", "add", "does not come from the input"),
    ("mask", "mha", "attn_mask"),
    ("cross", "mha", "not self-attention"),
    ("index", "getitem", "indexing the stream"),
    ("control", "", "symbolic tracing failed"),
    ("softmax", "softmax", "propcalc reads"),
    ("offset", "add", "does not come from the input"),
])
def test_refusals_name_the_node(kind, node, words):
    with pytest.raises(ModuleReadError, match=words) as info:
        read_module(Two(kind), (2, 5, 8))
    assert info.value.node == node
    assert isinstance(info.value, propcalc.PropcalcError) and isinstance(info.value, ValueError)


def test_bad_arguments():
    with pytest.raises(propcalc.InvalidParameterError, match="module must be a torch.nn.Module"):
        read_module(object(), (2, 8))
    with pytest.raises(propcalc.InvalidParameterError, match="scales must be one of"):
        read_module(mlp(), (8, 64), scales="guessed")
    with pytest.raises(propcalc.InvalidParameterError, match="example must be a shape"):
        read_module(mlp(), (8, 0))
    with pytest.raises(propcalc.InvalidParameterError, match="at most"):
        read_module(mlp(), (1 << 20, 64))
    with pytest.raises(ModuleReadError, match="does not run through it"):
        read_module(mlp(), (8, 63))
    bare = read_module(nn.Linear(4, 8), (2, 4))  # a torch.nn module is traced from outside
    assert bare.blocks[0].module == "" and bare.positions == ("wrapped_root",)
    zero = mlp()
    nn.init.zeros_(zero[2].weight)
    with pytest.raises(ModuleReadError, match="zero-initialised") as info:
        read_module(zero, (8, 64))
    assert info.value.node == "_2"


def test_reading_leaves_the_module_as_it_was():
    m = nn.Sequential(nn.Linear(8, 8), nn.BatchNorm1d(8), nn.Dropout(0.2), nn.Linear(8, 8))
    m.eval()
    before = {k: v.clone() for k, v in m.state_dict().items()}
    r = read_module(m, (16, 8))
    assert not any(x.training for x in m.modules())
    for k, v in m.state_dict().items():
        assert torch.equal(v, before[k]), k
    assert kinds(r.description["blocks"]) == ["dense", "norm", "dropout", "dense"]
    assert r.description["blocks"][2] == {"dropout": {"keep_rate": 0.8}}
