"""The matrix-free NTK against the dense float64 jax.jacrev reference (tests/helpers.py), against
the dense kernel from `ntk`, and through scipy's Lanczos, CG and Hutch++ against numpy."""

import functools

import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.linalg
import scipy.sparse.linalg as spla
from helpers import ZOO, assert_close, f64, reduce_mode, reference_full

import ntkcalc
from ntkcalc._adapters.net import Net
from ntkcalc._analysis import operator as operator_module
from ntkcalc._analysis.hutchpp import estimate_trace
from ntkcalc._analysis.operator import NTKOperator, ntk_operator
from ntkcalc._analysis.ridge import ridge_fit
from ntkcalc._analysis.spectrum import spectrum
from ntkcalc._engine import products

MODES = ("trace", "full", "logit-sum")
PATHS = ("products", "factors")
CASES = {c.name: c for c in ZOO}


def as_matrix(full: np.ndarray, outputs: str) -> np.ndarray:
    """The operator's matrix from the (N, N, O, O) reference: rows i·O + a for "full"."""
    k = reduce_mode(full, outputs)
    if outputs == "full":
        n, _, o, _ = k.shape
        return k.transpose(0, 2, 1, 3).reshape(n * o, n * o)
    return k


@functools.cache
def case(name: str, n: int = 7):
    net = CASES[name].make()
    x = CASES[name].x(np.random.default_rng(0), n)
    return net, x, reference_full(net, x, jit=True)


# The zoo's conv (grouped, dilated; its leaves factored, streamed, dense and folded), embedding
# (looked-up rows) and shared-weight (a leaf used twice: formed derivatives) models.
@pytest.mark.parametrize("name", ["cnn", "tokens", "shared-weight"])
def test_every_mode_and_path_matches_reference(name):
    # Reference: Θ = J Jᵀ from the whole-batch jax.jacrev Jacobian (direct differentiation,
    # float64) and the dense kernel from `ntk` ("full", each mode by its definition); 1e-10
    # relative. Batches of 3 over 7 examples (the last one padded). Factors: the same per-leaf
    # representation `ntk` plans.
    net, x, full = case(name)
    dense_full = np.asarray(ntkcalc.ntk(net, x, outputs="full", progress=False))
    for outputs in MODES:
        want, dense = as_matrix(full, outputs), as_matrix(dense_full, outputs)
        for method in PATHS:
            op = ntk_operator(net, x, outputs=outputs, method=method, batch=3)
            assert op.method == method and op.shape == want.shape
            got = op @ np.eye(op.shape[0])
            assert_close(got, want)
            assert_close(got, dense)


def test_convolutions_dense_or_factored(monkeypatch):
    # The zoo CNN's convolutions have dense derivatives smaller than their factors, so the
    # operator forms them once (`representations`); with the planner's own representations
    # (streamed: factors over image patches) the products are the same. Reference: jacrev, 1e-10.
    net, x, full = case("cnn")
    op = ntk_operator(net, x, method="factors", batch=3)
    assert op._program.kinds[1::2][:3] == ("dense",) * 3  # the three conv kernels
    monkeypatch.setattr(operator_module, "representations", lambda plan, itemsize: (
        plan.program, sum(leaf.bytes_per_example for leaf in plan.leaves)))
    for outputs in ("trace", "full"):
        op = ntk_operator(net, x, outputs=outputs, method="factors", batch=3)
        assert op._program.kinds[1::2][:3] == ("streamed",) * 3
        assert_close(op @ np.eye(op.shape[0]), as_matrix(full, outputs))


def test_params_filter_and_column_groups():
    # Reference: jacrev restricted to the selected leaves (the filter of `ntk`). A budget that
    # holds the cached factors but only two "trace" probe columns at a time gives the same
    # product in groups of columns.
    net, x, _ = case("mlp")
    want = reduce_mode(reference_full(net, x, params=lambda n: "Dense_1" in n, jit=True),
                       "trace")
    for method in PATHS:
        op = ntk_operator(net, x, params="Dense_1", method=method, batch=4)
        assert_close(op @ np.eye(7), want)
    per_column = 3 * sum(np.size(p) for p in jax.tree_util.tree_leaves(net.params)) * 8
    op = ntk_operator(net, x, method="factors", memory=4 * 2 * per_column)
    assert op._columns() == 2
    full = reduce_mode(case("mlp")[2], "trace")
    v = np.random.default_rng(3).standard_normal((7, 5))
    assert_close(op.matmat(v), full @ v)


def test_dtype_policy_follows_ntk():
    # dtype="float64" with JAX x64 off: every product still runs in float64 (jacrev reference,
    # 1e-10), also when applied after leaving the x64-off context. dtype="float32" with x64 on:
    # float32-level agreement (1e-5) and the precision warning.
    net, x, full = case("mlp")
    want = reduce_mode(full, "trace")
    with jax.enable_x64(False):
        ops = [ntk_operator(net, x, dtype="float64", method=m) for m in PATHS]
        for op in ops:
            assert op.dtype_used == np.float64
            assert_close(op @ np.eye(7), want)
    for op in ops:
        assert_close(op @ np.eye(7), want)
    for method in PATHS:
        with pytest.warns(RuntimeWarning, match="computes in float32"):
            op = ntk_operator(net, x, dtype="float32", method=method)
        assert op.dtype_used == np.float32 and op.matvec(np.ones(7)).dtype == np.float64
        assert_close(op @ np.eye(7), want, rtol=1e-5)


def test_every_product_traces_at_highest_precision(monkeypatch):
    # Common practice: matmul precision "highest" keeps TF32/bf16 out of float32 products on
    # accelerators. A model new to the compile caches is traced under an outer "bfloat16"
    # default; every product function must see "highest".
    seen = []
    for fn in ("pull", "push", "factor_pull", "factor_push"):
        orig = getattr(products, fn)

        def spy(*args, _orig=orig, **kwargs):
            seen.append(jax.config.jax_default_matmul_precision)
            return _orig(*args, **kwargs)

        monkeypatch.setattr(products, fn, spy)
    w = jnp.linspace(-1.0, 1.0, 12).reshape(3, 4)
    net = Net(lambda p, x: jnp.sin(x @ p["w"]) @ p["w"].T, {"w": w})
    x = np.linspace(0.0, 1.0, 9).reshape(3, 3)
    with jax.default_matmul_precision("bfloat16"):
        for method in PATHS:
            ntk_operator(net, x, method=method).matvec(np.ones(3))
    assert len(seen) >= 4 and set(seen) == {"highest"}


def test_validation_is_that_of_ntk():
    # The same checks and messages as `ntk` (`x` named as this function's argument).
    net, x, _ = case("mlp")

    def message(fn, *args, **kwargs):
        with pytest.raises((TypeError, ValueError)) as err:
            fn(*args, **kwargs)
        return type(err.value), str(err.value)

    assert message(ntk_operator, lambda p, x: x, x) == message(ntkcalc.ntk, lambda p, x: x, x)
    assert message(ntk_operator, net, x, params="nothing") == message(
        ntkcalc.ntk, net, x, params="nothing")
    assert message(ntk_operator, net, x, dtype="float16") == message(
        ntkcalc.ntk, net, x, dtype="float16")
    bad = x.copy()
    bad[2, 1] = np.nan
    kind, text = message(ntkcalc.ntk, net, bad)
    assert message(ntk_operator, net, bad) == (kind, text.replace("`x1`", "`x`"))
    assert message(ntk_operator, net, x, outputs="diagonal") == (
        ValueError, "`outputs`='diagonal' is not known: use one of 'trace', 'full', 'logit-sum'.")
    assert message(ntk_operator, net, x, method="jvp")[1].startswith("`method`='jvp' is not known")
    with pytest.raises(ValueError, match="`batch` must be an integer >= 1"):
        ntk_operator(net, x, batch=0)


@jax.custom_vjp
def _clipped(h):
    return jnp.tanh(h)


_clipped.defvjp(lambda h: (jnp.tanh(h), h), lambda h, c: (c * (1 - jnp.tanh(h) ** 2),))


def test_auto_choice_and_custom_vjp():
    # "auto": factors when they fit half the budget, else products; a jax.custom_vjp model has no
    # forward mode, so "products" is refused and "auto" uses factors (recomputed per product when
    # they do not fit). Reference: jacrev (the custom rule is tanh's own derivative).
    net, x, _ = case("mlp")
    assert ntk_operator(net, x).method == "factors"
    op = ntk_operator(net, x, memory="8KB")
    assert op.method == "products" and "method=products" in repr(op)
    params = {"w": jnp.linspace(-1.0, 1.0, 12).reshape(3, 4), "v": jnp.ones((4, 2))}
    cnet = Net(lambda p, x: _clipped(x @ p["w"]) @ p["v"], params)
    xs = np.linspace(-1.0, 1.0, 15).reshape(5, 3)
    with pytest.raises(ValueError, match="needs forward-mode derivatives"):
        ntk_operator(cnet, xs, method="products")
    op = ntk_operator(cnet, xs, memory="1KB", batch=2)
    assert op.method == "factors" and not op.cached
    want = reduce_mode(reference_full(cnet, xs), "trace")
    assert_close(op @ np.eye(5), want)
    assert_close(op @ np.eye(5), want)  # the factors recomputed: the same again


def test_checkpoint_reuses_compiled_products():
    def apply(params, x):
        return jnp.tanh(x @ params["w"]) @ params["v"]

    params = {"w": jnp.ones((2, 4)) * 0.3, "v": jnp.ones((4, 1))}
    x = np.linspace(-1, 1, 10).reshape(5, 2)
    net = Net(apply, params)
    jac = jax.jacrev(lambda p: apply(p, x))(params)
    j = np.concatenate([np.asarray(leaf).reshape(5, -1) for leaf in jax.tree_util.tree_leaves(jac)],
                       axis=1)
    for method in PATHS:
        op = ntk_operator(net, x, batch=2, method=method)
        assert isinstance(op, spla.LinearOperator) and isinstance(op, NTKOperator)
        np.testing.assert_allclose(op @ np.eye(5), j @ j.T, rtol=1e-12, atol=1e-12)
        # A checkpoint (same call, new params) reuses the compiled products with the new params.
        net2 = net.replace(params={"w": params["w"], "v": 2.0 * params["v"]})
        op2 = ntk_operator(net2, x, batch=2, method=method)
        assert op2._pull is op._pull
        j2 = j * np.concatenate([np.ones(4), np.full(8, 2.0)])[None, :]  # leaves (v, w)
        np.testing.assert_allclose(op2 @ np.eye(5), j2 @ j2.T, rtol=1e-12, atol=1e-12)


class _MLP(nn.Module):
    @nn.compact
    def __call__(self, x):
        return nn.Dense(3)(jnp.tanh(nn.Dense(32)(x)))


@pytest.fixture(scope="module")
def setup():
    x = np.random.default_rng(0).standard_normal((600, 8))
    module = _MLP()
    net = Net.from_linen(module, f64(module.init(jax.random.PRNGKey(0), x[:1])))
    j = jax.vmap(jax.jacrev(lambda p, xi: net.apply(p, xi[None])[0]), in_axes=(None, 0))(
        net.params, x)
    jcat = np.concatenate([np.asarray(leaf).reshape(600, -1)
                           for leaf in jax.tree_util.tree_leaves(j)], axis=1)
    return net, x, jcat @ jcat.T  # Σ_a J_a J_aᵀ with the per-example jacrev Jacobian


@pytest.mark.parametrize("method", PATHS)
def test_operator_feeds_lanczos_hutchpp_and_cg(setup, method):
    # The operator through scipy's eigsh (ARPACK Lanczos), Hutch++ and CG, against the same
    # quantities of the dense kernel (numpy eigh, trace, scipy cho_solve): top-5 eigenvalues to
    # 1e-9, trace within 5% (60 queries), ridge solution (ridge 100) to 1e-6.
    net, x, k = setup
    op = ntk_operator(net, x, outputs="trace", method=method, batch=128)
    top = np.sort(spla.eigsh(op, k=5, which="LA", return_eigenvectors=False))[::-1]
    np.testing.assert_allclose(top, np.linalg.eigh(k)[0][::-1][:5], rtol=1e-9)
    np.testing.assert_allclose(spectrum(op, top=3).eigenvalues, top[:3], rtol=1e-9)
    assert estimate_trace(op, num_queries=60, seed=0).value == pytest.approx(np.trace(k), rel=0.05)
    y = np.sin(x[:, :1])
    fit = ridge_fit(op, y, ridge=100.0)
    dense = scipy.linalg.cho_solve(scipy.linalg.cho_factor(k + 100.0 * np.eye(600)), y)
    np.testing.assert_allclose(fit.dual_coef, dense, rtol=1e-6, atol=1e-8)
