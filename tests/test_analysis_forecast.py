"""Lazy-training forecast against actual gradient-descent runs (optax) and closed forms.

The kernel reference is a dense float64 ``jax.jacrev`` Jacobian contraction written here.
"""

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
import scipy.linalg

from ntkcalc._analysis.forecast import Forecast, forecast


def _init(key, sizes, *, ntk=True):
    params = []
    for fan_in, fan_out in zip(sizes[:-1], sizes[1:]):
        key, sub = jax.random.split(key)
        w = jax.random.normal(sub, (fan_in, fan_out))
        params.append((w if ntk else w / np.sqrt(fan_in), 0.1 * jnp.ones(fan_out)))
    return params


def _apply(params, x, *, ntk=True):
    h = x
    for i, (w, b) in enumerate(params):
        h = h @ w / (np.sqrt(w.shape[0]) if ntk else 1.0) + b[None, :]
        if i < len(params) - 1:
            h = jnp.tanh(h)
    return h


def _jacobian(f, params, x):
    jac = jax.jacrev(lambda p: f(p, x))(params)
    leaves = jax.tree_util.tree_leaves(jac)
    return jnp.concatenate([leaf.reshape(*leaf.shape[:2], -1) for leaf in leaves], axis=-1)


def _kernel(f, params, x1, x2):
    """Dense reference Θ[i, j, a, b] = Σ_p ∂f_a(x_i)/∂p ∂f_b(x_j)/∂p (Jacot et al. 2018)."""
    return np.asarray(jnp.einsum("iap,jbp->ijab", _jacobian(f, params, x1),
                                 _jacobian(f, params, x2)))


def _train(f, params, x, y, *, lr, steps, loss, x_test=None):
    """Full-batch optax.sgd; returns per-step (loss, train outputs, test outputs) before each
    update, for steps 0..steps."""
    opt = optax.sgd(lr)
    n = x.shape[0]

    def loss_fn(p):
        out = f(p, x)
        if loss == "mse":
            return 0.5 * jnp.sum((out - y) ** 2) / n
        return jnp.mean(optax.softmax_cross_entropy(out, y))

    @jax.jit
    def step(p, state):
        value, grad = jax.value_and_grad(loss_fn)(p)
        updates, state = opt.update(grad, state, p)
        test = f(p, x_test) if x_test is not None else jnp.zeros(())
        return optax.apply_updates(p, updates), state, value, f(p, x), test

    state = opt.init(params)
    losses, outs, tests = [], [], []
    for _ in range(steps + 1):
        params, state, value, out, test = step(params, state)
        losses.append(float(value))
        outs.append(np.asarray(out))
        tests.append(np.asarray(test))
    return np.array(losses), np.stack(outs), np.stack(tests)


def _linearized(f, params0):
    """First-order Taylor expansion in the parameters via jax.jvp (Lee et al. 2019, eq. 5)."""

    def f_lin(p, x):
        delta = jax.tree_util.tree_map(jnp.subtract, p, params0)
        y0, dy = jax.jvp(lambda q: f(q, x), (params0,), (delta,))
        return y0 + dy

    return f_lin


@pytest.fixture(scope="module")
def problem():
    rng = np.random.default_rng(0)
    x = rng.standard_normal((12, 3))
    x_test = rng.standard_normal((5, 3))
    labels = rng.integers(0, 2, size=12)
    labels_test = rng.integers(0, 2, size=5)
    params = _init(jax.random.PRNGKey(0), [3, 16, 16, 2])
    f = _apply
    return dict(
        x=x, x_test=x_test, labels=labels, labels_test=labels_test, params=params, f=f,
        k=_kernel(f, params, x, x), k_test=_kernel(f, params, x_test, x),
        f0=np.asarray(f(params, x)), f0_test=np.asarray(f(params, x_test)),
    )


@pytest.mark.parametrize("loss", ["mse", "cross-entropy"])
def test_matches_training_the_linearized_model(problem, loss):
    # Reference: optax.sgd full-batch training of the linearized network (jax.jvp), 40 steps,
    # full (N, N, O, O) kernel; step-by-step equality to rtol 1e-6 (Lee et al., NeurIPS 2019,
    # arXiv:1902.06720: the linearized model's function-space dynamics are exact).
    p = problem
    y = np.eye(2)[p["labels"]]
    y_test = np.eye(2)[p["labels_test"]]
    f_lin = _linearized(p["f"], p["params"])
    lr = 0.5 if loss == "mse" else 1.5
    losses, outs, tests = _train(f_lin, p["params"], p["x"], y, lr=lr, steps=40, loss=loss,
                                 x_test=p["x_test"])
    fc = forecast(p["k"], p["labels"], p["f0"], lr=lr, steps=40, k_test_train=p["k_test"],
                  f0_test=p["f0_test"], y_test=p["labels_test"], loss=loss)
    assert fc.label_format == "integer"
    np.testing.assert_allclose(fc.train_outputs, outs, rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(fc.test_outputs, tests, rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(fc.train_loss, losses, rtol=1e-6)
    acc = np.mean(np.argmax(tests, -1) == np.argmax(y_test, -1), axis=-1)
    np.testing.assert_allclose(fc.test_accuracy, acc)
    one_hot = forecast(p["k"], y, p["f0"], lr=lr, steps=40, loss=loss)
    assert one_hot.label_format == "one-hot"
    np.testing.assert_allclose(one_hot.train_outputs, fc.train_outputs, rtol=1e-12, atol=1e-14)


def test_block_kernel_single_output_matches_linearized_training():
    # Reference: optax.sgd on the linearized one-output network; (N, N) kernel path, with
    # steps requested at a sparse, sorted set.
    rng = np.random.default_rng(1)
    x = rng.standard_normal((10, 3))
    y = np.sin(x[:, :1])
    params = _init(jax.random.PRNGKey(1), [3, 24, 1])
    k = _kernel(_apply, params, x, x)[:, :, 0, 0]
    losses, outs, _ = _train(_linearized(_apply, params), params, x, y, lr=0.7, steps=30,
                             loss="mse")
    steps = np.array([0, 1, 7, 30])
    fc = forecast(k, y[:, 0], np.asarray(_apply(params, x)), lr=0.7, steps=steps)
    np.testing.assert_allclose(fc.train_outputs, outs[steps], rtol=1e-6, atol=1e-10)
    np.testing.assert_allclose(fc.train_loss, losses[steps], rtol=1e-6)
    assert fc.label_format is None and fc.train_accuracy is None


def test_mse_flow_matches_matrix_exponential(problem):
    # Reference: r(t) = expm(−t Θ/N) r(0) and f_test(t) = f_test(0) − Θx Θ⁻¹ (I − expm(−tΘ/N))
    # r(0) (gradient flow of the linear model; Jacot et al. 2018, Lee et al. 2019 eq. 9),
    # evaluated with scipy.linalg.expm and a dense solve.
    p = problem
    y = np.eye(2)[p["labels"]]
    n = 12
    kmat = p["k"].transpose(0, 2, 1, 3).reshape(24, 24)
    kx = p["k_test"].transpose(0, 2, 1, 3).reshape(10, 24)
    fc = forecast(p["k"], y, p["f0"], lr=0.1, steps=np.array([0.0, 5.5, 30.0]), flow=True,
                  k_test_train=p["k_test"], f0_test=p["f0_test"])
    r0 = (p["f0"] - y).ravel()
    for i, t in enumerate(fc.times):
        decay = scipy.linalg.expm(-t * kmat / n)
        np.testing.assert_allclose(fc.train_outputs[i].ravel(), y.ravel() + decay @ r0,
                                   rtol=1e-9, atol=1e-11)
        test = p["f0_test"].ravel() - kx @ np.linalg.solve(kmat, (np.eye(24) - decay) @ r0)
        np.testing.assert_allclose(fc.test_outputs[i].ravel(), test, rtol=1e-7, atol=1e-9)


def test_cross_entropy_flow_is_the_small_step_limit(problem):
    # Euler's method converges at first order (common practice): discrete steps at lr and lr/2
    # to the same time t approach the ODE solution with errors in ratio ≈ 1/2.
    p = problem
    test = dict(k_test_train=p["k_test"], f0_test=p["f0_test"], loss="cross-entropy")
    flow = forecast(p["k"], p["labels"], p["f0"], lr=1.0, steps=np.array([0.0, 4.0]), flow=True,
                    **test)
    errs, test_errs = [], []
    for lr, s in ((0.02, 200), (0.01, 400)):
        fc = forecast(p["k"], p["labels"], p["f0"], lr=lr, steps=np.array([0, s]), **test)
        errs.append(np.max(np.abs(fc.train_outputs[-1] - flow.train_outputs[-1])))
        test_errs.append(np.max(np.abs(fc.test_outputs[-1] - flow.test_outputs[-1])))
    start = forecast(p["k"], p["labels"], p["f0"], lr=1.0, steps=np.array([0.0]), flow=True,
                     **test)
    np.testing.assert_array_equal(start.train_outputs[0], p["f0"])
    assert errs[0] < 1e-2 and test_errs[0] < 1e-2
    assert errs[1] / errs[0] == pytest.approx(0.5, abs=0.05)
    assert test_errs[1] / test_errs[0] == pytest.approx(0.5, abs=0.05)


def _net_vs_forecast(width, *, lr_fraction, steps=300):
    rng = np.random.default_rng(0)
    x = rng.standard_normal((32, 4))
    y = np.sin(x @ rng.standard_normal((4, 1)))
    params = _init(jax.random.PRNGKey(1), [4, width, 1])
    k = _kernel(_apply, params, x, x)[:, :, 0, 0]
    f0 = np.asarray(_apply(params, x))
    lr = lr_fraction * forecast(k, y, f0, lr=1e-3, steps=0).max_stable_lr
    fc = forecast(k, y, f0, lr=lr, steps=steps)
    losses, _, _ = _train(_apply, params, x, y, lr=lr, steps=steps, loss="mse")
    return fc, losses


def test_wide_network_follows_the_forecast():
    # Actual training run of the nonlinear network (NTK parameterization, width 2048, N = 32,
    # lr = max_stable_lr / 2, 300 steps): train loss within 5% of the forecast at every step
    # (Lee et al. 2019; measured: ~0.3%).
    fc, losses = _net_vs_forecast(2048, lr_fraction=0.5)
    assert fc.departure(losses, tolerance=0.05) < 0.05
    assert losses[-1] < 0.2 * losses[0]


def test_narrow_network_departs_and_is_reported():
    # Actual training run, width 8 at lr = 0.9·max_stable_lr: the kernel moves and the run is not
    # lazy; `departure` reports it with a warning instead of hiding it. From losses the gap is
    # | ‖f_obs − y‖ − ‖f_lin − y‖ | / ‖f_0 − y‖, a lower bound of the output gap (measured 14%).
    fc, losses = _net_vs_forecast(8, lr_fraction=0.9)
    with pytest.warns(RuntimeWarning, match="not in the lazy"):
        gap = fc.departure(losses)
    assert gap > 0.1


def test_unstable_learning_rate_warns(problem):
    p = problem
    limit = forecast(p["k"], p["labels"], p["f0"], lr=1e-3, steps=0).max_stable_lr
    with pytest.warns(RuntimeWarning, match="exceeds the stability limit"):
        fc = forecast(p["k"], p["labels"], p["f0"], lr=1.1 * limit, steps=200)
    assert fc.train_loss[-1] > 1e3 * fc.train_loss[0]  # diverges, as gradient descent would
    lam_max = np.linalg.eigvalsh(p["k"].transpose(0, 2, 1, 3).reshape(24, 24))[-1]
    assert limit == pytest.approx(2 * 12 / lam_max, rel=1e-12)


def test_repr_is_short(problem):
    p = problem
    fc = forecast(p["k"], p["labels"], p["f0"], lr=0.5, steps=10)
    assert isinstance(fc, Forecast)
    text = repr(fc)
    assert "train_outputs=array(11, 12, 2)" in text and len(text) < 600


@pytest.mark.parametrize(
    "change, match",
    [
        (dict(lr=0.0), "`lr` must be > 0"),
        (dict(lr=-1.0), "`lr` must be > 0"),
        (dict(steps=np.array([0, 5, 3])), "`steps` must be sorted"),
        (dict(steps=np.array([0, 1.5])), "whole numbers"),
        (dict(y_train=np.zeros((7, 2))), "`y_train` has 7 rows but `k_train`"),
        (dict(f0_train=np.zeros((12, 3))), "a kernel over 2 outputs"),
        (dict(k_train=np.ones((12, 11))), "must be \\(N, N\\) or|square"),
        (dict(y_train=np.full(12, 5)), "integer labels in \\[5, 5\\]"),
        (dict(y_train=np.full((12, 2), 0.3), loss="cross-entropy"), "needs classification"),
        (dict(loss="hinge"), "`loss`='hinge' is not known"),
        (dict(k_test_train=np.zeros((5, 12, 2, 2))), "go together"),
        (dict(k_test_train=np.zeros((5, 11, 2, 2)), f0_test=np.zeros((5, 2))),
         "`k_test_train` is \\(5, 11, 2, 2\\)"),
        (dict(k_test_train=np.zeros((5, 12, 2, 2)), f0_test=np.zeros((4, 2))),
         "`f0_test` has 4 rows"),
    ],
)
def test_bad_input(problem, change, match):
    p = problem
    kwargs = dict(k_train=p["k"], y_train=p["labels"], f0_train=p["f0"], lr=0.5, steps=3)
    kwargs.update(change)
    with pytest.raises(ValueError, match=match):
        forecast(**kwargs)


@pytest.fixture(scope="module")
def quickstart_model():
    """The quickstart's model, Dense(256) → tanh → Dense(4), on 40 examples, float64."""
    import flax.linen as nn

    import ntkcalc

    class MLP(nn.Module):
        @nn.compact
        def __call__(self, x):
            return nn.Dense(4)(nn.tanh(nn.Dense(256)(x)))

    rng = np.random.default_rng(0)
    x = rng.standard_normal((40, 11))
    labels = rng.integers(0, 4, size=40)
    model = MLP()
    variables = jax.tree_util.tree_map(lambda a: a.astype(jnp.float64),
                                       model.init(jax.random.key(0), x[:1]))
    net = ntkcalc.Net.from_linen(model, variables)

    def f(p, xs):
        return model.apply({"params": p}, xs)

    return dict(net=net, x=x, labels=labels, params=variables["params"], f=f)


def test_documented_path_matches_linearized_sgd_with_several_outputs(quickstart_model):
    # Reference: optax.sgd full-batch on the jax.jvp-linearized flax model (Lee et al., NeurIPS
    # 2019, arXiv:1902.06720), O = 4 outputs, loss (1/N) Σ ½‖f − y‖². The documented path is
    # ntk(outputs="full") → forecast; it must agree to 1e-6 in float64.
    import ntkcalc

    q = quickstart_model
    k = ntkcalc.ntk(q["net"], q["x"], outputs="full", progress=False)
    assert k.kind == "full" and k.num_outputs == 4
    f0 = np.asarray(q["net"](q["x"]))
    y = np.eye(4)[q["labels"]]
    steps = np.array([0, 10, 100, 300])
    fc = ntkcalc.forecast(k, q["labels"], f0, lr=0.05, steps=steps)
    losses, outs, _ = _train(_linearized(q["f"], q["params"]), q["params"], q["x"], y, lr=0.05,
                             steps=300, loss="mse")
    np.testing.assert_allclose(fc.train_outputs, outs[steps], rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(fc.train_loss, losses[steps], rtol=1e-6)
    assert fc.kernel == "full" and fc.stable and fc.kernel_dtype == "float64"


def test_trace_kernel_is_refused_for_several_outputs(quickstart_model):
    # The trace kernel is O·K under Θ = K ⊗ I_O (definition): read as K it makes the forecast O
    # times too fast, so it is refused with the call that gives the right kernel.
    import ntkcalc

    q = quickstart_model
    x = q["x"][:12]
    k = ntkcalc.ntk(q["net"], x, progress=False)  # default: trace
    f0 = np.asarray(q["net"](x))
    with pytest.raises(ValueError, match=r"outputs='full'.*per_output_kernel"):
        ntkcalc.forecast(k, q["labels"][:12], f0, lr=0.02, steps=3)
    with pytest.raises(ValueError, match="unknown kind"):
        ntkcalc.forecast(np.asarray(k), q["labels"][:12], f0, lr=0.02, steps=3)
    # The approximation at scale is explicit, and the result names it.
    k_full = ntkcalc.ntk(q["net"], x, outputs="full", progress=False)
    per = ntkcalc.per_output_kernel(k)
    np.testing.assert_allclose(per, np.einsum("ijaa->ij", k_full) / 4, rtol=1e-12)
    fc = ntkcalc.forecast(per, q["labels"][:12], f0, lr=0.02, steps=3)
    assert fc.kernel == "per-output (trace / 4, assuming Θ = K ⊗ I_4)"
    exact = ntkcalc.forecast(k_full, q["labels"][:12], f0, lr=0.02, steps=3)
    assert exact.max_stable_lr > fc.max_stable_lr / 4  # same order, not O× off


def test_not_psd_kernel_is_refused(problem):
    # A Gram matrix J Jᵀ has no negative eigenvalues (definition); −Θ is refused instead of
    # forecasting a divergence of 1e16.
    p = problem
    with pytest.raises(ValueError, match="not positive semi-definite"):
        forecast(-p["k"], p["labels"], p["f0"], lr=0.5, steps=3)


def test_huge_steps_are_refused_and_long_paths_keep_only_requested_steps(problem):
    p = problem
    with pytest.raises(ValueError, match="`steps` asks for"):
        forecast(p["k"], p["labels"], p["f0"], lr=0.5, steps=10**9)
    fc = forecast(p["k"], p["labels"], p["f0"], lr=0.01, steps=np.array([0, 2000]),
                  loss="cross-entropy", progress=False)
    assert fc.train_outputs.shape == (2, 12, 2)


def test_kernel_of_known_kind_but_unknown_outputs():
    # A stored trace kernel reopened from disk knows its kind but not O: per_output_kernel asks
    # for O, and forecast's refusal names the kind without inventing an O.
    import ntkcalc
    from ntkcalc._kind import KernelArray

    k = np.eye(3) * 4.0
    tagged = KernelArray(k, kind="trace", num_outputs=4)
    tagged.num_outputs = None  # as a reopened store view has it
    with pytest.raises(ValueError, match="num_outputs=O"):
        ntkcalc.per_output_kernel(tagged)
    per = ntkcalc.per_output_kernel(tagged, num_outputs=4)
    np.testing.assert_allclose(per, np.eye(3))
    with pytest.raises(ValueError, match=r"the 'trace' kernel \(ntkcalc.ntk"):
        forecast(tagged, np.array([0, 1, 2]), np.zeros((3, 4)), lr=0.1, steps=2)
