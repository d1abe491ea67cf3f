"""Feature rank against NumPy's SVD/matrix_rank, least-squares interpolation, and layer outputs
recomputed by hand from the parameters."""

import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np
import pytest
from flax import nnx

from ntkcalc._adapters.net import Net
from ntkcalc._analysis.expressivity import FeatureRank, feature_rank, feature_rank_of

F64 = dict(dtype=jnp.float64, param_dtype=jnp.float64)


def test_rank_matches_numpy_and_decides_interpolation():
    # References: numpy.linalg.matrix_rank and numpy.linalg.svd of [H, 1]; a full-rank [H, 1]
    # lets least squares (numpy.linalg.lstsq) fit random targets exactly, a rank-deficient one
    # does not (common practice: a linear system with full row rank is solvable).
    rng = np.random.default_rng(0)
    targets = rng.standard_normal(20)
    for width, hidden_rank in ((30, 30), (30, 8)):
        h = rng.standard_normal((20, hidden_rank)) @ rng.standard_normal((hidden_rank, width))
        res = feature_rank_of(h)
        a = np.concatenate([h, np.ones((20, 1))], axis=1)
        assert res.rank == np.linalg.matrix_rank(a)
        assert res.sigma_min == pytest.approx(np.linalg.svd(a, compute_uv=False)[19], rel=1e-10,
                                              abs=1e-12)
        w = np.linalg.lstsq(a, targets, rcond=None)[0]
        fits = np.allclose(a @ w, targets, atol=1e-8)
        assert fits == res.full_rank == (res.margin > 1)
    assert feature_rank_of(h, bias=False).num_features == 30


def test_too_few_features_cannot_be_full_rank():
    res = feature_rank_of(np.random.default_rng(1).standard_normal((10, 4)))
    assert res.rank == 5 and not res.full_rank and res.sigma_min == 0.0 and res.margin == 0.0
    assert isinstance(res, FeatureRank) and "rank=5" in repr(res)


class _Block(nn.Module):
    @nn.compact
    def __call__(self, x):
        return jnp.tanh(nn.Dense(6, **F64)(x))


class _Linen(nn.Module):
    @nn.compact
    def __call__(self, x):
        h = jnp.tanh(nn.Dense(12, **F64)(x))
        h = _Block()(h)
        return nn.Dense(2, **F64)(h)


def test_linen_named_layers_match_hand_computation():
    # Reference: the layer output recomputed from the parameters (x W + b); 20 examples in
    # batches of 7 (last padded).
    x = np.random.default_rng(2).standard_normal((20, 3))
    module = _Linen()
    net = Net.from_linen(module, module.init(jax.random.PRNGKey(0), x[:1]))
    p = net.params
    h0 = x @ np.asarray(p["Dense_0"]["kernel"]) + np.asarray(p["Dense_0"]["bias"])[None, :]
    res = feature_rank(net, x, layer="Dense_0", batch=7)
    ref = feature_rank_of(h0)
    assert res.layer == "Dense_0" and res.rank == ref.rank == 4  # affine in 3 inputs, + bias
    assert res.sigma_min == pytest.approx(ref.sigma_min, rel=1e-10)
    blk = p["_Block_0"]["Dense_0"]
    h1 = np.tanh(np.tanh(h0) @ np.asarray(blk["kernel"]) + np.asarray(blk["bias"])[None, :])
    nested = feature_rank(net, x, layer="_Block_0", batch=7)
    assert nested.sigma_max == pytest.approx(feature_rank_of(h1).sigma_max, rel=1e-10)
    assert nested.rank == 7 and not nested.full_rank
    with pytest.raises(ValueError, match="Available layers: Dense_0, .*_Block_0/Dense_0"):
        feature_rank(net, x, layer="Dense_9")


class _NNX(nnx.Module):
    def __init__(self, rngs):
        self.first = nnx.Linear(3, 25, rngs=rngs, param_dtype=jnp.float64, dtype=jnp.float64)
        self.head = nnx.Linear(25, 1, rngs=rngs, param_dtype=jnp.float64, dtype=jnp.float64)

    def __call__(self, x):
        return self.head(jnp.tanh(self.first(x)))


def test_nnx_named_layer_and_model_untouched():
    # Reference: the first layer recomputed as x W + b from the model's own parameters.
    x = np.random.default_rng(3).standard_normal((20, 3))
    model = _NNX(nnx.Rngs(0))
    before = jax.tree_util.tree_map(np.asarray, nnx.state(model))
    net = Net.from_nnx(model)
    res = feature_rank(net, x, layer="first", batch=8)
    h = x @ np.asarray(model.first.kernel.get_value()) + np.asarray(
        model.first.bias.get_value())[None, :]
    assert res.sigma_max == pytest.approx(feature_rank_of(h).sigma_max, rel=1e-10)
    assert res.rank == 4  # 3 input dimensions + bias bound the rank of an affine layer's output
    after = jax.tree_util.tree_map(np.asarray, nnx.state(model))
    jax.tree_util.tree_map(np.testing.assert_array_equal, before, after)
    assert not hasattr(model.first, "__captures__")
    with pytest.raises(ValueError, match="Available layers: first, head"):
        feature_rank(net, x, layer="middle")


def test_callable_layer_and_bad_input():
    # Random features tanh(x W) with width 40 > n = 30: generically full rank.
    x = np.random.default_rng(4).standard_normal((30, 5))
    params = {"w": jnp.asarray(np.random.default_rng(5).standard_normal((5, 40)))}
    net = Net(lambda p, xb: jnp.tanh(xb @ p["w"]), params)

    def hidden(p, xb):
        return jnp.tanh(xb @ p["w"])

    res = feature_rank(net, x, layer=hidden, batch=16)
    assert res.full_rank and res.layer == "hidden" and res.margin > 1e3
    with pytest.raises(TypeError, match="plain function"):
        feature_rank(net, x, layer="Dense_0")
    with pytest.raises(TypeError, match="`layer` must be"):
        feature_rank(net, x, layer=3)
    with pytest.raises(ValueError, match="non-finite"):
        feature_rank_of(np.full((3, 3), np.nan))
