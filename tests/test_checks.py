"""Bad input gets a clear error before any compute: the argument, what came, what to do."""

from __future__ import annotations

import jax.numpy as jnp
import numpy as np
import pytest

import ntkcalc


def _net():
    params = {"w": jnp.ones((4, 2)), "b": jnp.zeros(2)}
    return ntkcalc.Net(lambda p, x: x @ p["w"] + p["b"][None], params)


X = np.ones((3, 4))


def test_feature_shapes_differ():
    with pytest.raises(ValueError, match=r"`x2` has feature shape \(5,\) but `x1` has \(4,\)"):
        ntkcalc.ntk(_net(), X, np.ones((2, 5)))


def test_inputs_do_not_fit_model():
    match = r"`x1` with feature shape \(7,\) .* does not fit the model"
    with pytest.raises(ValueError, match=match):
        ntkcalc.ntk(_net(), np.ones((3, 7)))


def test_empty_batch():
    with pytest.raises(ValueError, match=r"`x1` is an empty batch"):
        ntkcalc.ntk(_net(), np.ones((0, 4)))


def test_scalar_input():
    with pytest.raises(ValueError, match=r"`x1` is a scalar"):
        ntkcalc.ntk(_net(), np.float64(1.0))


def test_nan_in_inputs_reports_index():
    x = X.copy()
    x[2, 1] = np.nan
    with pytest.raises(ValueError, match=r"`x1` holds a non-finite value nan at index \(2, 1\)"):
        ntkcalc.ntk(_net(), x)


def test_inf_in_params_reports_leaf():
    net = _net()
    bad = net.replace(params={"w": net.params["w"].at[1, 0].set(jnp.inf), "b": net.params["b"]})
    match = r"leaf 'w' holds a non-finite value inf at index \(1, 0\)"
    with pytest.raises(ValueError, match=match):
        ntkcalc.ntk(bad, X)


def test_outputs_not_batched():
    net = ntkcalc.Net(lambda p, x: (x @ p["w"]).sum(0), {"w": jnp.ones((4, 2))})
    with pytest.raises(ValueError, match="not batched on axis 0"):
        ntkcalc.ntk(net, X)


@pytest.mark.parametrize("kw,match", [
    ({"method": "magic"}, r"`method`='magic' is not known"),
    ({"outputs": "all"}, r"`outputs`='all' is not known"),
    ({"params": "nothing_here"}, r"`params`='nothing_here' matches no parameter.*w"),
    ({"params": "("}, r"not a valid regular expression"),
    ({"memory": "lots"}, r"`memory`='lots' is not a memory size"),
])
def test_bad_options(kw, match):
    with pytest.raises((ValueError, TypeError), match=match):
        ntkcalc.ntk(_net(), X, **kw)


def test_integer_params_not_differentiable():
    net = ntkcalc.Net(lambda p, x: x @ p["w"] * p["n"], {"w": jnp.ones((4, 2)), "n": jnp.int32(3)})
    with pytest.raises(TypeError, match=r"parameter 'n' has dtype int32"):
        ntkcalc.ntk(net, X)
    # Excluding the integer leaf with a filter is the documented way out.
    k = ntkcalc.ntk(net, X, params="w")
    np.testing.assert_allclose(k, 9 * 2 * X @ X.T)  # f = 3·xW: Θ_trace = 9·O·(x1·x2)


def test_not_a_net():
    with pytest.raises(TypeError, match="`net` must be an ntkcalc.Net"):
        ntkcalc.ntk(lambda x: x, X)


def test_memory_too_small_says_what_works():
    with pytest.raises(MemoryError, match="smallest budget that works is about"):
        ntkcalc.ntk(_net(), X, memory=10)


def test_integer_tokens_are_data():
    # Token ids are inputs, not differentiated: an embedding model's kernel is defined.
    table = jnp.arange(12.0).reshape(6, 2) / 10
    net = ntkcalc.Net(lambda p, t: p["e"][t].sum(1), {"e": table})
    t = np.array([[0, 1], [1, 1], [5, 2]], np.int32)
    k = ntkcalc.ntk(net, t)
    counts = np.stack([np.bincount(r, minlength=6) for r in t]).astype(float)
    np.testing.assert_allclose(k, 2 * counts @ counts.T)  # direct differentiation
