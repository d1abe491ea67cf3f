"""`Net.from_equinox` against the dense jax.jacrev reference (tests/helpers.py, float64).

Reference: the whole-batch Jacobian by `jax.jacrev` of the same Net's apply, contracted with an
einsum (the definition Θ = J Jᵀ; common practice), at rtol 1e-10. Models: an MLP, a CNN, an
attention block and a stateful BatchNorm model, each per example and vmapped by the Net.
"""

from __future__ import annotations

import functools

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from helpers import assert_close, check_modes, reference_full

import ntkcalc

eqx = pytest.importorskip("equinox")


def _f64(model):
    return jax.tree_util.tree_map(
        lambda a: a.astype(jnp.float64) if eqx.is_inexact_array(a) else a, model)


class CNN(eqx.Module):
    conv1: eqx.nn.Conv2d
    pool: eqx.nn.AvgPool2d
    conv2: eqx.nn.Conv2d
    head: eqx.nn.Linear

    def __init__(self, key):
        k = jax.random.split(key, 3)
        self.conv1 = eqx.nn.Conv2d(2, 4, 3, stride=2, key=k[0])
        self.pool = eqx.nn.AvgPool2d(2, stride=1)
        self.conv2 = eqx.nn.Conv2d(4, 3, 2, padding=1, key=k[1])
        self.head = eqx.nn.Linear(3 * 3 * 3, 3, key=k[2])

    def __call__(self, x):  # x: (channels, height, width) = (2, 8, 8)
        h = self.pool(jax.nn.relu(self.conv1(x)))
        return self.head(jnp.tanh(self.conv2(h)).reshape(-1))


class Attention(eqx.Module):
    norm: eqx.nn.LayerNorm
    attn: eqx.nn.MultiheadAttention
    head: eqx.nn.Linear

    def __init__(self, key):
        k = jax.random.split(key, 2)
        self.norm = eqx.nn.LayerNorm(6)
        self.attn = eqx.nn.MultiheadAttention(2, 6, qk_size=3, vo_size=3, key=k[0])
        self.head = eqx.nn.Linear(6, 2, key=k[1])

    def __call__(self, x):  # x: (tokens, features) = (4, 6)
        h = jax.vmap(self.norm)(x)
        h = x + self.attn(h, h, h)
        return self.head(h.mean(axis=0))


class StatefulNorm(eqx.Module):
    """Linear → BatchNorm (state) → Dropout → Linear, with an integer buffer (a permutation)."""

    inp: eqx.nn.Linear
    norm: eqx.nn.BatchNorm
    drop: eqx.nn.Dropout
    out: eqx.nn.Linear
    perm: jax.Array

    def __init__(self, key):
        k = jax.random.split(key, 2)
        self.inp = eqx.nn.Linear(5, 8, key=k[0])
        self.norm = eqx.nn.BatchNorm(8, axis_name="batch", mode="batch")
        self.drop = eqx.nn.Dropout(0.5)
        self.out = eqx.nn.Linear(8, 2, key=k[1])
        self.perm = jnp.arange(8)[::-1]

    def __call__(self, x, state, *, key=None):
        h, state = self.norm(self.inp(x), state)
        h = self.drop(jax.nn.relu(h)[self.perm], key=key)
        return self.out(h), state


def _stateful():
    model, state = eqx.nn.make_with_state(StatefulNorm)(jax.random.key(3))
    model = _f64(model)
    bn = model.norm
    rng = np.random.default_rng(1)  # non-trivial running statistics after 3 steps
    state = state.set(bn.batch_counter, state.get(bn.batch_counter) + 3)
    state = state.set(bn.batch_state_index, (jnp.asarray(rng.normal(size=8)),
                                             jnp.asarray(rng.uniform(0.5, 2.0, size=8))))
    return model, state


ALL_MODES = ("full", "trace", "diagonal", "logit-sum")
# name: (constructor, example shape, outputs modes checked; all where cheap to compile)
MODELS = {
    "mlp": (lambda: _f64(eqx.nn.MLP(5, 3, 8, 2, activation=jnp.tanh, key=jax.random.key(0))),
            (5,), ALL_MODES),
    "cnn": (lambda: _f64(CNN(jax.random.key(1))), (2, 8, 8), ("full", "trace")),
    "attention": (lambda: _f64(Attention(jax.random.key(2))), (4, 6), ("full", "trace")),
    "batchnorm-state": (_stateful, (5,), ALL_MODES),
}


@functools.cache
def case(name):
    make, shape, _ = MODELS[name]
    made = make()
    net = ntkcalc.Net.from_equinox(*made) if isinstance(made, tuple) else \
        ntkcalc.Net.from_equinox(made)
    rng = np.random.default_rng(0)
    return net, rng.normal(size=(4, *shape)), rng.normal(size=(3, *shape))


@pytest.mark.parametrize("name", list(MODELS))
def test_matches_dense_reference(name):
    # Reference: whole-batch jax.jacrev + einsum, float64 (helpers.check_modes).
    check_modes(*case(name), modes=MODELS[name][2])


def test_apply_is_the_vmapped_model():
    # The Net evaluates the equinox model example by example, in inference mode (direct call).
    model, state = _stateful()
    net = ntkcalc.Net.from_equinox(model, state)
    x = case("batchnorm-state")[1]
    inf = eqx.nn.inference_mode(model)
    want = jnp.stack([inf(xi, state)[0] for xi in x])
    np.testing.assert_allclose(net(x), want, rtol=1e-13)
    assert model.norm.inference is False  # the caller's model is not modified


def test_what_is_differentiated_and_what_is_frozen():
    net = case("batchnorm-state")[0]
    names = ntkcalc._engine.select.leaf_names(net.params)
    # Floating arrays only: the integer permutation and the BatchNorm statistics are frozen.
    assert names == ["inp.weight", "inp.bias", "norm.weight", "norm.bias", "out.weight",
                     "out.bias"]
    frozen, state = net.state
    assert [a.dtype.kind for a in jax.tree_util.tree_leaves(frozen)] == ["i"]
    assert isinstance(state, eqx.nn.State)


def test_replace_reuses_compiled_kernel_and_state_matters():
    # New parameters (a later checkpoint) share `call`; the kernel equals the reference at them.
    net, x1, _ = case("mlp")
    params = jax.tree_util.tree_map(lambda a: 1.5 * a, net.params)
    moved = net.replace(params=params)
    assert moved.call is net.call
    want = np.einsum("ijaa->ij", reference_full(moved, x1))  # jax.jacrev reference
    assert_close(ntkcalc.ntk(moved, x1, progress=False), want)


def test_a_later_checkpoint_through_replace():
    # equinox's own split of a trained copy (different weights, training mode) fits `replace`:
    # same compiled call, and the kernel equals the reference at the new parameters.
    net, x1, _ = case("batchnorm-state")
    model, _ = _stateful()
    trained = jax.tree_util.tree_map(lambda a: a * 0.7 if eqx.is_inexact_array(a) else a, model)
    moved = net.replace(params=eqx.filter(trained, eqx.is_inexact_array))
    assert moved.call is net.call
    want = np.einsum("ijaa->ij", reference_full(moved, x1, jit=True))  # jax.jacrev reference
    assert_close(ntkcalc.ntk(moved, x1, progress=False), want)


def test_by_layer_at_depth_two_splits_the_mlp():
    # eqx.nn.MLP keeps its layers in one list: depth 1 is one group, depth 2 one per layer.
    # Each group equals the reference restricted to its leaves; the groups sum to the kernel.
    net, x1, _ = case("mlp")
    assert list(ntkcalc.ntk_by_layer(net, x1, progress=False)) == ["layers"]
    groups = ntkcalc.ntk_by_layer(net, x1, depth=2, progress=False)
    assert list(groups) == ["layers.0", "layers.1", "layers.2"]
    for name, k in groups.items():
        sub = reference_full(net, x1, params=lambda n, g=name: n.startswith(g + "."))
        assert_close(k, np.einsum("ijaa->ij", sub))
    with pytest.raises(ValueError, match="`depth`=0: pass a positive int"):
        ntkcalc.ntk_by_layer(net, x1, depth=0, progress=False)


def test_errors_name_the_constructor():
    model = eqx.nn.MLP(3, 2, 4, 1, key=jax.random.key(0))
    x = np.ones((2, 3))
    with pytest.raises(TypeError, match=r"`net` must be an ntkcalc.Net, got MLP\. `MLP` is an "
                                        r"equinox module: wrap it with `ntkcalc.Net.from_equinox"):
        ntkcalc.ntk(model, x)
    # Unpartitioned: the model as params has function leaves (the activation).
    with pytest.raises(TypeError, match=r"`params` leaf \.activation is a .*not an array.*"
                                        r"Net.from_equinox\(model\)"):
        ntkcalc.Net(lambda m, x: jax.vmap(m)(x), model)
    stateful, state = _stateful()
    with pytest.raises(ValueError, match="holds stateful layers.*Net.from_equinox"
                                         r"\(model, state\)"):
        ntkcalc.Net.from_equinox(stateful)
    with pytest.raises(TypeError, match="`state` must be an eqx.nn.State"):
        ntkcalc.Net.from_equinox(stateful, {"mean": 0})
    with pytest.raises(TypeError, match="`model` must be a callable equinox Module, got dict"):
        ntkcalc.Net.from_equinox({"w": np.ones(2)})


class WholeBatch(eqx.Module):
    """Takes the whole batch and needs a keyword: f(x) = tanh(x W) v · scale."""

    w: jax.Array
    v: jax.Array

    def __call__(self, x, *, scale):
        return jnp.tanh(x @ self.w) @ self.v * scale


def test_batched_model_and_call_keywords():
    rng = np.random.default_rng(4)
    model = WholeBatch(jnp.asarray(rng.normal(size=(3, 5))), jnp.asarray(rng.normal(size=(5, 2))))
    with pytest.raises(TypeError, match=r"WholeBatch.__call__ requires \['scale'\], which the "
                                        r"Net does not pass"):
        ntkcalc.Net.from_equinox(model, batched=True)
    net = ntkcalc.Net.from_equinox(model, batched=True, scale=2.0)
    x = rng.normal(size=(4, 3))
    np.testing.assert_allclose(net(x), model(x, scale=2.0), rtol=1e-13)
    want = np.einsum("ijaa->ij", reference_full(net, x))  # jax.jacrev reference
    assert_close(ntkcalc.ntk(net, x, progress=False), want)


def test_partitioned_by_hand_still_works():
    # A user's own eqx.partition is a valid plain Net: same kernel as from_equinox.
    net, x1, _ = case("mlp")
    model = MODELS["mlp"][0]()
    params, static = eqx.partition(model, eqx.is_inexact_array)
    plain = ntkcalc.Net(lambda p, x: jax.vmap(eqx.combine(p, static))(x), params)
    assert_close(ntkcalc.ntk(plain, x1, progress=False), ntkcalc.ntk(net, x1, progress=False))
