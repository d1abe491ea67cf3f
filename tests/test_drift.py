"""Kernel drift over a training run.

Checked against closed forms and direct computation: a linear model's kernel does not depend on
its parameters (Θ = O·(x x'ᵀ + 1) for f(x) = xW + b, by direct differentiation), so its drift is
0 up to float64 rounding; for a tanh MLP trained with a large learning rate each step's kernel is
compared with the dense jax.jacrev reference (tests/helpers.py) and the distances with their
definition 1 − ⟨A, B⟩_F / (‖A‖_F ‖B‖_F) evaluated by numpy.
"""

from __future__ import annotations

import json

import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np
import optax
import orbax.checkpoint as ocp
import pytest
from helpers import assert_close, f64, reduce_mode, reference_full

import ntkcalc
from ntkcalc._analysis.laziness import KERNEL_THRESHOLD
from ntkcalc._workflows.drift import DEFAULT_THRESHOLD, Drift, drift

RNG = np.random.default_rng(0)
X = RNG.normal(size=(6, 3))
Y = np.stack([np.sign(X[:, 0]), np.sign(X[:, 1])], axis=1)  # (N, 2) ±1 targets


def _train(net, *, lr, steps, keep):
    """Full-batch gradient descent on mean squared error; the params at the steps in ``keep``."""
    loss = lambda p: jnp.mean((net.apply(p, X) - Y) ** 2)
    opt = optax.sgd(lr)
    params, state = net.params, opt.init(net.params)
    grad = jax.jit(jax.grad(loss))
    kept = {}
    for step in range(steps + 1):
        if step in keep:
            kept[step] = params
        updates, state = opt.update(grad(params), state)
        params = optax.apply_updates(params, updates)
    return kept


def _linear(params, x):
    return x @ params["w"] + params["b"][None, :]


def test_linear_model_kernel_does_not_move():
    params = {"w": jnp.asarray(RNG.normal(size=(3, 2))), "b": jnp.zeros(2)}
    net = ntkcalc.Net(_linear, params)
    kept = _train(net, lr=0.2, steps=30, keep=(0, 5, 10, 30))
    assert not np.allclose(kept[30]["w"], kept[0]["w"])  # training did change the parameters
    result = drift([net.replace(params=p) for p in kept.values()], X, Y, steps=list(kept))
    closed_form = 2 * (X @ X.T + 1)  # O·(x x'ᵀ + 1), O = 2 outputs
    for k in result.kernels:
        assert_close(k, closed_form, rtol=1e-12)
    assert np.max(np.abs(result.distance_to_initial)) <= 1e-12
    assert np.nanmax(np.abs(result.distance_to_previous)) <= 1e-12
    assert np.max(result.relative_change) <= 1e-12
    assert result.lazy and result.verdict.startswith("lazy:")
    assert DEFAULT_THRESHOLD == KERNEL_THRESHOLD
    assert f"threshold {DEFAULT_THRESHOLD:.0%}" in result.verdict
    # rank 4 kernel (3 inputs + bias) on 6 examples: singular, and the notes say so
    assert any("ill-conditioned" in note for note in result.notes)
    assert np.all(np.diff(result.top_eigenvalues, axis=1) <= 0)


class TanhMLP(nn.Module):
    @nn.compact
    def __call__(self, x):
        h = nn.tanh(nn.Dense(8, name="hidden")(x))
        return nn.Dense(2, name="readout")(h)


def _cosine_distance(a, b):
    return 1 - np.sum(a * b) / (np.linalg.norm(a) * np.linalg.norm(b))


@pytest.fixture(scope="module")
def moving_run(tmp_path_factory):
    module = TanhMLP()
    variables = f64(module.init(jax.random.key(1), X[:1]))
    net = ntkcalc.Net.from_linen(module, variables)
    kept = _train(net, lr=1.0, steps=20, keep=(0, 5, 10, 20))  # large for this width: it moves
    path = tmp_path_factory.mktemp("run") / "ckpt"
    with ocp.CheckpointManager(path) as mngr:
        for step, p in kept.items():
            mngr.save(step, args=ocp.args.StandardSave({"params": p}))
    return module, net, kept, path


def test_tanh_mlp_kernel_moves(moving_run):
    module, net, kept, path = moving_run
    result = drift(path, X, Y, module=module, example=X[:1], layer="hidden")
    np.testing.assert_array_equal(result.steps, [0, 5, 10, 20])
    refs = [reduce_mode(reference_full(net.replace(params=p), X), "trace") for p in kept.values()]
    for k, ref in zip(result.kernels, refs, strict=True):  # dense jax.jacrev at each step
        assert_close(k, ref)
    want = [_cosine_distance(r, refs[0]) for r in refs]
    np.testing.assert_allclose(result.distance_to_initial, want, rtol=1e-9, atol=1e-13)
    prev = [_cosine_distance(b, a) for a, b in zip(refs, refs[1:])]
    np.testing.assert_allclose(result.distance_to_previous[1:], prev, rtol=1e-9)
    np.testing.assert_allclose(result.velocity[1:], np.asarray(prev) / [5, 5, 10], rtol=1e-9)
    assert np.isnan(result.distance_to_previous[0]) and np.isnan(result.velocity[0])
    rel = [np.linalg.norm(r - refs[0]) / np.linalg.norm(refs[0]) for r in refs]
    np.testing.assert_allclose(result.relative_change, rel, rtol=1e-9, atol=1e-15)
    assert result.distance_to_initial[-1] > 0.05 and result.relative_change[-1] > 0.3
    assert np.all(np.diff(result.distance_to_initial) > 0)  # it keeps moving away
    assert not result.lazy and result.verdict.startswith("not lazy (from step 5)")
    assert result.notes[0].startswith("Not lazy")
    # the one verdict, from the numbers above (ntkcalc.laziness)
    assert result.laziness == ntkcalc.laziness(
        relative_change=result.relative_change, distance=result.distance_to_initial,
        steps=result.steps, kind="trace", precision="float64")
    assert result.verdict == result.laziness.sentence and result.laziness.spread is None
    # centered alignment by its definition (HKH, HYYᵀH Frobenius cosine), at the last step
    h = np.eye(6) - 1 / 6
    a, b = h @ refs[-1] @ h, h @ Y @ Y.T @ h
    want_align = np.sum(a * b) / (np.linalg.norm(a) * np.linalg.norm(b))
    np.testing.assert_allclose(result.alignment[-1], want_align, rtol=1e-9)
    # feature rank of the first layer's outputs [H, 1], by numpy at the first step
    w = kept[0]["hidden"]
    feats = np.c_[X @ np.asarray(w["kernel"]) + np.asarray(w["bias"]), np.ones(6)]
    assert result.feature_rank[0] == np.linalg.matrix_rank(feats)


def test_table_json_plot_and_repr(moving_run):
    import matplotlib

    matplotlib.use("Agg")
    module, net, kept, path = moving_run
    nets = [net.replace(params=p) for p in kept.values()]
    result = drift(nets, X, Y, steps=list(kept), outputs="full", top=3)
    assert result.kernels.shape == (4, 6, 6, 2, 2)
    table = result.to_dict()
    assert all(isinstance(v, np.ndarray) and v.shape == (4,) for v in table.values())
    assert {"eigenvalue_1", "eigenvalue_3", "alignment", "velocity"} <= set(table)
    loaded = json.loads(result.to_json())
    assert loaded["verdict"] == result.verdict and loaded["table"]["velocity"][0] is None
    assert loaded["laziness"]["sentence"] == result.verdict
    # the verdict says which kernels it compared: the 'full' kernels drift computed, in float64
    assert (loaded["laziness"]["kind"], loaded["laziness"]["precision"]) == ("full", "float64")
    assert "kind='full', precision='float64'" in repr(result.laziness)
    assert loaded["laziness"]["relative_change"] == pytest.approx(result.relative_change.max())
    np.testing.assert_allclose(loaded["table"]["distance_to_initial"], result.distance_to_initial)
    ax = result.plot()
    assert len(ax.get_lines()) == 4  # three curves and the threshold
    text = repr(result)
    assert text.startswith("Drift(4 steps 0..20, outputs='full', kernels(6, 6, 2, 2), lazy=False")
    assert "verdict='not lazy" in text and len(text) < 600
    assert isinstance(result, Drift)


def test_init_spread_and_integer_labels(moving_run):
    # Independent initializations: the same module at PRNG keys 2 and 3. The spread is checked
    # against its definition on dense jax.jacrev kernels (mean over pairs of
    # ‖K_a − K_b‖_F / √(‖K_a‖_F ‖K_b‖_F) and 1 − cos); integer labels align as one-hot rows.
    module, net, kept, path = moving_run
    inits = [ntkcalc.Net.from_linen(module, f64(module.init(jax.random.key(k), X[:1])))
             for k in (2, 3)]
    labels = (X[:, 0] > 0).astype(np.int64) + (X[:, 1] > 0)  # classes 0, 1, 2
    nets = [net.replace(params=p) for p in kept.values()]
    result = drift(nets, X, labels, steps=list(kept), inits=inits)
    onehot = drift(nets, X, np.eye(3)[labels], steps=list(kept))
    np.testing.assert_allclose(result.alignment, onehot.alignment, rtol=1e-12)
    refs = [reduce_mode(reference_full(n, X), "trace") for n in (nets[0], *inits)]
    pairs = [(0, 1), (0, 2), (1, 2)]
    change = np.mean([np.linalg.norm(refs[a] - refs[b]) / np.sqrt(
        np.linalg.norm(refs[a]) * np.linalg.norm(refs[b])) for a, b in pairs])
    dist = np.mean([_cosine_distance(refs[a], refs[b]) for a, b in pairs])
    spread = result.laziness.spread
    assert spread.count == 3
    np.testing.assert_allclose([spread.relative_change, spread.distance], [change, dist],
                               rtol=1e-9)
    assert "between 3 independent initializations" in result.verdict
    assert result.laziness.beyond_spread == (
        result.relative_change.max() > max(DEFAULT_THRESHOLD, change)
        or result.distance_to_initial.max() > max(DEFAULT_THRESHOLD, dist))
    ax = result.plot()
    assert len(ax.get_lines()) == 5  # three curves, the threshold and the init spread


def test_bad_arguments(moving_run):
    module, net, kept, path = moving_run
    nets = [net, net]
    with pytest.raises(ValueError, match="`steps` has 3 entries but there are 2 Nets"):
        drift(nets, X, Y, steps=[0, 1, 2])
    with pytest.raises(ValueError, match="`steps` must be strictly increasing"):
        drift(nets, X, Y, steps=[3, 3])
    with pytest.raises(ValueError, match=r"`y` is \(5,\) but `x` has 6 examples"):
        drift(nets, X, Y[:5, 0])
    with pytest.raises(ValueError, match="`outputs`='all' is not known"):
        drift(nets, X, Y, outputs="all")
    with pytest.raises(ValueError, match="`threshold` must be a number in"):
        drift(nets, X, Y, threshold=5)
    with pytest.raises(ValueError, match="at least 2 steps"):
        drift(nets[:1], X, Y)
    with pytest.raises(TypeError, match="item 1 is a dict"):
        drift([net, {}], X, Y)
    with pytest.raises(TypeError, match="`inits` must be a sequence of Nets"):
        drift(nets, X, Y, inits=[net, "net"])
    with pytest.raises(ValueError, match="`module` is required with a checkpoint directory"):
        drift(path, X, Y)
    with pytest.raises(ValueError, match=r"`steps` \[7\] are not saved"):
        drift(path, X, Y, module=module, steps=[0, 7])
    with pytest.raises(ValueError, match=r"with outputs='full' the labels must be \(N, 2\)"):
        drift(nets, X, Y[:, 0], outputs="full")
