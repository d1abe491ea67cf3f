"""The training-run workflow end to end, on a real run: a small flax MLP trained on scikit-learn's
digits with optax, orbax checkpoints, then `analyse_run` and its written report.

Every number of the report is checked against an independent computation:

- kernels recomputed with `ntkcalc.ntk` on Nets built by hand from the parameters kept in memory
  during training, and the initial one against the dense ``jax.jacrev`` reference
  (tests/helpers.py);
- alignment by its formula, centered kernel-target alignment ``⟨HKH, HYYᵀH⟩_F / (‖HKH‖_F
  ‖HYYᵀH‖_F)`` (Cortes, Mohri & Rostamizadeh, "Algorithms for learning kernels based on centered
  alignment", JMLR 13, 2012), evaluated in numpy;
- drift distance ``1 − ⟨K_t, K_0⟩_F / (‖K_t‖_F ‖K_0‖_F)`` and relative change
  ``‖K_t − K_0‖_F / ‖K_0‖_F`` by their definitions (Fort et al., NeurIPS 2020, arXiv:2010.15110);
- the forecast from a later checkpoint against optax SGD on the model linearized around that
  checkpoint with ``jax.jvp`` (Lee et al., NeurIPS 2019, arXiv:1902.06720), train and test;
- the test error of kernel ridge against scikit-learn's ``KernelRidge(kernel="precomputed")``;
- the interpolation check against ``numpy.linalg.matrix_rank`` of ``[tanh(xW + b), 1]``;
- each parameter group's kernel against `ntkcalc.ntk` restricted to that group's parameters.

An nnx model saved with orbax and loaded through a factory is checked on scikit-learn's iris.
"""

from __future__ import annotations

import dataclasses
import functools
import json
import re

import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np
import optax
import orbax.checkpoint as ocp
import pytest
from flax import nnx
from helpers import assert_close, f64, reduce_mode, reference_full
from sklearn.datasets import load_digits, load_iris
from sklearn.kernel_ridge import KernelRidge

import ntkcalc
from ntkcalc._workflows.report import SKETCH_SECTIONS
from ntkcalc._workflows.study import CheckpointAnswers, RunAnalysis, analyse_run

N_TRAIN, N_TEST, WIDTH, STEPS, LR = 120, 80, 64, 40, 0.04  # below 2N/λ_max at init
SAVED = (0, 20, 40)


class _Mlp(nn.Module):
    """One tanh hidden layer of ``WIDTH`` units and a linear readout over the 10 digits."""

    @nn.compact
    def __call__(self, x):
        return nn.Dense(10, name="readout")(nn.tanh(nn.Dense(WIDTH, name="hidden")(x)))


def _mse_loss(f, y):
    """``(1/N) Σ_i ½‖f_i − y_i‖²``, the convention of `ntkcalc.forecast`."""
    return 0.5 * jnp.sum((f - y) ** 2) / f.shape[0]


def _sgd(loss, params, steps):
    """Full-batch optax SGD at ``LR``; the parameters after each step, keyed by step."""
    opt = optax.sgd(LR)
    state = opt.init(params)
    grad = jax.jit(jax.grad(loss))
    kept = {0: params}
    for t in range(1, steps + 1):
        updates, state = opt.update(grad(params), state)
        params = optax.apply_updates(params, updates)
        kept[t] = params
    return kept


@functools.cache
def _run(tmp: str):
    """Train on digits, save orbax checkpoints, run the workflow and write its report."""
    digits = load_digits()
    x_all, labels_all = digits.data / 16.0, digits.target
    x, labels = x_all[:N_TRAIN], labels_all[:N_TRAIN]
    xt, labels_t = x_all[N_TRAIN:N_TRAIN + N_TEST], labels_all[N_TRAIN:N_TRAIN + N_TEST]
    y = np.eye(10)[labels]
    model = _Mlp()
    variables = f64(model.init(jax.random.key(0), jnp.asarray(x[:1])))
    kept = _sgd(lambda p: _mse_loss(model.apply({"params": p}, x), y), variables["params"], STEPS)
    options = ocp.CheckpointManagerOptions(max_to_keep=None, enable_async_checkpointing=False)
    with ocp.CheckpointManager(f"{tmp}/ckpt", options=options) as manager:
        for s in SAVED:
            manager.save(s, args=ocp.args.StandardSave({"params": kept[s]}))
        manager.wait_until_finished()
    # the run's own outputs at every step, as a training loop records them
    record = jax.jit(lambda p: (model.apply({"params": p}, x), model.apply({"params": p}, xt)))
    seen = [record(kept[t]) for t in range(STEPS + 1)]
    # the module as a factory (the class), its variables shaped by x[:1]
    result = analyse_run(f"{tmp}/ckpt", x, labels, module=_Mlp, x_test=xt, y_test=labels_t,
                         lr=LR, forecast_from=[0, 20], full_batch_gd=True,
                         recorded_steps=np.arange(STEPS + 1),
                         recorded_train=np.stack([f for f, _ in seen]),
                         recorded_test=np.stack([ft for _, ft in seen]))
    html_path, json_path = result.write(f"{tmp}/report")
    assert json_path == f"{tmp}/report/report.json"
    with open(f"{tmp}/report/result.json", encoding="utf-8") as fh:
        report = json.load(fh)
    net = ntkcalc.Net.from_linen(model, variables)
    hand = {s: net.replace(params=kept[s]) for s in SAVED}  # built by hand, not from disk
    data = {"x": x, "y": y, "xt": xt, "yt": np.eye(10)[labels_t], "labels_t": labels_t,
            "labels": labels}
    return result, report, html_path, hand, kept, data


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    return _run(str(tmp_path_factory.mktemp("study")))


def _kernels(hand, data):
    return {s: np.asarray(ntkcalc.ntk(n, data["x"], progress=False)) for s, n in hand.items()}


def test_report_kernels_match_direct_computation(run):
    result, report, _, hand, _, data = run
    assert isinstance(result, RunAnalysis)
    assert result.steps.tolist() == list(SAVED) and report["steps"] == list(SAVED)
    kernels = _kernels(hand, data)
    for i, s in enumerate(SAVED):
        assert_close(result.drift.kernels[i], kernels[s], rtol=1e-10)
    # the initial kernel against the dense whole-batch jax.jacrev reference
    assert_close(kernels[0], reduce_mode(reference_full(hand[0], data["x"]), "trace"), rtol=1e-10)
    assert report["dtype"] == "float64" and "trace" in report["kinds"][
        "drift, alignment, spectrum, risk, groups"]


def test_alignment_and_drift_by_their_formulas(run):
    result, report, _, hand, _, data = run
    kernels = _kernels(hand, data)
    table = report["drift"]["table"]
    h = np.eye(N_TRAIN) - 1.0 / N_TRAIN  # centering H = I − 11ᵀ/n
    target = h @ data["y"] @ data["y"].T @ h
    k0 = kernels[0]
    for i, s in enumerate(SAVED):
        kc = h @ kernels[s] @ h
        want = np.sum(kc * target) / (np.linalg.norm(kc) * np.linalg.norm(target))
        assert table["alignment"][i] == pytest.approx(want, rel=1e-9)
        cos = np.sum(kernels[s] * k0) / (np.linalg.norm(kernels[s]) * np.linalg.norm(k0))
        assert table["distance_to_initial"][i] == pytest.approx(1 - cos, abs=1e-12)
        assert table["relative_change"][i] == pytest.approx(
            np.linalg.norm(kernels[s] - k0) / np.linalg.norm(k0), rel=1e-9, abs=1e-14)
    assert table["relative_change"][-1] > 0  # training did move the kernel
    assert result.verdict == report["verdict"] == result.laziness.sentence


def test_verdict_gap_is_the_run_against_linearized_training_from_init(run):
    # The verdict's forecast gap: max_t ‖f_t − f_lin,t‖ / ‖f_0 − y‖ over the recorded steps, with
    # f_lin from optax SGD on the jax.jvp-linearized model at initialization.
    result, report, _, hand, kept, data = run
    lin = _linearized_sgd(hand[0], data["x"], data["y"], STEPS)
    apply = jax.jit(hand[0].apply)
    scale = np.linalg.norm(np.asarray(apply(kept[0], data["x"])) - data["y"])
    gaps = [np.linalg.norm(np.asarray(apply(kept[t], data["x"])) - lin(t, data["x"])) / scale
            for t in range(STEPS + 1)]
    assert report["laziness"]["forecast_gap"] == pytest.approx(max(gaps), rel=1e-7)
    assert report["checkpoints"][0]["forecast"]["gap"] == pytest.approx(gaps, rel=1e-7,
                                                                         abs=1e-12)


def _linearized_sgd(net, x, y, steps, *, loss=_mse_loss):
    """optax SGD on ``f_lin(θ) = f(θ_t) + J_t (θ − θ_t)`` (jax.jvp around the Net's params)."""
    theta_t = net.params

    def f_lin(p, inputs):
        delta = jax.tree_util.tree_map(lambda a, b: a - b, p, theta_t)
        f, df = jax.jvp(lambda q: net.apply(q, inputs), (theta_t,), (delta,))
        return f + df

    kept = _sgd(lambda p: loss(f_lin(p, x), y), theta_t, steps)
    return lambda t, inputs: np.asarray(f_lin(kept[t], inputs))


def test_forecast_from_a_later_checkpoint_matches_linearized_training(run):
    result, report, _, hand, _, data = run
    later = result.checkpoints[1]
    assert isinstance(later, CheckpointAnswers) and later.step == 20
    assert later.kernel == "full" and later.forecast.stable
    horizon = int(later.forecast.steps[-1])
    assert horizon == STEPS  # default horizon: the run's length
    lin = _linearized_sgd(hand[20], data["x"], data["y"], horizon)
    assert_close(later.forecast.train_outputs[-1], lin(horizon, data["x"]), rtol=1e-8)
    assert_close(later.forecast.test_outputs[-1], lin(horizon, data["xt"]), rtol=1e-8)
    fc = report["checkpoints"][1]["forecast"]
    assert fc["train_mse"][-1] == pytest.approx(
        np.mean((lin(horizon, data["x"]) - data["y"]) ** 2), rel=1e-8)
    assert fc["test_mse"][-1] == pytest.approx(
        np.mean((lin(horizon, data["xt"]) - data["yt"]) ** 2), rel=1e-8)
    # the gap to the recorded run: 0 at the checkpoint itself, then ‖f_obs − f_lin‖/‖f_20 − y‖
    assert fc["gap_steps"] == list(range(20, STEPS + 1))
    assert fc["gap"][0] == pytest.approx(0.0, abs=1e-12)
    f20, f40 = (np.asarray(hand[s](data["x"])) for s in (20, 40))
    want = np.linalg.norm(f40 - lin(20, data["x"])) / np.linalg.norm(f20 - data["y"])
    assert fc["gap"][-1] == pytest.approx(want, rel=1e-8)
    ft20, ft40 = (np.asarray(hand[s](data["xt"])) for s in (20, 40))
    want = np.linalg.norm(ft40 - lin(20, data["xt"])) / np.linalg.norm(ft20 - data["yt"])
    assert fc["test_gap"][-1] == pytest.approx(want, rel=1e-8)
    assert fc["observed_test_mse"][-1] == pytest.approx(np.mean((ft40 - data["yt"]) ** 2))
    assert fc["observed_test_accuracy"][-1] == pytest.approx(
        np.mean(np.argmax(ft40, 1) == data["labels_t"]))


def test_test_error_matches_scikit_learn_kernel_ridge(run):
    result, report, _, hand, _, data = run
    last = report["checkpoints"][1]
    k = np.asarray(ntkcalc.ntk(hand[20], data["x"], progress=False))
    kx = np.asarray(ntkcalc.ntk(hand[20], data["xt"], data["x"], progress=False))
    ridge = last["risk"]["ridge"]
    # the one ridge rule: GCV's when GCV and LOO agree, else LOO's (RiskEstimates.recommended)
    est = result.checkpoints[1].risk
    assert ridge == est.recommended == est.best["gcv" if est.agree else "loo"]
    assert last["risk"]["chosen_by"] == ("gcv" if est.agree else "loo")
    pred = KernelRidge(alpha=ridge, kernel="precomputed").fit(k, data["y"]).predict(kx)
    assert last["risk"]["test_mse"] == pytest.approx(np.mean((pred - data["yt"]) ** 2), rel=1e-8)
    assert last["risk"]["test_accuracy"] == pytest.approx(
        np.mean(np.argmax(pred, 1) == data["labels_t"]))


def test_feature_rank_and_groups_match_direct_computation(run):
    result, report, _, hand, kept, data = run
    for s, r in zip(SAVED, report["feature_rank"], strict=True):
        p = kept[s]["hidden"]
        h = np.tanh(data["x"] @ np.asarray(p["kernel"]) + np.asarray(p["bias"]))
        assert r["rank"] == np.linalg.matrix_rank(np.concatenate([h, np.ones((N_TRAIN, 1))], 1))
        assert not r["full_rank"]  # 65 features < 120 examples: interpolation impossible
    groups = {g["group"]: g for g in report["groups"]}
    assert sorted(groups) == ["hidden", "readout"]
    total = {s: np.trace(np.asarray(ntkcalc.ntk(hand[s], data["x"], progress=False)))
             for s in (0, 40)}
    for name, g in groups.items():
        k0, k1 = (np.asarray(ntkcalc.ntk(hand[s], data["x"], params=f"^{name}", progress=False))
                  for s in (0, 40))
        assert g["relative_change"] == pytest.approx(
            np.linalg.norm(k1 - k0) / np.linalg.norm(k0), rel=1e-9)
        assert g["share_first"] == pytest.approx(np.trace(k0) / total[0], rel=1e-9)
        assert g["share_last"] == pytest.approx(np.trace(k1) / total[40], rel=1e-9)


def test_report_files_and_plot(run):
    result, report, html_path, _, kept, _ = run
    with open(html_path, encoding="utf-8") as fh:
        text = fh.read()
    # the one report (report.py): spectrum, heat maps, drift, forecast against the run, risk
    assert text.count("data:image/png;base64,") == 5 and result.verdict.split(":")[0] in text
    with open(html_path.replace("report.html", "report.json"), encoding="utf-8") as fh:
        shown = json.load(fh)
    assert shown["verdict"]["sentence"] == result.verdict
    assert shown["sections"]["risk"]["chosen_ridge"] == result.checkpoints[0].ridge
    assert json.loads(result.to_json()) == report
    assert report["labels"] == result.labels.tolist() and len(report["labels"]) == N_TRAIN
    assert len(result.plot().axes) == 4
    flat = {s: np.concatenate([np.ravel(a) for a in jax.tree_util.tree_leaves(kept[s])])
            for s in (0, 40)}
    assert report["parameter_change"] == pytest.approx(
        np.linalg.norm(flat[40] - flat[0]) / np.linalg.norm(flat[0]), rel=1e-12)


def test_rejects_bad_arguments(tmp_path):
    net = ntkcalc.Net(lambda p, x: x @ p, np.ones((3, 2)))
    pairs = [(0, net), (1, net.replace(params=2 * np.ones((3, 2))))]
    x = np.ones((4, 3))
    with pytest.raises(TypeError, match="source"):
        analyse_run([net, net], x, np.zeros(4, int))
    with pytest.raises(ValueError, match="increasing"):
        analyse_run(pairs[::-1], x, np.zeros(4, int))
    with pytest.raises(ValueError, match="forecast_from"):
        analyse_run(pairs, x, np.zeros(4, int), forecast_from=[5])
    with pytest.raises(ValueError, match="x_test"):
        analyse_run(pairs, x, np.zeros(4, int), x_test=x)
    with pytest.raises(ValueError, match="lr"):
        analyse_run(pairs, x, np.zeros(4, int), full_batch_gd=True)
    with pytest.raises(ValueError, match="module"):
        analyse_run(pairs, x, np.zeros(4, int), module=object())
    with pytest.raises(ValueError, match="full_batch_gd"):
        analyse_run(pairs, x, np.zeros(4, int), recorded_steps=[0, 1],
                    recorded_train=np.zeros((2, 4, 2)))
    with pytest.raises(ValueError, match="recorded_train"):
        analyse_run(pairs, x, np.zeros(4, int), lr=0.1, full_batch_gd=True,
                    recorded_steps=[0, 1], recorded_train=np.zeros((2, 3, 2)))


def test_per_output_forecast_above_the_row_limit_from_net_pairs(run):
    # Above `full_kernel_rows` the forecast takes K = trace / O as the kernel of every output
    # (Θ = K ⊗ I_O) and says so. Reference: the closed form of gradient descent on the
    # linearized model, f_t = y + V (1 − lr Λ/N)^t Vᵀ (f_0 − y) per output (Lee et al., NeurIPS
    # 2019, arXiv:1902.06720), with numpy's eigh.
    _, _, _, hand, _, data = run
    result = analyse_run([(s, hand[s]) for s in SAVED], data["x"], data["y"], lr=LR,
                         forecast_from=[40], horizon=15, full_kernel_rows=10)
    (last,) = result.checkpoints
    assert last.step == 40 and last.kernel.startswith("per-output")
    assert any("per-output kernel trace / 10" in c for c in result.cautions)
    assert last.test_mse_ridge is None and last.forecast.test_outputs is None
    k = np.asarray(ntkcalc.ntk(hand[40], data["x"], progress=False)) / 10
    lam, v = np.linalg.eigh(k)
    r0 = np.asarray(hand[40](data["x"])) - data["y"]
    want = data["y"] + v @ (((1 - LR * lam / N_TRAIN) ** 15)[:, None] * (v.T @ r0))
    assert int(last.forecast.steps[-1]) == 15
    assert_close(last.forecast.train_outputs[-1], want, rtol=1e-9)
    assert last.gap is None  # full_batch_gd not claimed: no comparison with the run
    assert result.laziness.forecast_gap is None


class _NnxMlp(nnx.Module):
    """A small nnx MLP: 4 iris features, 8 tanh units, 3 classes."""

    def __init__(self, rngs):
        self.hidden = nnx.Linear(4, 8, rngs=rngs, param_dtype=jnp.float64)
        self.readout = nnx.Linear(8, 3, rngs=rngs, param_dtype=jnp.float64)

    def __call__(self, x):
        return self.readout(nnx.tanh(self.hidden(x)))


def test_nnx_checkpoints_from_a_factory(tmp_path):
    # An nnx model saved with orbax at two steps (two optax SGD steps apart) on scikit-learn's
    # iris; the workflow's kernels against the dense jax.jacrev reference on Nets built by hand.
    iris = load_iris()
    x, labels = iris.data[::10], iris.target[::10]  # 15 examples, all three classes
    model = _NnxMlp(nnx.Rngs(0))
    hand = {0: ntkcalc.Net.from_nnx(model)}
    params = hand[0].params
    kept = _sgd(lambda p: _mse_loss(hand[0].apply(p, x), np.eye(3)[labels]), params, 2)
    hand[2] = hand[0].replace(params=kept[2])
    options = ocp.CheckpointManagerOptions(max_to_keep=None, enable_async_checkpointing=False)
    with ocp.CheckpointManager(tmp_path / "ckpt", options=options) as manager:
        for s in (0, 2):
            nnx.update(model, kept[s])
            manager.save(s, args=ocp.args.StandardSave(nnx.state(model)))
        manager.wait_until_finished()
    result = analyse_run(tmp_path / "ckpt", x, labels, module=lambda: _NnxMlp(nnx.Rngs(7)))
    assert result.checkpoints[0].forecast is None and result.checkpoints[1].step == 2
    for i, s in enumerate((0, 2)):
        want = reduce_mode(reference_full(hand[s], x), "trace")
        assert_close(result.drift.kernels[i], want, rtol=1e-10)
    assert {g.group for g in result.groups} == {"hidden", "readout"}

    # cross-entropy forecasts, compared with the run: the gap by `Forecast.departure`'s scale for
    # cross-entropy, max_t ‖f_lin(t) − f_0‖, against optax SGD on the jvp-linearized model with
    # optax's softmax cross-entropy (mean over examples, the forecast's convention)
    y = np.eye(3)[labels]
    ce = lambda f, t: jnp.mean(optax.softmax_cross_entropy(f, t))
    result = analyse_run([(0, hand[0]), (2, hand[2])], x, labels, lr=LR, loss="cross-entropy",
                         full_batch_gd=True, forecast_from=[0], horizon=2)
    (start,) = result.checkpoints
    lin = _linearized_sgd(hand[0], x, y, 2, loss=ce)
    assert_close(start.forecast.train_outputs[-1], lin(2, x), rtol=1e-9)
    scale = max(np.linalg.norm(lin(t, x) - lin(0, x)) for t in (0, 1, 2))
    want = np.linalg.norm(np.asarray(hand[2](x)) - lin(2, x)) / scale
    assert start.gap_steps.tolist() == [0, 2] and start.gap[-1] == pytest.approx(want, rel=1e-8)
    assert result.laziness.forecast_gap == pytest.approx(want, rel=1e-8)


# -- the sketched path -----------------------------------------------------------------------------
SKETCH_K = 1024


@functools.cache
def _sketched(tmp: str):
    """The same run analysed on sketched features (forced), with its report written."""
    result, _, _, hand, _, data = _run(tmp)
    pairs = [(s, hand[s]) for s in SAVED]
    sk = analyse_run(pairs, data["x"], data["labels"], x_test=data["xt"], y_test=data["labels_t"],
                     lr=LR, forecast_from=[0, 20], kernel="sketch", features=SKETCH_K)
    html_path, _ = sk.write(f"{tmp}/sketch-report")
    return result, sk, html_path


@pytest.fixture(scope="module")
def sketched(tmp_path_factory, run):
    return _sketched(str(tmp_path_factory.mktemp("sketch")))


def _within(u, want, sigmas=4.0):
    """An estimate within ``sigmas`` jackknife standard errors (plus its estimated bias) of the
    reference; 4σ: a correct error bar fails about once in 16,000 checks (common practice)."""
    value, err, bias = (np.asarray(v, float) for v in (u.value, u.error, u.bias))
    assert np.all(np.abs(value - want) <= sigmas * err + np.abs(bias)), (value, err, want)


def test_sketched_run_matches_exact_within_error_bars(sketched):
    """Forced sketch vs the exact path on the same digits run (k = 1024 features, N = 120):
    distance and relative change to step 0 and centered alignment against the exact path's
    drift (whose formulas are checked above against numpy), and the verdict of the same kind as
    the exact one or "not resolved"; top eigenvalues against numpy's eigh of `ntkcalc.ntk`
    (checked against jacrev elsewhere); the test MSE of kernel ridge at the ridge GCV chose,
    against scikit-learn's KernelRidge on the exact kernels. Each within 4 error bars."""
    exact, sk, _ = sketched
    assert sk.kernel == "sketch" and exact.kernel == "exact"
    assert sk.kinds["kernel"] == "sketch: kernel='sketch'"
    assert exact.choice.rule == "fits" and exact.kinds["kernel"] == f"exact: {exact.choice.reason}"
    assert sk.choice.rule == "requested" and sk.choice.reason == "kernel='sketch'"
    s = sk.sketched
    assert s.distance[0] is None and s.relative_change[0] is None
    _within(s.distance[-1], exact.drift.distance_to_initial[-1])
    _within(s.relative_change[-1], exact.drift.relative_change[-1])
    assert sk.laziness.outcome in (exact.laziness.outcome, "not resolved")
    for t in range(len(SAVED)):
        _within(s.alignment[t], exact.drift.alignment[t])
    for c, step in zip(s.checkpoints, (0, 20), strict=True):
        assert c.step == step and c.ridge in c.ridges and c.gcv[list(c.ridges).index(c.ridge)] \
            == min(c.gcv)


def test_sketched_eigenvalues_and_ridge_against_numpy_and_sklearn(sketched, run):
    _, sk, _ = sketched
    _, _, _, hand, _, data = run
    for c in sk.sketched.checkpoints:
        k = np.asarray(ntkcalc.ntk(hand[c.step], data["x"], progress=False))
        kx = np.asarray(ntkcalc.ntk(hand[c.step], data["xt"], data["x"], progress=False))
        top = np.linalg.eigvalsh(k)[::-1][:c.eigenvalues.value.size]
        _within(c.eigenvalues, top)
        ref = KernelRidge(alpha=c.ridge, kernel="precomputed").fit(k, data["y"])
        mse = float(np.mean((ref.predict(kx) - data["yt"]) ** 2))
        _within(c.fit.test_mse, mse)


def test_sketched_run_refuses_exact_only_answers_and_reports_the_kernel(sketched):
    """No silent substitutes: forecasts and per-group kernels are named as not computed, the
    report's sections are the sketched ones, and result.json says which kernel was used."""
    _, sk, html_path = sketched
    assert sk.drift is None and sk.checkpoints == () and sk.groups == ()
    assert any(c.startswith("Forecasts not computed") for c in sk.cautions)
    assert any(c.startswith("Per-group kernel change not computed") for c in sk.cautions)
    assert sk.kinds["forecast"].startswith("not computed")
    with open(html_path, encoding="utf-8") as fh:
        page = fh.read()
    assert tuple(re.findall(r'<section id="([^"]+)">', page)) == SKETCH_SECTIONS
    assert "sketched NTK features, k = 1024" in page
    doc = json.loads(sk.to_json())
    assert doc["kernel"] == "sketch" and doc["drift"] is None
    assert doc["sketched"]["k"] == SKETCH_K
    assert len(doc["sketched"]["alignment"]) == len(SAVED)
    assert all(r is not None for r in sk.feature_ranks)  # no kernel needed
    sk.plot()  # a figure of the sketched answers with error bars


def test_sketched_report_prints_every_number_with_its_error_bar(sketched, tmp_path):
    """Every decimal number the sketched report shows is in its report.json (up to the rounding
    it is shown with), every sketched estimate in a row or the summary is followed by its error
    bar, error rows name the MSE convention, and the verdict is the one `laziness` gives the
    bias-corrected distances with their jackknife errors (not a distance clipped at 0)."""
    import html

    from test_report import _shown_numbers, numbers_in

    from ntkcalc._sketch.analysis import clusters
    from ntkcalc._workflows.report import write_report

    _, sk, html_path = sketched
    s = sk.sketched
    want = ntkcalc.laziness(
        relative_change=[0.0] + [c.corrected for c in s.relative_change[1:]],
        relative_change_error=[0.0] + [c.error for c in s.relative_change[1:]],
        distance=[0.0] + [d.corrected for d in s.distance[1:]],
        distance_error=[0.0] + [d.error for d in s.distance[1:]], steps=sk.steps)
    assert sk.laziness == want and sk.verdict == want.sentence
    assert sk.laziness.distance_error == s.distance[-1].error > 0 and "±" in sk.verdict
    # both kernel criteria, as on the exact path (no caution that one is missing)
    assert sk.laziness.relative_change_error == s.relative_change[-1].error > 0
    assert not any("not estimated" in c for c in sk.cautions)
    # a kernel criterion failed: the yardsticks the sketch lacks (init spread, forecast gap) named
    assert any(c.startswith("Not lazy on the kernel's change alone") for c in sk.cautions) == bool(
        sk.laziness.failed)
    with open(html_path, encoding="utf-8") as fh:
        page = html.unescape(fh.read())
    with open(html_path.replace("report.html", "report.json"), encoding="utf-8") as fh:
        doc = json.load(fh)
    assert doc["verdict"]["distance_error"] == sk.laziness.distance_error
    known = list(numbers_in(doc))
    rows = re.findall(r'<tr><th>([^<]*)</th><td class="num">([^<]*)</td></tr>', page)
    for cell in [v for _, v in rows] + doc["summary"] + doc["cautions"]:
        for value, step in _shown_numbers(cell):
            assert any(abs(v - value) <= 0.51 * step + 1e-12 for v in known), (cell, value)
    for label, value in rows:
        if "distance" in label or "alignment" in label or "eigenvalues" in label:
            assert "±" in value, (label, value)
        if "relative change" in label and "—" not in value:
            assert value.count("±") == 3, (label, value)
        if "ridge" in label:
            assert "MSE" in label and value.count("±") == 3, (label, value)
    for c in s.checkpoints:  # a cluster of eigenvalues the sketch does not resolve is named
        row = dict(rows)[f"step {c.step}: top eigenvalues of the trace kernel (bias-corrected)"]
        assert ("the sketch does not resolve" in row) == any(
            a <= 5 for a, _ in clusters(c.eigenvalues))
    # a threshold at the estimate itself: within its error bars, so not resolved, and the
    # report says so (not "Not lazy")
    d = s.distance[-1]
    open_verdict = ntkcalc.laziness(
        distance=[0.0, d.corrected], distance_error=[0.0, d.error],
        kernel_threshold=max(d.corrected, 1e-6))
    assert open_verdict.outcome == "not resolved"
    unresolved = dataclasses.replace(sk, laziness=open_verdict, lazy=False,
                                     verdict=open_verdict.sentence)
    _, json_path = write_report(unresolved, out=tmp_path)
    with open(json_path, encoding="utf-8") as fh:
        cautions = json.load(fh)["cautions"]
    assert any(c.startswith("Laziness not resolved — the verdict: not resolved: ")
               for c in cautions)
    assert not any(c.startswith("Not lazy") for c in cautions)


def test_clusters_of_sketched_eigenvalues():
    # neighbours within 2 combined standard errors √(σ_i² + σ_j²) form a run (our rule, the
    # verdict's two error bars); the numbers: the digits run of docs/own-run.md at k = 512
    from ntkcalc._sketch.analysis import clusters

    u = ntkcalc.Uncertain(np.array([8162.0, 603.6, 496.5, 527.7, 317.2]),
                          np.array([960.0, 59.0, 26.0, 36.0, 26.0]), np.zeros(5), 8)
    assert clusters(u) == ((2, 4),)
    apart = ntkcalc.Uncertain(np.array([10.0, 5.0, 4.9, 1.0, 0.95]), np.full(5, 0.03),
                              np.zeros(5), 8)
    assert clusters(apart) == ((4, 5),)  # 0.1 apart is > 2·√2·0.03 = 0.085; 0.05 is not
    assert clusters(dataclasses.replace(apart, error=np.full(5, 1e-3))) == ()


def test_auto_takes_features_above_the_time_limit(run):
    """kernel="auto": with a time limit below the planner's estimate the sketch is taken and
    the reason names the estimate; with the default limit this small run stays exact."""
    _, _, _, hand, _, data = run
    pairs = [(0, hand[0]), (40, hand[40])]
    sk = analyse_run(pairs, data["x"], data["labels"], features=64, exact_seconds=1e-9)
    assert sk.kernel == "sketch" and "above exact_seconds=1e-09" in sk.kinds["kernel"]
    with pytest.raises(ValueError, match="`kernel`='approximate' is not known"):
        analyse_run(pairs, data["x"], data["labels"], kernel="approximate")
