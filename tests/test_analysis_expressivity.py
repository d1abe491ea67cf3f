"""Feature rank against NumPy's SVD/matrix_rank, least-squares interpolation, and layer outputs
recomputed by hand from the parameters."""

import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np
import pytest
from flax import nnx

from ntkcalc._adapters.net import Net
from ntkcalc._analysis.expressivity import (
    FeatureRank,
    feature_rank,
    feature_rank_of,
    feature_rank_over_inits,
)
from tests.helpers import reference_full

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
    # width + 1 < n: [H, 1] has at most width + 1 independent columns (common practice).
    res = feature_rank_of(np.random.default_rng(1).standard_normal((10, 4)))
    assert res.rank == 5 and not res.full_rank and res.sigma_min == 0.0 and res.margin == 0.0
    assert res.verdict.startswith("full rank is impossible") and "4 features + 1 < n = 10" in \
        res.verdict
    assert res.precision == "float64" and res.reliable and res.caution is None
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
    res = feature_rank(net, x, layer="Dense_0", batch=7, ntk_gram="none")
    ref = feature_rank_of(h0)
    assert res.layer == "Dense_0" and res.rank == ref.rank == 4  # affine in 3 inputs, + bias
    assert "a Dense layer: its affine pre-activation output" in res.features
    assert res.sigma_min == pytest.approx(ref.sigma_min, rel=1e-10)
    blk = p["_Block_0"]["Dense_0"]
    h1 = np.tanh(np.tanh(h0) @ np.asarray(blk["kernel"]) + np.asarray(blk["bias"])[None, :])
    nested = feature_rank(net, x, layer="_Block_0", batch=7, ntk_gram="none")
    assert nested.sigma_max == pytest.approx(feature_rank_of(h1).sigma_max, rel=1e-10)
    assert nested.rank == 7 and not nested.full_rank
    assert nested.features == "the output of submodule '_Block_0' (_Block) as it returns it"
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
    res = feature_rank(net, x, layer="first", batch=8, ntk_gram="none")
    h = x @ np.asarray(model.first.kernel.get_value()) + np.asarray(
        model.first.bias.get_value())[None, :]
    assert res.sigma_max == pytest.approx(feature_rank_of(h).sigma_max, rel=1e-10)
    assert res.rank == 4  # 3 input dimensions + bias bound the rank of an affine layer's output
    assert "a Linear layer" in res.features
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

    res = feature_rank(net, x, layer=hidden, batch=16, ntk_gram="none")
    assert res.full_rank and res.layer == "hidden" and res.margin > 1e3
    with pytest.raises(TypeError, match="plain function"):
        feature_rank(net, x, layer="Dense_0")
    with pytest.raises(TypeError, match="`layer` must be"):
        feature_rank(net, x, layer=3)
    with pytest.raises(ValueError, match="non-finite"):
        feature_rank_of(np.full((3, 3), np.nan))
    with pytest.raises(TypeError, match="`net` must be an ntkcalc.Net"):
        feature_rank(params, x)
    with pytest.raises(ValueError, match="`ntk_gram`='some' is not known"):
        feature_rank(net, x, ntk_gram="some")
    with pytest.raises(ValueError, match="`dtype`='float16' is not known"):
        feature_rank(net, x, dtype="float16")


class _Quickstart(nn.Module):
    """The quickstart's model: linen names the readout Dense(out) "Dense_0" (constructed first)."""

    width: int = 24
    out: int = 3

    @nn.compact
    def __call__(self, x):
        return nn.Dense(self.out, **F64)(nn.tanh(nn.Dense(self.width, **F64)(x)))


def _quickstart_net(x, key=0, width=24):
    model = _Quickstart(width=width)
    return Net.from_linen(model, model.init(jax.random.PRNGKey(key), x[:1]))


def _hidden(net, x):
    """The post-activation hidden features tanh(x W + b), recomputed by hand."""
    p = net.params["Dense_1"]
    return np.tanh(x @ np.asarray(p["kernel"]) + np.asarray(p["bias"])[None, :])


def test_default_features_are_the_readout_input():
    # Reference: numpy.linalg.matrix_rank and numpy.linalg.svd of [H, 1], H the hidden
    # activations recomputed from the parameters; λ_min of the NTK Gram against numpy's eigvalsh
    # of the dense jacrev kernel (tests/helpers.reference_full) flattened to (N·O, N·O).
    x = np.random.default_rng(6).standard_normal((20, 5))
    net = _quickstart_net(x)
    res = feature_rank(net, x)
    a = np.concatenate([_hidden(net, x), np.ones((20, 1))], axis=1)
    assert res.layer == "readout" and "post-activation" in res.features
    assert res.rank == np.linalg.matrix_rank(a) == 20 and res.full_rank and res.reliable
    np.testing.assert_allclose([res.sigma_max, res.sigma_min],
                               np.linalg.svd(a, compute_uv=False)[[0, 19]], rtol=1e-10)
    assert res.verdict.startswith("full rank") and res.precision == "float64"
    ref = reference_full(net, x).transpose(0, 2, 1, 3).reshape(60, 60)
    assert res.ntk_lambda_min == pytest.approx(np.linalg.eigvalsh(ref)[0], rel=1e-8)
    assert res.ntk_spectrum.kind == "full" and res.ntk_spectrum.numerical_rank == 60
    # Choosing outputs (Net.select_outputs) keeps the same readout features.
    picked = feature_rank(net.select_outputs(index=[0, 2]), x, ntk_gram="none")
    assert picked.sigma_min == pytest.approx(res.sigma_min, rel=1e-12)
    # The quickstart's old line measured the readout's 3 outputs (+ 1), not the hidden layer.
    assert feature_rank(net, x, layer="Dense_0", ntk_gram="none").rank == 4
    # n > width + 1: impossible, said plainly; the rank still matches numpy.
    x2 = np.random.default_rng(7).standard_normal((40, 5))
    wide = feature_rank(net, x2, ntk_gram="none")
    a2 = np.concatenate([_hidden(net, x2), np.ones((40, 1))], axis=1)
    assert wide.rank == np.linalg.matrix_rank(a2) == 25 and not wide.full_rank
    assert "impossible" in wide.verdict and "24 features + 1 < n = 40" in wide.verdict
    assert wide.ntk_spectrum is None and wide.ntk_lambda_min is None


def test_readout_found_through_scales_in_plain_and_nnx_models():
    # NTK parameterization (Jacot, Gabriel & Hongler, NeurIPS 2018): f = tanh(x W/√d) V/√m + b;
    # the features are tanh(x W/√d), recomputed by hand. nnx: tanh(first(x)) by hand.
    rng = np.random.default_rng(8)
    x = rng.standard_normal((15, 4))
    params = {"w": jnp.asarray(rng.standard_normal((4, 9))),
              "v": jnp.asarray(rng.standard_normal((9, 2))), "b": jnp.zeros(2)}

    def apply(p, xb):
        return jnp.tanh(xb @ p["w"] / 2.0) @ p["v"] / 3.0 + p["b"][None, :]

    res = feature_rank(Net(apply, params), x, ntk_gram="none")
    h = np.tanh(x @ np.asarray(params["w"]) / 2.0)
    assert res.rank == np.linalg.matrix_rank(np.c_[h, np.ones(15)]) == 10
    assert res.sigma_max == pytest.approx(feature_rank_of(h).sigma_max, rel=1e-10)
    model = _NNX(nnx.Rngs(1))
    hn = np.tanh(x[:, :3] @ np.asarray(model.first.kernel.get_value())
                 + np.asarray(model.first.bias.get_value())[None, :])
    got = feature_rank(Net.from_nnx(model), x[:, :3], ntk_gram="none")
    assert got.sigma_min == pytest.approx(feature_rank_of(hn).sigma_min, rel=1e-10)
    with pytest.raises(ValueError, match="found no final linear readout.*`tanh`"):
        feature_rank(Net(lambda p, xb: jnp.tanh(xb @ p["w"]), params), x)
    with pytest.raises(ValueError, match="two input-dependent values"):
        feature_rank(Net(lambda p, xb: (xb @ p["w"]) @ (xb @ p["w"]).T, params), x)


def _digits_features():
    from sklearn.datasets import load_digits

    x = load_digits(return_X_y=True)[0][:200]
    w = np.random.default_rng(0).standard_normal((64, 300))
    return x, w


def test_float32_features_of_digits_use_float32_rounding():
    # The case: features x W of 200 digits (sklearn's load_digits), width 300. Exact
    # rank of [x W, 1] is rank(x) + 1 = 54 (numpy.linalg.matrix_rank in float64); float64's eps
    # on the float32 product counts its rounding as rank (numpy says 200). With float32's eps
    # the rank is ≤ 60, or flagged unreliable with a warning; dtype="float64" settles it at 54.
    x, w = _digits_features()
    exact = np.c_[x @ w, np.ones(200)]
    assert np.linalg.matrix_rank(exact) == np.linalg.matrix_rank(x) + 1 == 54
    h32 = x.astype(np.float32) @ w.astype(np.float32)
    assert np.linalg.matrix_rank(np.c_[h32.astype(np.float64), np.ones(200)]) == 200
    with pytest.warns(RuntimeWarning, match="float32"):
        of = feature_rank_of(h32)
    assert of.rank <= 60 and of.precision == "float32" and not of.reliable
    assert of.tol == pytest.approx(of.sigma_max * 301 * np.finfo(np.float32).eps)
    net = Net(lambda p, xb: xb @ p["w"], {"w": jnp.asarray(w, dtype=jnp.float32)})
    with jax.enable_x64(False):
        with pytest.warns(RuntimeWarning, match="float32"):
            got = feature_rank(net, x.astype(np.float32), layer=lambda p, xb: xb @ p["w"],
                               ntk_gram="none")
        settled = feature_rank(net, x, layer=lambda p, xb: xb @ p["w"], ntk_gram="none",
                               dtype="float64")
        assert not jax.config.jax_enable_x64
    assert got.rank <= 60 and not got.reliable and got.precision == "float32"
    assert settled.rank == 54 and settled.reliable and settled.precision == "float64"


def test_over_inits_fraction_matches_numpy_per_init():
    # Each initialization's rank against numpy.linalg.matrix_rank of its hidden activations,
    # recomputed by hand from the same keys (splits of PRNGKey(seed)). Width 24 >= n - 1 passes
    # for generic weights; n = 30 > width + 1 never does.
    x = np.random.default_rng(9).standard_normal((30, 5))
    model = _Quickstart(width=24)

    def init(key):
        return Net.from_linen(model, model.init(key, x[:1]))

    for n, want in ((20, 1.0), (30, 0.0)):
        sample = feature_rank_over_inits(init, x[:n], num_inits=3, seed=4)
        keys = jax.random.split(jax.random.PRNGKey(4), 3)
        ref = [np.linalg.matrix_rank(np.c_[_hidden(init(k), x[:n]), np.ones(n)]) for k in keys]
        assert sample.ranks.tolist() == ref and sample.fraction_full_rank == want
        assert sample.num_inits == 3 and sample.fraction_reliable == 1.0
        assert sample.ntk_lambda_min is None and len(sample.results) == 3
    with pytest.raises(TypeError, match="init\\(key\\)` must return an ntkcalc.Net"):
        feature_rank_over_inits(lambda key: key, x)


def test_quickstart_feature_rank_against_numpy_on_hidden_activations():
    # docs/quickstart.md's model and data as written there (float32 parameters and inputs):
    # reference numpy.linalg.matrix_rank of [tanh(x W + b), 1], the hidden activations recomputed
    # from the parameters in float32 (numpy then uses float32's eps, as feature_rank does).
    class MLP(nn.Module):
        @nn.compact
        def __call__(self, x):
            return nn.Dense(4)(nn.tanh(nn.Dense(256)(x)))

    x = np.random.default_rng(0).normal(size=(1000, 11)).astype(np.float32)
    model = MLP()
    net = Net.from_linen(model, model.init(jax.random.key(0), x[:1]))
    p = net.params["Dense_1"]
    h = np.tanh(x @ np.asarray(p["kernel"]) + np.asarray(p["bias"])[None, :])
    got = {n: feature_rank(net, x[:n], ntk_gram="none") for n in (200, 1000)}
    for n, res in got.items():
        assert res.precision == "float32" and res.num_features == 257
        assert res.rank == np.linalg.matrix_rank(np.c_[h[:n], np.ones((n, 1), np.float32)])
    assert got[200].full_rank and got[200].reliable
    assert got[1000].rank == 257 and "impossible" in got[1000].verdict  # 1000 > 256 + 1
