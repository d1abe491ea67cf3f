"""`ntk(..., dtype=...)`: a float64 kernel without JAX's global x64 switch, against the dense
float64 reference (jax.jacrev of the whole batch and an einsum, computed under x64; tests/helpers).
"""

import jax
import numpy as np
import pytest

import ntkcalc
from tests.helpers import MLP, assert_close, f64, reduce_mode, reference_full


def _float32_net():
    x = np.random.default_rng(0).standard_normal((9, 5)).astype(np.float32)
    with jax.enable_x64(False):
        model = MLP(width=7, out=3)
        net = ntkcalc.Net.from_linen(model, model.init(jax.random.PRNGKey(1), x[:1]))
    assert jax.tree_util.tree_leaves(net.params)[0].dtype == np.float32
    return net, x


def test_float64_kernel_of_a_float32_model_without_the_global_switch():
    # The float32 model's parameters, upcast exactly, give the float64 reference; a float64
    # kernel matches it to 1e-10 (a float32 one only to ~1e-6), and x64 stays off afterwards.
    net, x = _float32_net()
    ref = reference_full(net.replace(params=f64(net.params)), x.astype(np.float64))
    with jax.enable_x64(False):
        k = ntkcalc.ntk(net, x, progress=False, dtype="float64")
        full = ntkcalc.ntk(net, x[:4], x, outputs="full", progress=False, dtype="float64")
        parts = ntkcalc.ntk_by_layer(net, x, progress=False, dtype="float64")
        assert not jax.config.jax_enable_x64
        k32 = ntkcalc.ntk(net, x, progress=False)  # the same compiled steps' float32 twin
    assert k.dtype == np.float64 and k.kind == "trace" and k32.dtype == np.float32
    assert_close(k, reduce_mode(ref, "trace"))
    assert_close(full, ref[:4])
    assert_close(sum(parts.values()), k)
    assert not np.allclose(k32, k, rtol=1e-10, atol=0)
    assert_close(k32, k, rtol=1e-5)


def test_float32_under_global_x64_and_bad_dtype():
    # With x64 on (tests/conftest.py), dtype="float32" computes in float32 and leaves x64 on.
    net, x = _float32_net()
    ref = reference_full(net.replace(params=f64(net.params)), x.astype(np.float64))
    k = ntkcalc.ntk(net, x, progress=False, dtype="float32")
    assert jax.config.jax_enable_x64 and k.dtype == np.float32
    assert_close(k, reduce_mode(ref, "trace"), rtol=1e-5)
    with pytest.raises(ValueError, match="`dtype`='float16' is not known"):
        ntkcalc.ntk(net, x, dtype="float16")
