"""`Net.from_haiku` against the dense jax.jacrev reference (tests/helpers.py, float64).

Reference: the whole-batch Jacobian by `jax.jacrev` of the same Net's apply, contracted with an
einsum (the definition Θ = J Jᵀ; common practice), at rtol 1e-10. Models: an MLP, a CNN, an
attention block (``hk.transform``), a BatchNorm model with state (``hk.transform_with_state``,
``is_training=False``) and a model that draws fixed random features from its apply key.
"""

from __future__ import annotations

import functools

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from helpers import assert_close, check_modes, f64, reference_full

import ntkcalc

hk = pytest.importorskip("haiku")


def _mlp(x):
    return hk.nets.MLP([8, 8, 3], activation=jnp.tanh)(x)


def _cnn(x):  # x: (batch, 8, 8, 2)
    h = jax.nn.relu(hk.Conv2D(4, 3, stride=2)(x))
    h = hk.avg_pool(h, window_shape=(2, 2, 1), strides=(1, 1, 1), padding="VALID")
    h = jnp.tanh(hk.Conv2D(3, 2, padding="VALID")(h))
    return hk.Linear(3)(h.reshape(h.shape[0], -1))


def _attention(x):  # x: (batch, tokens, features) = (batch, 4, 6)
    h = hk.LayerNorm(axis=-1, create_scale=True, create_offset=True)(x)
    h = x + hk.MultiHeadAttention(num_heads=2, key_size=3, model_size=6,
                                  w_init=hk.initializers.VarianceScaling(1.0))(h, h, h)
    return hk.Linear(2)(h.mean(axis=1))


def _batchnorm(x, is_training):
    h = hk.Linear(8)(x)
    h = hk.BatchNorm(create_scale=True, create_offset=True, decay_rate=0.9)(h, is_training)
    return hk.Linear(2)(jax.nn.relu(h))


def _random_features(x):
    # Fixed random features drawn from the apply key (shape independent of the batch).
    w = jax.random.normal(hk.next_rng_key(), (x.shape[-1], 6), x.dtype)
    return hk.Linear(2)(jnp.cos(x @ w))


def _stateless(f, shape, **options):
    t = hk.transform(f)
    params = f64(t.init(jax.random.key(0), jnp.zeros((1, *shape))))
    return ntkcalc.Net.from_haiku(t, params, **options)


def _stateful():
    t = hk.transform_with_state(_batchnorm)
    params, state = t.init(jax.random.key(0), jnp.zeros((1, 5)), is_training=True)
    rng = np.random.default_rng(1)  # non-trivial moving averages
    state = jax.tree_util.tree_map(
        lambda a: a + rng.uniform(0.5, 1.5, a.shape) if jnp.issubdtype(a.dtype, jnp.floating)
        else a, f64(state))
    return ntkcalc.Net.from_haiku(t, f64(params), state, is_training=False)


ALL_MODES = ("full", "trace", "diagonal", "logit-sum")
# name: (Net constructor, example shape, outputs modes checked; all where cheap to compile)
MODELS = {
    "mlp": (lambda: _stateless(_mlp, (5,)), (5,), ALL_MODES),
    "cnn": (lambda: _stateless(_cnn, (8, 8, 2)), (8, 8, 2), ("full", "trace")),
    "attention": (lambda: _stateless(_attention, (4, 6)), (4, 6), ("full", "trace")),
    "batchnorm-state": (_stateful, (5,), ALL_MODES),
    "random-features": (lambda: _stateless(_random_features, (5,), rng=7), (5,), ("full",)),
}


@functools.cache
def case(name):
    make, shape, _ = MODELS[name]
    rng = np.random.default_rng(0)
    return make(), rng.normal(size=(4, *shape)), rng.normal(size=(3, *shape))


@pytest.mark.parametrize("name", list(MODELS))
def test_matches_dense_reference(name):
    # Reference: whole-batch jax.jacrev + einsum, float64 (helpers.check_modes).
    check_modes(*case(name), modes=MODELS[name][2])


def test_apply_is_haikus_apply():
    # Direct call of the transformed function: state in eval mode, and the fixed key.
    net, x1, _ = case("batchnorm-state")
    t = hk.transform_with_state(_batchnorm)
    state = net.state[0]
    want, _ = t.apply(net.params, state, None, x1, is_training=False)
    np.testing.assert_allclose(net(x1), want, rtol=1e-13)
    rf, x1, _ = case("random-features")
    want = hk.transform(_random_features).apply(rf.params, jax.random.key(7), x1)
    np.testing.assert_allclose(rf(x1), want, rtol=1e-13)


def test_by_layer_groups_are_haiku_modules():
    # Haiku names parameters "module/~/sub.w": each linear layer is its own group at depth 1,
    # and each group equals the reference restricted to its leaves.
    net, x1, _ = case("mlp")
    groups = ntkcalc.ntk_by_layer(net, x1, progress=False)
    assert list(groups) == ["mlp/~/linear_0", "mlp/~/linear_1", "mlp/~/linear_2"]
    for name, k in groups.items():
        sub = reference_full(net, x1, params=lambda n, g=name: n.startswith(g + "."))
        assert_close(k, np.einsum("ijaa->ij", sub))


def test_without_apply_rng():
    net, x1, _ = case("mlp")
    t = hk.without_apply_rng(hk.transform(_mlp))
    plain = ntkcalc.Net.from_haiku(t, net.params)
    np.testing.assert_allclose(plain(x1), net(x1), rtol=1e-13)
    with pytest.raises(ValueError, match="`rng` was given but .*without_apply_rng"):
        ntkcalc.Net.from_haiku(t, net.params, rng=0)


def test_errors_name_the_constructor():
    t = hk.transform(_mlp)
    params = t.init(jax.random.key(0), jnp.zeros((1, 5)))
    with pytest.raises(TypeError, match=r"`net` must be an ntkcalc.Net, got Transformed\. "
                                        r".*haiku transformed function.*Net.from_haiku"):
        ntkcalc.ntk(t, np.ones((2, 5)))
    ts = hk.transform_with_state(_batchnorm)
    both = ts.init(jax.random.key(0), jnp.zeros((1, 5)), is_training=True)
    with pytest.raises(TypeError, match=r"init` returns \(params, state\). Pass them apart"):
        ntkcalc.Net.from_haiku(ts, both)
    with pytest.raises(ValueError, match="pass its state too"):
        ntkcalc.Net.from_haiku(ts, both[0])
    with pytest.raises(ValueError, match="`state` was given but `transformed` is from "):
        ntkcalc.Net.from_haiku(t, params, {})
    with pytest.raises(TypeError, match="`rng` must be None, an int seed or a PRNG key"):
        ntkcalc.Net.from_haiku(t, params, rng="seven")
    with pytest.raises(TypeError, match="`transformed` must be the result of `hk.transform"):
        ntkcalc.Net.from_haiku(_mlp, params)
