"""The matrix-free NTK against a dense float64 jax.jacrev Jacobian contraction written here."""

import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.linalg
import scipy.sparse.linalg as spla

from ntkcalc._adapters.net import Net
from ntkcalc._analysis.hutchpp import estimate_trace
from ntkcalc._analysis.operator import NTKOperator, ntk_operator
from ntkcalc._analysis.ridge import ridge_fit
from ntkcalc._analysis.spectrum import spectrum


class _MLP(nn.Module):
    @nn.compact
    def __call__(self, x):
        dense = dict(dtype=jnp.float64, param_dtype=jnp.float64)
        return nn.Dense(3, **dense)(jnp.tanh(nn.Dense(32, **dense)(x)))


@pytest.fixture(scope="module")
def setup():
    x = np.random.default_rng(0).standard_normal((2000, 8))
    module = _MLP()
    variables = module.init(jax.random.PRNGKey(0), x[:1])
    net = Net.from_linen(module, variables)
    # Per-example jacrev, vmapped: the same Jacobian as jacrev of the batch, without N·O
    # backward passes over the whole batch.
    jac = jax.vmap(jax.jacrev(lambda p, xi: net.apply(p, xi[None])[0]), in_axes=(None, 0))(
        net.params, x)
    leaves = jax.tree_util.tree_leaves(jac)
    j = np.asarray(jnp.concatenate([leaf.reshape(2000, 3, -1) for leaf in leaves], axis=-1))
    jcat = j.reshape(2000, -1)  # [J_1 ... J_O], so that Σ_a J_a J_aᵀ = jcat jcatᵀ
    return net, x, j, jcat @ jcat.T  # j: (N, O, P) dense reference Jacobian; its trace kernel


def test_trace_mode_matches_dense_kernel(setup):
    # Reference: Σ_a J_a J_aᵀ from the dense jacrev Jacobian, N = 2000 (8 batches of 256, the last
    # padded); agreement to 1e-10 relative in float64.
    net, x, _, k = setup
    op = ntk_operator(net, x, outputs="trace", batch=256)
    assert isinstance(op, NTKOperator) and op.shape == (2000, 2000) and op.dtype == np.float64
    v = np.random.default_rng(1).standard_normal((2000, 4))
    np.testing.assert_allclose(op.matmat(v), k @ v, rtol=1e-10, atol=1e-10 * np.abs(k @ v).max())
    np.testing.assert_allclose(op.matvec(v[:, 0]), k @ v[:, 0], rtol=1e-10,
                               atol=1e-10 * np.abs(k @ v).max())
    assert op.matvecs == 5 and "matvecs=5" in repr(op)


def test_full_and_output_sum_modes(setup):
    # Reference: J Jᵀ over (example, output) pairs (row i·O + a) and (Σ_a J_a)(Σ_a J_a)ᵀ, on the
    # first 300 examples, batches of 128 (last padded).
    net, x, j, _ = setup
    j3 = j[:300]
    full = np.einsum("iap,jbp->iajb", j3, j3).reshape(900, 900)
    summed = np.einsum("ip,jp->ij", j3.sum(1), j3.sum(1))
    v = np.random.default_rng(2).standard_normal((900, 2))
    op = ntk_operator(net, x[:300], outputs="full", batch=128)
    assert op.shape == (900, 900)
    np.testing.assert_allclose(op.matmat(v), full @ v, rtol=1e-10, atol=1e-9)
    op_sum = ntk_operator(net, x[:300], outputs="logit-sum", batch=128)
    np.testing.assert_allclose(op_sum.matmat(v[:300]), summed @ v[:300], rtol=1e-10, atol=1e-9)


def test_operator_feeds_lanczos_hutchpp_and_cg(setup):
    # The operator through scipy's Lanczos (eigsh), Hutch++ and CG, against the same quantities
    # of the dense kernel: top-3 eigenvalues to 1e-8, trace within 5% (60 queries), ridge
    # solution (ridge 300) to 1e-6.
    net, x, j, k = setup
    op = ntk_operator(net, x, outputs="trace")
    top = spectrum(op, top=3)
    jcat = j.reshape(2000, -1)  # [J_1 ... J_O]: K = jcat jcatᵀ shares its nonzero eigenvalues
    dense_top = np.linalg.eigvalsh(jcat.T @ jcat)[::-1][:3]  # with the smaller jcatᵀ jcat
    np.testing.assert_allclose(top.eigenvalues, dense_top, rtol=1e-8)
    assert estimate_trace(op, num_queries=60, seed=0).value == pytest.approx(np.trace(k), rel=0.05)
    y = np.sin(x[:, :1])
    fit = ridge_fit(op, y, ridge=300.0)
    dense = scipy.linalg.cho_solve(scipy.linalg.cho_factor(k + 300.0 * np.eye(2000)), y)
    np.testing.assert_allclose(fit.dual_coef, dense, rtol=1e-6, atol=1e-8)


def test_plain_function_net_and_bad_input():
    def apply(params, x):
        return jnp.tanh(x @ params["w"]) @ params["v"]

    params = {"w": jnp.ones((2, 4)) * 0.3, "v": jnp.ones((4, 1))}
    x = np.linspace(-1, 1, 10).reshape(5, 2)
    net = Net(apply, params)
    op = ntk_operator(net, x, batch=2)
    jac = jax.jacrev(lambda p: apply(p, x))(params)
    j = np.concatenate([np.asarray(leaf).reshape(5, -1) for leaf in jax.tree_util.tree_leaves(jac)],
                       axis=1)
    np.testing.assert_allclose(op @ np.eye(5), j @ j.T, rtol=1e-12, atol=1e-12)
    assert isinstance(op, spla.LinearOperator)
    # A checkpoint (same call, new params) reuses the compiled products and uses the new params.
    net2 = net.replace(params={"w": params["w"], "v": 2.0 * params["v"]})
    op2 = ntk_operator(net2, x, batch=2)
    assert op2._pull is op._pull
    j2 = j * np.concatenate([np.ones(4), np.full(8, 2.0)])[None, :]  # leaves (v, w): ∂/∂w doubles
    np.testing.assert_allclose(op2 @ np.eye(5), j2 @ j2.T, rtol=1e-12, atol=1e-12)
    with pytest.raises(ValueError, match="`outputs` must be"):
        ntk_operator(Net(apply, params), x, outputs="diagonal")
    with pytest.raises(ValueError, match="`batch` must be an integer >= 1"):
        ntk_operator(Net(apply, params), x, batch=0)
    with pytest.raises(TypeError, match="`net` must be an ntkcalc Net"):
        ntk_operator(apply, x)


def test_float32_network_warns():
    module = _MLP()
    x32 = np.ones((4, 8), dtype=np.float32)
    params32 = jax.tree_util.tree_map(lambda a: a.astype(jnp.float32),
                                      module.init(jax.random.PRNGKey(0), x32))
    net = Net(lambda p, x: module.apply(p, x.astype(jnp.float32)).astype(jnp.float32), params32)
    with pytest.warns(RuntimeWarning, match="computes in float32"):
        op = ntk_operator(net, x32)
    assert op.matvec(np.ones(4)).dtype == np.float64
