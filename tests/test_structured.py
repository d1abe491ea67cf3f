"""Structured derivatives: the rule each leaf gets, and exactness on models that exercise them.

Every kernel is compared with the dense whole-batch jax.jacrev reference in float64 (rtol 1e-10);
the rule per leaf is what the structured-derivatives method prescribes for the consuming
primitive (Novak, Sohl-Dickstein & Schoenholz, ICML 2022, arXiv:2206.08720), or the fallback.
"""

from __future__ import annotations

import equinox as eqx
import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np
import pytest
from flax import nnx
from helpers import FIXED_RATES, MLP, ZOO, _nnx64, assert_close, f64, reduce_mode, reference_full
from jax import lax

import ntkcalc

MODES = ["full", "trace", "diagonal", "logit-sum"]


def rules(net, x):
    p = ntkcalc.plan(net, x, method="structured", outputs="full")
    return {leaf.name: leaf.rule for leaf in p.leaves}


class Convs(nn.Module):
    """Depthwise, dilated and strided convolutions (all with biases)."""

    @nn.compact
    def __call__(self, x):
        x = nn.tanh(nn.Conv(4, (3, 3), strides=(2, 1), padding="SAME")(x))
        x = nn.tanh(nn.Conv(4, (2, 2), feature_group_count=4, name="depthwise")(x))
        x = nn.tanh(nn.Conv(6, (2, 3), kernel_dilation=(2, 2), padding="VALID",
                            name="dilated")(x))
        return nn.Dense(2)(x.reshape(x.shape[0], -1))


class Encoder(nn.Module):
    """A transformer encoder block: token embedding, multi-head attention, LayerNorm, MLP."""

    @nn.compact
    def __call__(self, tokens):
        h = nn.Embed(13, 8)(tokens)
        h = h + nn.MultiHeadDotProductAttention(num_heads=2, name="attn")(nn.LayerNorm()(h))
        h = h + nn.Dense(8)(nn.gelu(nn.Dense(16)(nn.LayerNorm()(h))))
        return nn.Dense(3)(h)  # (batch, tokens, 3): O = 3·tokens outputs


def transposed_apply(p, x):
    """A parameter used transposed, one broadcast before use, one used nonlinearly (must fall
    back), one closed over by a scan (a sum over steps, like the positions of a conv)."""
    h = jnp.tanh(x @ p["w_t"].T)  # stored (out, in)
    h = h * jnp.broadcast_to(p["gain"], h.shape)  # broadcast chain
    h = h * jnp.exp(p["log_scale"])[None]  # nonlinear use

    def step(c, _):
        return jnp.tanh(c @ p["w_rec"]), None

    h, _ = jax.lax.scan(step, h, None, length=2)
    return h @ p["v"]


def _transposed_net():
    r = np.random.default_rng(5)
    params = {
        "w_t": r.normal(size=(6, 4)) / 2, "gain": r.normal(size=(6,)),
        "log_scale": r.normal(size=(6,)) / 3, "w_rec": r.normal(size=(6, 6)) / 3,
        "v": r.normal(size=(6, 2)),
    }
    return ntkcalc.Net(transposed_apply, params)


def lookup_apply(p, tokens):
    """Embedding lookups three ways: jnp.take with negative indices (wrapped), a clipped lookup
    with out-of-range indices, and a table tied to the output projection (lookup + matmul)."""
    e = jnp.take(p["table"], tokens, axis=0)  # (batch, T, D)
    c = jnp.take(p["clipped"], tokens + 3, axis=0, mode="clip")
    h = jnp.tanh(e + c).mean(axis=1)
    logits = h @ p["tied"].T  # (batch, V): the tied table as the output layer
    return logits + jnp.tanh(jnp.take(p["tied"], tokens[:, 0], axis=0)).sum(-1, keepdims=True)


def _lookup_net():
    r = np.random.default_rng(11)
    params = {"table": r.normal(size=(7, 3)), "clipped": r.normal(size=(7, 3)),
              "tied": r.normal(size=(7, 3))}
    return ntkcalc.Net(lookup_apply, params)


def linear_uses_apply(p, x):
    """Linear uses: a weight inside jax.checkpoint, ``h - shift``, a class token concatenated
    before the sequence, a sliced position table (``wpe[:T]``), a negated weight; and a
    parameter passed into a custom_jvp function (jax.nn.relu), which must fall back."""
    h = jax.checkpoint(lambda w, x: jnp.tanh(x @ w))(p["w"], x)
    h = jnp.tanh(h - p["shift"][None]) * jax.nn.relu(p["gate"])[None]
    cls = jnp.broadcast_to(p["cls"], (h.shape[0], 1, 3))
    seq = jnp.concatenate([cls, h.reshape(h.shape[0], 2, 3)], axis=1)  # (batch, 3, 3)
    seq = jnp.tanh(seq + p["wpe"][None, :3])
    return seq.reshape(h.shape[0], -1) @ -p["v"]


def _linear_uses_net():
    r = np.random.default_rng(3)
    params = {"w": r.normal(size=(5, 6)), "shift": r.normal(size=(6,)),
              "gate": r.normal(size=(6,)), "cls": r.normal(size=(3,)),
              "wpe": r.normal(size=(5, 3)), "v": r.normal(size=(9, 2))}
    return ntkcalc.Net(linear_uses_apply, params)


class Upsample(nn.Module):
    """nn.remat around a layer, ConvTranspose with transpose_kernel=True (the kernel flipped by
    `rev`), jnp.flip of activations and custom_jvp activations (relu, gelu)."""

    @nn.compact
    def __call__(self, x):
        x = nn.gelu(nn.remat(nn.Dense)(2)(x))
        x = nn.relu(nn.ConvTranspose(3, (3, 3), transpose_kernel=True)(x))
        return nn.Dense(2)(jnp.flip(x, 1).reshape(x.shape[0], -1))


class ScanBlock(nn.Module):
    @nn.compact
    def __call__(self, h, _):
        return h + nn.Dense(4)(nn.tanh(nn.LayerNorm()(nn.Dense(4)(h)))), None


class LayerScan(nn.Module):
    """Three residual blocks as one nn.scan over layers (stacked per-layer weights)."""

    @nn.compact
    def __call__(self, x):
        blocks = nn.scan(ScanBlock, variable_axes={"params": 0}, split_rngs={"params": True},
                         length=3)
        h, _ = blocks()(x, None)
        return nn.Dense(2)(h)


class Recurrent(nn.Module):
    """An LSTM and a GRU over the sequence (nn.RNN: the cells' weights at every step)."""

    @nn.compact
    def __call__(self, x):
        h = nn.RNN(nn.LSTMCell(3, param_dtype=jnp.float64))(x)
        h = nn.RNN(nn.GRUCell(2, param_dtype=jnp.float64))(h)
        return nn.Dense(2, param_dtype=jnp.float64)(h[:, -1])


class TokenMLP(eqx.Module):
    """equinox: Embedding vmapped over tokens (its row gather) and MLP(scan=True)."""

    emb: eqx.nn.Embedding
    mlp: eqx.nn.MLP

    def __init__(self, key):
        k1, k2 = jax.random.split(key)
        self.emb = eqx.nn.Embedding(7, 3, key=k1)
        self.mlp = eqx.nn.MLP(3, 2, 4, 3, scan=True, key=k2)

    def __call__(self, tokens):
        return self.mlp(jax.vmap(self.emb)(tokens).mean(0))


def _equinox_net():
    model = jax.tree_util.tree_map(
        lambda a: a.astype(np.float64) if eqx.is_inexact_array(a) else a,
        TokenMLP(jax.random.key(2)))
    return ntkcalc.Net.from_equinox(model)


def _linen(module, x):
    return ntkcalc.Net.from_linen(module, f64(module.init(jax.random.key(0), x[:1])))


@pytest.fixture(scope="module")
def models():
    r = np.random.default_rng(7)
    x_img = r.normal(size=(4, 9, 8, 4))
    tokens = r.integers(0, 13, size=(4, 5)).astype(np.int32)
    x_vec = r.normal(size=(4, 4))
    x_seq = r.normal(size=(4, 5, 2))
    return {
        "linear-uses": (_linear_uses_net(), r.normal(size=(4, 5))),
        "upsample": (_linen(Upsample(), x_img[:, :4, :4]), x_img[:, :4, :4]),
        "layer-scan": (_linen(LayerScan(), x_vec), x_vec),
        "recurrent": (_linen(Recurrent(), x_seq), x_seq),
        "equinox": (_equinox_net(), r.integers(0, 7, size=(4, 5)).astype(np.int32)),
        "convs": (_linen(Convs(), x_img), x_img),
        "encoder": (_linen(Encoder(), tokens), tokens),
        "transposed": (_transposed_net(), x_vec),
        # Tokens in [-7, 7): negative ones wrap; +3 pushes some past the clipped table's end.
        "lookup": (_lookup_net(), r.integers(-7, 7, size=(4, 5)).astype(np.int32)),
    }


EXPECTED = {
    "convs": {
        "Conv_0.kernel": "conv", "Conv_0.bias": "bias", "depthwise.kernel": "conv",
        "depthwise.bias": "bias", "dilated.kernel": "conv", "dilated.bias": "bias",
        "Dense_0.kernel": "dot", "Dense_0.bias": "bias",
    },
    "encoder": {
        "Embed_0.embedding": "embed",
        "LayerNorm_0.scale": "scale", "LayerNorm_0.bias": "bias",
        "LayerNorm_1.scale": "scale", "LayerNorm_1.bias": "bias",
        **{f"attn.{n}.kernel": "dot" for n in ("query", "key", "value", "out")},
        **{f"attn.{n}.bias": "bias" for n in ("query", "key", "value", "out")},
        "Dense_0.kernel": "dot", "Dense_0.bias": "bias",
        "Dense_1.kernel": "dot", "Dense_1.bias": "bias",
        "Dense_2.kernel": "dot", "Dense_2.bias": "bias",
    },
    "transposed": {
        "w_t": "dot", "gain": "scale", "log_scale": "fallback", "w_rec": "dot",
        "v": "dot",
    },
    "linear-uses": {"w": "dot", "shift": "bias", "gate": "fallback", "cls": "concat",
                    "wpe": "bias", "v": "dot"},
    "upsample": {
        "CheckpointDense_0.kernel": "dot", "CheckpointDense_0.bias": "bias",
        "ConvTranspose_0.kernel": "conv", "ConvTranspose_0.bias": "bias",
        "Dense_0.kernel": "dot", "Dense_0.bias": "bias",
    },
    "layer-scan": {
        **{f"ScanScanBlock_0.Dense_{i}.{n}": r for i in (0, 1)
           for n, r in (("kernel", "dot"), ("bias", "bias"))},
        "ScanScanBlock_0.LayerNorm_0.scale": "scale",
        "ScanScanBlock_0.LayerNorm_0.bias": "bias",
        "Dense_0.kernel": "dot", "Dense_0.bias": "bias",
    },
    "recurrent": {
        **{f"LSTMCell_0.i{g}.kernel": "dot" for g in "ifgo"},
        **{f"LSTMCell_0.h{g}.{n}": r for g in "ifgo"
           for n, r in (("kernel", "dot"), ("bias", "bias"))},
        **{f"GRUCell_0.i{g}.{n}": r for g in "rzn"
           for n, r in (("kernel", "dot"), ("bias", "bias"))},
        **{f"GRUCell_0.h{g}.kernel": "dot" for g in "rzn"},
        "GRUCell_0.hn.bias": "bias",
        "Dense_0.kernel": "dot", "Dense_0.bias": "bias",
    },
    "equinox": {"emb.weight": "embed",
                **{f"mlp.layers.{i}.{n}": r for i in range(3)
                   for n, r in (("weight", "dot"), ("bias", "bias"))}},
    # A table used by a lookup and a matmul has two uses: structured (a dense derivative from
    # the consumers), not factored; the lookup inside tanh is still a rule (tanh consumes the
    # gathered rows).
    "lookup": {"table": "embed", "clipped": "embed", "tied": "dot+embed×2"},
}


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_rule_of_every_leaf(models, name):
    net, x = models[name]
    assert rules(net, x) == EXPECTED[name]


@pytest.mark.parametrize("outputs", MODES)
@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_structured_matches_dense_reference(models, name, outputs):
    net, x = models[name]
    want = reduce_mode(reference_full(net, x), outputs)
    assert_close(ntkcalc.ntk(net, x, method="structured", outputs=outputs), want)
    half = x.shape[0] // 2
    want12 = reduce_mode(reference_full(net, x[:half], x[half:]), outputs)
    assert_close(ntkcalc.ntk(net, x[:half], x[half:], method="structured", outputs=outputs),
                 want12)


# -- biases that reach their layer's output through a broadcast fold ---------------------------


def _mlp_apply(add_bias):
    """A tanh MLP 4-5-2 whose layers add their bias as ``add_bias(x @ w, b)``."""

    def apply(p, x):
        x = jnp.tanh(add_bias(x @ p["w0"], p["b0"]))
        return add_bias(jnp.dot(x, p["w1"]), p["b1"])

    return apply


def _implicit(y, b):
    """Plain JAX ``y + b``: numpy broadcasting, lowered to broadcast_in_dim(b) (R,) → (1, …, R)
    and an add (the suite's rank-promotion guard lifted for this form only)."""
    with jax.numpy_rank_promotion("allow"):
        return y + b


def _mlp_net(add_bias):
    r = np.random.default_rng(2)
    return ntkcalc.Net(_mlp_apply(add_bias), {
        "w0": r.normal(size=(4, 5)) / 2, "b0": r.normal(size=(5,)),
        "w1": r.normal(size=(5, 2)) / 2, "b1": r.normal(size=(2,))})


def lax_conv_apply(p, x):
    """lax.conv_general_dilated + b (broadcast by numpy rules), then a depthwise conv whose bias
    is reshaped to (1, 1, 1, C)."""
    dn = ("NHWC", "HWIO", "NHWC")
    y = lax.conv_general_dilated(x, p["w"], (2, 1), "SAME", dimension_numbers=dn)
    y = jnp.tanh(_implicit(y, p["b"]))
    y = lax.conv_general_dilated(y, p["dw"], (1, 1), "VALID", dimension_numbers=dn,
                                 feature_group_count=3)
    y = y + p["db"].reshape(1, 1, 1, -1)
    return y.reshape(y.shape[0], -1) @ p["v"]


class ConvBias(nn.Module):
    """flax nn.Conv (strided, then depthwise) with biases."""

    @nn.compact
    def __call__(self, x):
        x = nn.tanh(nn.Conv(3, (3, 3), strides=(2, 1))(x))
        x = nn.Conv(3, (2, 2), feature_group_count=3, padding="VALID")(x)
        return nn.Dense(2, use_bias=False)(x.reshape(x.shape[0], -1))


class LinearNNX(nnx.Module):
    def __init__(self, rngs):
        self.inp = nnx.Linear(4, 5, rngs=rngs)
        self.out = nnx.Linear(5, 2, rngs=rngs)

    def __call__(self, x):
        return self.out(jnp.tanh(self.inp(x)))


def _conv_net():
    r = np.random.default_rng(4)
    return ntkcalc.Net(lax_conv_apply, {
        "w": r.normal(size=(3, 3, 2, 3)) / 3, "b": r.normal(size=(3,)),
        "dw": r.normal(size=(2, 2, 1, 3)), "db": r.normal(size=(3,)),
        "v": r.normal(size=(18, 2)) / 5})


_VEC, _IMG = (3, 4), (3, 5, 4, 2)
# name: (the net from example inputs, input shape, its bias leaves): one per way a bias reaches
# its layer's output.
BIAS_FORMS = {
    "x @ w + b": (lambda x: _mlp_net(_implicit), _VEC, ("b0", "b1")),
    "b[None, :]": (lambda x: _mlp_net(lambda y, b: y + b[None, :]), _VEC, ("b0", "b1")),
    "b.reshape(1, -1)": (lambda x: _mlp_net(lambda y, b: y + b.reshape(1, -1)), _VEC,
                         ("b0", "b1")),
    "linen Dense": (lambda x: _linen(MLP(width=5, out=2), x), _VEC,
                    ("Dense_0.bias", "Dense_1.bias", "Dense_2.bias")),
    "nnx Linear": (lambda x: _nnx64(LinearNNX(nnx.Rngs(0))), _VEC, ("inp.bias", "out.bias")),
    "linen Conv": (lambda x: _linen(ConvBias(), x), _IMG, ("Conv_0.bias", "Conv_1.bias")),
    "lax conv + b": (lambda x: _conv_net(), _IMG, ("b", "db")),
}


@pytest.mark.parametrize("form", list(BIAS_FORMS))
def test_broadcast_biases_fold_and_match_reference(form):
    # A bias broadcast over the positions into a dense layer's or a conv's output is the layer's
    # extra input 1 (Novak, Sohl-Dickstein & Schoenholz, ICML 2022, arXiv:2206.08720, factored
    # derivatives; the bias as input 1: common practice): every plan (rates pinned, so the
    # weights are factored or streamed on any machine) carries it folded, and each kernel
    # equals the dense jax.jacrev reference.
    make, shape, biases = BIAS_FORMS[form]
    x = np.random.default_rng(9).normal(size=shape)
    net = make(x)
    want = reference_full(net, x)
    for outputs in MODES:
        p = ntkcalc.plan(net, x, method="structured", outputs=outputs, rates=FIXED_RATES)
        reps = {leaf.name: leaf.representation for leaf in p.leaves}
        assert {b: reps[b] for b in biases} == dict.fromkeys(biases, "folded"), reps
        if outputs in ("full", "trace"):  # the fold is in the factors, before any contraction
            k = ntkcalc.ntk(net, x, method="structured", outputs=outputs, plan=p,
                            progress=False)
            assert_close(k, reduce_mode(want, outputs))
    assert_close(ntkcalc.ntk(net, x[:2], x[2:], method="structured", outputs="full",
                             progress=False),
                 reference_full(net, x[:2], x[2:]))


def test_zoo_rules():
    # Shared and reused weights: a weight used twice is still structured (dot×2), an
    # embedding lookup (gather of rows) has its own rule; dense biases fold into their layer's
    # factors.
    expected = {
        "shared-weight": {"w": "dot×2", "b": "bias", "v": "dot"},
        "tokens": {"Embed_0.embedding": "embed", "Dense_0.kernel": "dot",
                   "Dense_0.bias": "bias"},
    }
    for case in ZOO:
        if case.name in expected:
            net = case.make()
            assert rules(net, case.x(np.random.default_rng(0), 3)) == expected[case.name]
    mlp = ZOO[0].make()
    p = ntkcalc.plan(mlp, ZOO[0].x(np.random.default_rng(0), 8), method="structured")
    reps = {leaf.name: leaf.representation for leaf in p.leaves}
    assert reps["Dense_1.kernel"] == "factored" and reps["Dense_1.bias"] == "folded"


def test_plan_prints_a_table(models):
    net, x = models["transposed"]
    text = str(ntkcalc.plan(net, x, method="auto"))
    for word in ("parameter", "rule", "FLOPs", "bytes/example", "log_scale", "fallback",
                 "GFLOP/s", "estimates"):
        assert word in text


def _forced(net, x1, x2, outputs, representation):
    """The kernel with every factorable leaf forced to ``representation`` (internal check:
    whichever form the planner picks must give the same kernel)."""
    import dataclasses

    from ntkcalc._engine import structured as st
    from ntkcalc._engine.planner import prepare
    from ntkcalc._engine.program import compiled
    from ntkcalc._tiles.plan import plan_request

    req = prepare(net, x1, x2, outputs=outputs, method="structured")
    program = plan_request(req, outputs=outputs, memory=None, method="structured").program
    kinds = tuple(
        representation if kind in ("dense", "factored", "streamed")
        and st.factorable(program.analysis.uses[k]) else kind
        for k, kind in enumerate(program.kinds))
    if representation == "dense":  # a dense leaf carries no folded bias
        kinds = tuple("dense" if kind == "folded" else kind for kind in kinds)
        program = dataclasses.replace(program, folds=(None,) * len(kinds))
    program = dataclasses.replace(program, kinds=kinds)
    factors, tile = compiled(program)
    fa = factors(req.diff, req.other, req.state, jnp.asarray(req.x1))
    if x2 is None:
        return tile(req.diff, req.other, req.state, fa, fa, same=True)[0], fa, kinds
    fb = factors(req.diff, req.other, req.state, jnp.asarray(req.x2))
    return tile(req.diff, req.other, req.state, fa, fb)[0], fa, kinds


@pytest.mark.parametrize("outputs", ["full", "trace", "diagonal"])
@pytest.mark.parametrize("representation", ["factored", "dense", "streamed"])
@pytest.mark.parametrize("name", ["convs", "encoder", "lookup", "layer-scan", "recurrent"])
def test_every_representation_matches_reference(models, monkeypatch, name, representation,
                                                outputs):
    # Dense derivatives from factors, factored Grams, and dense contractions streamed in chunks
    # of 5 input features (so that convs, dense layers and one-hot embedding rows all span
    # several chunks, the last one padded) must all give the jacrev reference, on diagonal
    # (same block) and off-diagonal tiles.
    from ntkcalc._engine import contract
    from ntkcalc._engine.program import compiled

    monkeypatch.setattr(contract, "stream_chunk", lambda *args: 5)
    compiled.cache_clear()
    net, x = models[name]
    got, fa, kinds = _forced(net, x, None, outputs, representation)
    assert representation in kinds
    assert_close(got, reduce_mode(reference_full(net, x), outputs))
    half = x.shape[0] // 2
    got12, _, _ = _forced(net, x[:half], x[half:], outputs, representation)
    assert_close(got12, reduce_mode(reference_full(net, x[:half], x[half:]), outputs))
    compiled.cache_clear()
