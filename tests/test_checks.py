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


# -- silent wrong results become errors (issue 12) --------------------------------------------


def _lin(p, x):
    return x @ p["w"] + p["b"][None]


def test_complex_inputs_params_and_state_are_refused():
    # numpy would drop the imaginary part with only a ComplexWarning: a wrong kernel.
    net = _net()
    with pytest.raises(TypeError, match=r"`x1` has complex dtype complex128"):
        ntkcalc.ntk(net, X + 1j)
    with pytest.raises(TypeError, match=r"`x2` has complex dtype"):
        ntkcalc.ntk(net, X, X + 0j)
    bad = net.replace(params={"w": net.params["w"] + 1j, "b": net.params["b"]})
    with pytest.raises(TypeError, match=r"`net.params` leaf 'w' has complex dtype"):
        ntkcalc.ntk(bad, X)
    with pytest.raises(TypeError, match=r"`net.state` leaf 's' has complex dtype"):
        ntkcalc.ntk(net.replace(state={"s": jnp.ones(2) * 1j}), X)


def test_non_finite_state_reports_leaf():
    # Frozen state (batch statistics) is checked like the parameters.
    net = net_with_stats = ntkcalc.Net(lambda p, x: x @ p["w"], {"w": jnp.ones((4, 2))})
    net_with_stats = net.replace(state={"batch_stats": {"var": jnp.array([1.0, jnp.nan])}})
    with pytest.raises(ValueError, match=r"`net.state` leaf 'batch_stats.var' holds a non-finite "
                                         r"value nan at index \(1,\)"):
        ntkcalc.ntk(net_with_stats, X)


def test_none_input_is_not_called_a_scalar():
    with pytest.raises(TypeError, match=r"`x1` is None: pass a batch"):
        ntkcalc.ntk(_net(), None)


XS = np.arange(12.0).reshape(3, 4) / 10  # distinct examples


@pytest.mark.parametrize("model", [
    lambda p, x: (x - x.mean(0, keepdims=True)) @ p["w"],  # centring by the batch mean
    lambda p, x: (x / jnp.linalg.norm(x)) @ p["w"],  # normalising by the whole batch
])
def test_examples_interacting_in_a_batch_are_detected(model):
    # Evaluated one example at a time, x - x.mean(0) is zero: the kernel came back all zeros.
    net = ntkcalc.Net(model, {"w": jnp.ones((4, 2))})
    with pytest.raises(ValueError, match=r"`net` mixes the examples of a batch"):
        ntkcalc.ntk(net, XS)
    with pytest.raises(ValueError, match=r"`net` mixes the examples of a batch"):
        ntkcalc.ntk(net, XS[:1], XS[1:])  # one example in x1: x2 completes the probe


@pytest.mark.parametrize("method", ["auto", "structured", "jacobian", "jvp"])
def test_filter_of_unused_parameters_is_one_clear_error(method):
    # Before: IndexError with auto/structured, a zero kernel with jacobian/jvp.
    net = ntkcalc.Net(lambda p, x: x @ p["w"], {"w": jnp.ones((4, 2)), "b": jnp.zeros(2)})
    with pytest.raises(ValueError, match=r"`params` selects only parameters the model's outputs "
                                         r"do not depend on \(b\)"):
        ntkcalc.ntk(net, XS, params="b", method=method)


def test_single_leaf_dict_output_says_how_to_unwrap():
    net = ntkcalc.Net(lambda p, x: {"logits": _lin(p, x)}, _net().params)
    with pytest.raises(TypeError, match=r"returned a dict holding one array \('logits'\).*"
                                        r"apply\(p, x\)\['logits'\]"):
        ntkcalc.ntk(net, X)


def _custom_vjp_net():
    import jax

    @jax.custom_vjp
    def sin(z):
        return jnp.sin(z)

    sin.defvjp(lambda z: (jnp.sin(z), z), lambda z, g: (jnp.cos(z) * g,))
    return ntkcalc.Net(lambda p, x: sin(_lin(p, x)), _net().params)


def test_jvp_on_custom_vjp_model():
    # jax.custom_vjp has no forward mode: method="jvp" is refused up front, "auto" avoids it.
    from helpers import assert_close, reference_full

    net = _custom_vjp_net()
    with pytest.raises(ValueError, match=r"`method`='jvp' needs forward-mode derivatives.*"
                                         r"custom_vjp"):
        ntkcalc.ntk(net, XS, method="jvp")
    plan = ntkcalc.plan(net, XS)
    assert "jvp" not in plan.estimates
    ref = np.einsum("ijaa->ij", reference_full(net, XS))  # dense jax.jacrev (helpers)
    assert_close(ntkcalc.ntk(net, XS), ref)


@pytest.mark.parametrize("model", [
    lambda p, x: np.asarray(x) @ p["w"],  # numpy on a traced value
    lambda p, x: x @ p["w"] if float(x.sum()) > 0 else -x @ p["w"],  # Python `if` on a value
])
def test_untraceable_model_is_not_blamed_on_inputs(model):
    net = ntkcalc.Net(model, {"w": jnp.ones((4, 2))})
    with pytest.raises(TypeError, match=r"`net` cannot be traced by JAX.*jnp.where"):
        ntkcalc.ntk(net, X)


def test_reduced_precision_outputs_are_refused():
    net = ntkcalc.Net(lambda p, x: _lin(p, x).astype(jnp.bfloat16), _net().params)
    with pytest.raises(TypeError, match=r"outputs have dtype bfloat16: the model computes in "
                                        r"reduced precision"):
        ntkcalc.ntk(net, X)


def test_memory_as_numpy_integer_nan_or_inf():
    np.testing.assert_array_equal(ntkcalc.ntk(_net(), X, memory=np.int64(10**9)),
                                  ntkcalc.ntk(_net(), X))
    for bad in (float("nan"), float("inf"), "infGB", np.float32("nan")):
        with pytest.raises(ValueError, match=r"`memory`=.* (must be a positive, finite|is not a "
                                             r"memory size)"):
            ntkcalc.ntk(_net(), X, memory=bad)


def _sqrt_net():
    # f(x) = sqrt(x·w): NaN for examples with x·w < 0 (here example 2, w = ones).
    return ntkcalc.Net(lambda p, x: jnp.sqrt(x @ p["w"]), {"w": jnp.ones((4, 1))})


XN = np.array([[1.0, 1, 1, 1], [2, 0, 0, 0], [-3, 0, 0, 0], [0.5, 0, 0, 0]])


@pytest.mark.parametrize("memory", [None, "20KB"], ids=["one-tile", "tiles"])
def test_non_finite_kernel_names_the_examples(memory):
    with pytest.raises(FloatingPointError, match=r"non-finite value\(s\) \(nan\).*"
                                                  r"first at K\[(0, 2|2, 2)\].*x1 examples\): "
                                                  r".*2"):
        ntkcalc.ntk(_sqrt_net(), XN, memory=memory, progress=False)


def test_non_finite_tile_is_not_stored(tmp_path):
    with pytest.raises(FloatingPointError, match=r"non-finite"):
        ntkcalc.ntk(_sqrt_net(), XN, store=tmp_path / "k.zarr", progress=False)
    # The fixed inputs resume into the same store: nothing non-finite was written as done.
    view = ntkcalc.ntk(_sqrt_net(), np.abs(XN), store=tmp_path / "k2.zarr", progress=False)
    assert np.all(np.isfinite(np.asarray(view)))


def test_overflow_to_inf_is_reported():
    # exp(1000·x) overflows float64 for x > 0.71: the kernel held inf without an error.
    net = ntkcalc.Net(lambda p, x: jnp.exp(1000.0 * (x @ p["w"])), {"w": jnp.ones((4, 1))})
    with pytest.raises(FloatingPointError, match=r"\(inf|nan"):
        ntkcalc.ntk(net, XN)


def test_underflow_to_zero_kernel_warns():
    # exp(-1000·x²) and its derivative underflow to exactly 0: say so instead of a silent zero.
    net = ntkcalc.Net(lambda p, x: jnp.exp(-1000.0 * (x @ p["w"]) ** 2), {"w": jnp.ones((4, 1))})
    with pytest.warns(RuntimeWarning, match="the kernel is exactly zero"):
        k = ntkcalc.ntk(net, XN + 2.0)
    assert not np.any(k)


def test_non_array_leaf_is_named():
    # Before: numpy's "ufunc 'isfinite' not supported" from inside the finite check.
    import fractions

    net = ntkcalc.Net(lambda p, x: x @ p["w"], {"w": jnp.ones((4, 2)), "s": fractions.Fraction(1)})
    with pytest.raises(TypeError, match=r"`net.params` leaf 's' is a Fraction, not an array"):
        ntkcalc.ntk(net, X)
