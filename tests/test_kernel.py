"""`ntkcalc.ntk` against outside references: dense jax.jacrev, closed forms, Monte Carlo."""

from __future__ import annotations

import functools

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from helpers import RTOL, ZOO, assert_close, reduce_mode, reference_full

import ntkcalc

METHODS = ["jacobian", "jvp", "structured", "auto"]
MODES = ["full", "trace", "diagonal", "logit-sum"]


@functools.cache
def zoo_case(name: str):
    """(net, x1, x2, reference Θ(x1, x1), reference Θ(x1, x2)), built once per session."""
    case = next(c for c in ZOO if c.name == name)
    rng = np.random.default_rng(0)
    net = case.make()
    x1, x2 = case.x(rng, 5), case.x(rng, 3)
    return net, x1, x2, reference_full(net, x1), reference_full(net, x1, x2)


@pytest.mark.parametrize("outputs", MODES)
@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("case", [c.name for c in ZOO])
def test_zoo_matches_dense_reference(case, method, outputs):
    # Reference: whole-batch jax.jacrev + einsum in float64 (the definition Θ = J Jᵀ).
    net, x1, x2, r11, r12 = zoo_case(case)
    k11 = ntkcalc.ntk(net, x1, method=method, outputs=outputs)
    k12 = ntkcalc.ntk(net, x1, x2, method=method, outputs=outputs)
    assert k11.dtype == np.float64
    assert_close(k11, reduce_mode(r11, outputs))
    assert_close(k12, reduce_mode(r12, outputs))


@pytest.mark.parametrize("case", [c.name for c in ZOO])
def test_symmetric_and_psd(case):
    # Θ(X, X) is a Gram matrix: symmetric and positive semidefinite (common practice).
    net, x1, *_ = zoo_case(case)
    k = ntkcalc.ntk(net, x1, outputs="full")
    n, o = k.shape[0], k.shape[2]
    flat = k.transpose(0, 2, 1, 3).reshape(n * o, n * o)
    np.testing.assert_allclose(flat, flat.T, rtol=0, atol=1e-12 * np.abs(flat).max())
    eig = np.linalg.eigvalsh(flat)
    assert eig.min() >= -1e-6 * eig.max()


def _two_layer(params, x):
    return jax.nn.relu(x @ params["W"].T + params["b"][None]) @ params["V"].T + params["c"][None]


def test_two_layer_closed_form():
    # Closed form derived by direct differentiation of f(x) = V relu(Wx + b) + c:
    # Θ(x1, x2) = (h1·h2 + 1) I_O + (x1·x2 + 1) V D1 D2 Vᵀ, h = relu(Wx + b),
    # D = diag(1[Wx + b > 0]).
    rng = np.random.default_rng(1)
    d, m, o = 4, 9, 3
    params = {
        "W": rng.normal(size=(m, d)), "b": rng.normal(size=m),
        "V": rng.normal(size=(o, m)), "c": rng.normal(size=o),
    }
    net = ntkcalc.Net(_two_layer, params)
    x = rng.normal(size=(6, d))
    pre = x @ params["W"].T + params["b"]
    h, dmask = np.maximum(pre, 0), (pre > 0).astype(float)
    want = np.einsum("ij,ab->ijab", h @ h.T + 1, np.eye(o)) + np.einsum(
        "ij,am,im,jm,bm->ijab", x @ x.T + 1, params["V"], dmask, dmask, params["V"]
    )
    for method in ("jacobian", "jvp", "structured"):
        assert_close(ntkcalc.ntk(net, x, method=method, outputs="full"), want)


def test_linear_model_closed_form():
    # f(x) = W x + b has Θ(x1, x2) = (x1·x2 + 1) I (direct differentiation).
    rng = np.random.default_rng(2)
    params = {"W": rng.normal(size=(2, 5)), "b": rng.normal(size=2)}
    net = ntkcalc.Net(lambda p, x: x @ p["W"].T + p["b"][None], params)
    x1, x2 = rng.normal(size=(4, 5)), rng.normal(size=(3, 5))
    want = np.einsum("ij,ab->ijab", x1 @ x2.T + 1, np.eye(2))
    assert_close(ntkcalc.ntk(net, x1, x2, outputs="full"), want)


def test_infinite_width_relu_monte_carlo():
    # Arora, Du, Hu, Li, Salakhutdinov & Wang, "On Exact Computation with an Infinitely Wide
    # Neural Net", NeurIPS 2019, arXiv:1904.11955: for f(x) = sqrt(2/m) Σ_r a_r relu(w_r·x) with
    # standard normal w, a and unit inputs at angle φ, Θ → 2·[(π − φ) cos φ + sin φ]/(2π)
    # + 2·cos φ·(π − φ)/(2π) = 2 (same), 1/π (orthogonal), 1.2857393 (45°), 0 (antipodal).
    m, d = 8192, 3
    e1, e2 = np.eye(d)[0], np.eye(d)[1]
    x = np.stack([e1, e2, (e1 + e2) / np.sqrt(2), -e1])
    apply = lambda p, x: (jax.nn.relu(x @ p["w"].T) @ p["a"]) * jnp.sqrt(2.0 / m)
    ks = []
    for seed in range(4):
        kw, ka = jax.random.split(jax.random.key(seed))
        params = {"w": jax.random.normal(kw, (m, d)), "a": jax.random.normal(ka, (m,))}
        ks.append(ntkcalc.ntk(ntkcalc.Net(lambda p, x: apply(p, x)[:, None], params), x))
    k = np.mean(ks, axis=0)
    assert abs(k[0, 0] - 2.0) <= 0.03 * 2.0
    assert abs(k[0, 1] - 1 / np.pi) <= 0.03 * (1 / np.pi)
    assert abs(k[0, 2] - 1.2857393) <= 0.03 * 1.2857393
    assert abs(k[0, 3]) <= 0.02


def test_params_filter_and_by_layer():
    # The kernel restricted to parameters is the reference summed over those leaves only.
    net, x1, x2, *_ = zoo_case("mlp")
    want = reference_full(net, x1, params=lambda n: n.startswith("Dense_1"))
    assert_close(ntkcalc.ntk(net, x1, outputs="full", params=r"^Dense_1\."), want)
    want_k = reference_full(net, x1, params=lambda n: n.endswith("kernel"))
    assert_close(ntkcalc.ntk(net, x1, outputs="full", params=lambda n: n.endswith("kernel")),
                 want_k)
    for method in ("structured", "jvp"):
        parts = ntkcalc.ntk_by_layer(net, x1, x2, method=method)
        assert sorted(parts) == ["Dense_0", "Dense_1", "Dense_2"]
        total = ntkcalc.ntk(net, x1, x2, method=method)
        assert_close(sum(parts.values()), total)
        assert_close(parts["Dense_2"], reduce_mode(reference_full(
            net, x1, x2, params=lambda n: n.startswith("Dense_2")), "trace"))


def test_float32_by_default():
    # Without x64 the kernel is float32 (and close to the float64 value).
    net, x1, _, r11, _ = zoo_case("mlp")
    with jax.enable_x64(False):
        k = ntkcalc.ntk(net, x1)
    assert k.dtype == np.float32
    assert_close(k, reduce_mode(r11, "trace"), rtol=1e-5)


def test_repeated_calls_reuse_compilation():
    # Count lowering and XLA compilation through JAX's own monitoring events (a persistent-cache
    # hit still lowers, so lowering counts too). A fresh Net so the first call must compile.
    net = ZOO[0].make()
    x1 = zoo_case("mlp")[1]
    events = []
    jax.monitoring.register_event_duration_secs_listener(
        lambda name, *a, **k: events.append(name)
        if ("backend_compile" in name or "to_mlir" in name) else None
    )
    scaled = net.replace(params=jax.tree_util.tree_map(lambda p: p * 1.5, net.params))
    ntkcalc.ntk(net, x1, method="structured")
    assert events, "the monitoring events this test relies on were not emitted"
    before = len(events)
    ntkcalc.ntk(net, x1, method="structured")
    ntkcalc.ntk(scaled, x1, method="structured")  # a checkpoint of the same model
    assert len(events) == before


def test_blocked_equals_single_tile():
    # Tiny memory budgets force many tiles; the kernel must not change.
    net, x1, x2, r11, r12 = zoo_case("cnn")
    rng = np.random.default_rng(3)
    x = rng.normal(size=(11,) + x1.shape[1:])
    want = reduce_mode(reference_full(net, x), "diagonal")
    for method in ("jacobian", "structured", "jvp"):
        for memory in (2**k for k in range(26, 14, -1)):
            try:
                p = ntkcalc.plan(net, x, outputs="diagonal", method=method, memory=memory)
            except MemoryError:
                break
            if p.block < 6:
                break
        assert p.block < 11
        got = ntkcalc.ntk(net, x, outputs="diagonal", method=method, memory=p.memory)
        assert_close(got, want, rtol=RTOL)
