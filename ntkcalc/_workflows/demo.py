"""The end-to-end demo: train a small network on built-in pump readings and ask its kernel why.

Steps, each with ntkcalc:

1. the seeded pump-condition readings (`pump_readings`), a train/test split;
2. an MLP in the NTK parameterization (weights N(0, 1), pre-activations scaled by ``1/√fan_in``,
   so a modest width stays near the lazy regime), float64;
3. full-batch gradient descent with optax on ``L = (1/N) Σ_i ½‖f(x_i) − y_i‖²`` (one-hot ``y``),
   the convention of `forecast`, at half the stability limit ``2N/λ_max`` of the initial kernel;
   orbax checkpoints at several steps;
4. the kernel at initialization (``outputs="full"`` on train and test-vs-train) and at each
   checkpoint (``outputs="trace"`` on train, restored from orbax);
5. the lazy-training forecast from the initial kernel against the actual outputs, the GCV/KARE/LOO
   risk of kernel ridge against its held-out error, kernel drift (with the spread between two more
   independent initializations as yardstick) and label alignment over steps; one laziness
   verdict (`ntkcalc.laziness`) from the kernel's change and the forecast gap on outputs;
6. results saved as ``results.json`` and ``arrays.npz``, then `write_report`.
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
import os
import sys
import time
import warnings
from typing import Literal

import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np
import optax
import orbax.checkpoint as ocp

from .._adapters.net import Net
from .._analysis import feature_rank, forecast, ridge_fit, risk
from .._analysis._result import Result
from .._analysis.laziness import laziness, output_gap
from .._kernel import ntk
from .data import pump_readings
from .drift import drift
from .report import ARRAYS, RESULTS, write_report

Scale = Literal["full", "small"]

#: PRNG keys of the independent initializations whose kernels give the init spread.
SPREAD_KEYS = (1, 2)


@dataclasses.dataclass(frozen=True)
class _Setting:
    n_train: int
    n_test: int
    width: int
    depth: int
    steps: int
    checkpoints: int
    curve_points: int
    ridges: int


_SETTINGS: dict[str, _Setting] = {
    "full": _Setting(n_train=600, n_test=400, width=512, depth=2, steps=600, checkpoints=6,
                     curve_points=120, ridges=41),
    "small": _Setting(n_train=160, n_test=120, width=128, depth=2, steps=300, checkpoints=4,
                      curve_points=40, ridges=25),
}


@dataclasses.dataclass(frozen=True, repr=False)
class DemoResult(Result):
    """What `run_demo` produced, and the numbers of its five-line summary.

    Fields:
        out_dir: the run directory (``results.json``, ``arrays.npz``, ``checkpoints/``, report).
        report_html, report_json: the report files.
        summary: five lines, the printed summary.
        cautions: where a number may mislead (non-lazy run, conditioning, precision).
        seconds: wall time of the whole run.
        lr: learning rate used; steps: gradient steps.
        lazy: the laziness verdict; verdict: its sentence (the report's, word for word).
        forecast_gap: largest gap between the observed and forecast training outputs, relative
            to the initial residual ‖f_0 − y‖.
        train_loss, forecast_train_loss: final training MSE (mean over examples and outputs of
            (f − y)², the report's one convention), observed and forecast.
        test_loss, forecast_test_loss: final test MSE, observed and forecast.
        kernel_distance: distance of the last checkpoint's kernel to the initial one.
        relative_change: ‖K_T − K_0‖/‖K_0‖ at the last checkpoint.
        alignment_init, alignment_final: centered kernel-label alignment, first and last kernel.
        gcv_ridge: the ridge chosen for kernel ridge (GCV's, or LOO's when they disagree);
            gcv_error: GCV's estimate there (MSE); heldout_error: kernel ridge MSE on the test
            set at that ridge; heldout_accuracy: its test accuracy.
    """

    out_dir: str
    report_html: str
    report_json: str
    summary: tuple[str, ...]
    cautions: tuple[str, ...]
    seconds: float
    lr: float
    steps: int
    lazy: bool
    verdict: str
    forecast_gap: float
    train_loss: float
    forecast_train_loss: float
    test_loss: float
    forecast_test_loss: float
    kernel_distance: float
    relative_change: float
    alignment_init: float
    alignment_final: float
    gcv_ridge: float
    gcv_error: float
    heldout_error: float
    heldout_accuracy: float


class _NtkDense(nn.Module):
    """``act(x W / √fan_in + β b)`` with W, b ~ N(0, 1): a layer in the NTK parameterization."""

    features: int
    activation: bool = True
    bias_scale: float = 0.1

    @nn.compact
    def __call__(self, x):
        fan_in = x.shape[-1]
        w = self.param("kernel", nn.initializers.normal(1.0), (fan_in, self.features), x.dtype)
        b = self.param("bias", nn.initializers.normal(1.0), (self.features,), x.dtype)
        z = x @ w / np.sqrt(fan_in) + self.bias_scale * b[None, :]
        return jnp.tanh(z) if self.activation else z


class _Mlp(nn.Module):
    """``depth`` tanh layers ``hidden_i`` of ``width`` units, then a linear ``readout``."""

    width: int
    depth: int
    classes: int

    @nn.compact
    def __call__(self, x):
        for i in range(self.depth):
            x = _NtkDense(self.width, name=f"hidden_{i}")(x)
        return _NtkDense(self.classes, activation=False, name="readout")(x)


def _mse(f, y):
    """``(1/N) Σ_i ½‖f_i − y_i‖²``, the training loss (the convention of `forecast`)."""
    return 0.5 * jnp.sum((f - y) ** 2) / f.shape[0]


def _mse_per_output(f, y) -> np.ndarray:
    """The report's one convention: mean over examples and outputs of ``(f − y)²``, per step
    for (T, N, O) outputs."""
    return np.mean((np.asarray(f) - np.asarray(y)) ** 2, axis=(-2, -1))


def _accuracy(f, labels) -> float:
    return float(np.mean(np.argmax(np.asarray(f), axis=1) == labels))


def _record_steps(steps: int, points: int, extra) -> np.ndarray:
    """0, then about ``points`` log-spaced steps up to ``steps``, plus ``extra``."""
    grid = np.round(np.geomspace(1, steps, points)).astype(np.int64)
    return np.unique(np.concatenate([[0], grid, np.asarray(extra, np.int64)]))


def _train(net: Net, train, test, *, lr: float, steps: int, record, save_at, manager):
    """Full-batch gradient descent; outputs and accuracies at ``record``, checkpoints at
    ``save_at``.

    Returns ``(curves, params)``: curves maps train_outputs and test_outputs to (T, N, O) and
    (T, M, O) arrays, train_accuracy and test_accuracy to (T,) arrays over ``record``; params are
    the final parameters.
    """
    x, y = jnp.asarray(train.x), jnp.asarray(train.one_hot)
    xt = jnp.asarray(test.x)
    opt = optax.sgd(lr)

    @jax.jit
    def step(params, opt_state):
        grad = jax.grad(lambda p: _mse(net.apply(p, x), y))(params)
        updates, opt_state = opt.update(grad, opt_state, params)
        return optax.apply_updates(params, updates), opt_state

    evaluate = jax.jit(lambda p: (net.apply(p, x), net.apply(p, xt)))
    params, opt_state = net.params, opt.init(net.params)
    record, save_at = set(record.tolist()), set(save_at.tolist())
    curves = {k: [] for k in ("train_outputs", "test_outputs", "train_accuracy",
                              "test_accuracy")}
    for t in range(steps + 1):
        if t in save_at:
            manager.save(t, args=ocp.args.StandardSave(params))
        if t in record:
            f, ft = evaluate(params)
            curves["train_outputs"].append(np.asarray(f))
            curves["test_outputs"].append(np.asarray(ft))
            curves["train_accuracy"].append(_accuracy(f, train.labels))
            curves["test_accuracy"].append(_accuracy(ft, test.labels))
        if t < steps:
            params, opt_state = step(params, opt_state)
    manager.wait_until_finished()
    return {k: np.asarray(v) for k, v in curves.items()}, params


class _Cautions:
    """Collects the RuntimeWarnings of the analysis: each becomes a caution of the report."""

    def __init__(self):
        self.items: list[str] = []

    @contextlib.contextmanager
    def watch(self):
        with warnings.catch_warnings(record=True) as log:
            warnings.simplefilter("always", RuntimeWarning)
            yield
        for w in log:
            if issubclass(w.category, RuntimeWarning):
                self.items.append(str(w.message))
            else:
                warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)


def _say(progress: bool, text: str) -> None:
    if progress:
        print(f"[ntkcalc demo] {text}", file=sys.stderr, flush=True)


def _check_args(out_dir, scale, progress) -> str:
    if not isinstance(out_dir, str | os.PathLike):
        raise TypeError(
            f"`out_dir` must be a path (str or os.PathLike), got {type(out_dir).__name__}.")
    if scale not in _SETTINGS:
        raise ValueError(f"`scale` must be one of {sorted(_SETTINGS)}, got {scale!r}.")
    if not isinstance(progress, bool):
        raise TypeError(f"`progress` must be True or False, got {progress!r}.")
    path = os.path.abspath(os.fspath(out_dir))
    if os.path.exists(path) and not os.path.isdir(path):
        raise ValueError(f"`out_dir`={path!r} exists and is not a directory; pass a directory.")
    ckpt = os.path.join(path, "checkpoints")
    if os.path.exists(ckpt) and os.listdir(ckpt):
        raise ValueError(
            f"`out_dir`={path!r} already holds checkpoints of an earlier run; pass a new or empty "
            "directory."
        )
    return path


def run_demo(out_dir, *, scale: Scale = "full", progress: bool = True) -> DemoResult:
    """Train a small MLP on built-in pump readings, analyse its kernels and write the report.

    Args:
        out_dir: directory for the run (created); must not hold an earlier run's checkpoints.
        scale: ``"full"`` (600 training examples, width 512, 600 steps; under two minutes on
            two CPU cores) or ``"small"`` (160 examples, width 128, 300 steps; for tests).
        progress: print each stage to stderr, then the report path and the summary to stdout.

    Returns:
        `DemoResult`; its ``summary`` (five lines) is what the command line prints.
    """
    path = _check_args(out_dir, scale, progress)
    os.makedirs(path, exist_ok=True)
    start = time.perf_counter()
    with jax.enable_x64(True):
        results, cautions = _analyse(path, _SETTINGS[scale], progress=progress)
    results["scale"] = scale
    results["cautions"] = cautions.items
    with open(os.path.join(path, RESULTS), "w", encoding="utf-8") as fh:
        json.dump(results, fh, indent=1, ensure_ascii=False)
    _say(progress, "report")
    html, report_json = write_report(path)
    with open(report_json, encoding="utf-8") as fh:
        report = json.load(fh)
    seconds = time.perf_counter() - start
    summary = tuple(report["summary"])
    fc, dr, rk = results["forecast"], results["drift"], results["risk"]
    verdict = results["laziness"]
    return DemoResult(
        out_dir=path, report_html=html, report_json=report_json, summary=summary,
        cautions=tuple(report["cautions"]), seconds=seconds, lr=results["training"]["lr"],
        steps=results["training"]["steps"], lazy=verdict["lazy"], verdict=verdict["sentence"],
        forecast_gap=fc["largest_train_gap"],
        train_loss=fc["observed_train_mse"][-1], forecast_train_loss=fc["forecast_train_mse"][-1],
        test_loss=fc["observed_test_mse"][-1], forecast_test_loss=fc["forecast_test_mse"][-1],
        kernel_distance=dr["kernel_distance"][-1], relative_change=dr["relative_change"][-1],
        alignment_init=dr["alignment"][0],
        alignment_final=dr["alignment"][-1], gcv_ridge=rk["chosen_ridge"],
        gcv_error=rk["gcv_at_chosen"], heldout_error=rk["heldout_at_chosen"],
        heldout_accuracy=rk["heldout_accuracy_at_chosen"],
    )


def _checkpoint_steps(cfg: _Setting) -> np.ndarray:
    """0, then ``checkpoints − 1`` log-spaced steps from ``steps/64`` to ``steps``."""
    grid = np.geomspace(cfg.steps / 64, cfg.steps, cfg.checkpoints - 1)
    return np.unique(np.concatenate([[0], np.round(grid)]).astype(np.int64))


def _analyse(path: str, cfg: _Setting, *, progress: bool) -> tuple[dict, _Cautions]:
    """Everything from the data to ``results`` (the content of results.json) and arrays.npz."""
    cautions = _Cautions()
    train, test = pump_readings(cfg.n_train, cfg.n_test, seed=0)
    classes, n = len(train.class_names), len(train)
    y, yt = train.one_hot, test.one_hot
    _say(progress, f"data: {n} train / {len(test)} test pump readings, {classes} classes")
    model = _Mlp(width=cfg.width, depth=cfg.depth, classes=classes)
    variables = model.init(jax.random.key(0), jnp.zeros((1, train.x.shape[1]), jnp.float64))
    net = Net.from_linen(model, variables)

    _say(progress, f"kernel at initialization ({net.num_params:,} parameters)")
    k0_full = ntk(net, train.x, outputs="full", progress=False)  # the stages are the progress
    k0x_full = ntk(net, test.x, train.x, outputs="full", progress=False)
    k0, k0x = np.einsum("ijaa->ij", k0_full), np.einsum("ijaa->ij", k0x_full)
    flat = k0_full.transpose(0, 2, 1, 3).reshape(n * classes, n * classes)
    lr = n / float(np.linalg.eigvalsh(flat)[-1])  # half the stability limit 2N/λ_max

    save_at = _checkpoint_steps(cfg)
    record = _record_steps(cfg.steps, cfg.curve_points, save_at)
    _say(progress, f"training: {cfg.steps} full-batch steps at lr={lr:.4g}, checkpoints at "
                   f"steps {save_at.tolist()}")
    options = ocp.CheckpointManagerOptions(max_to_keep=None, enable_async_checkpointing=False)
    with ocp.CheckpointManager(os.path.join(path, "checkpoints"), options=options) as manager:
        curves, final_params = _train(net, train, test, lr=lr, steps=cfg.steps, record=record,
                                      save_at=save_at, manager=manager)
    _say(progress, "kernels at the checkpoints and at independent initializations")
    inits = [Net.from_linen(model, model.init(jax.random.key(k), train.x[:1]))
             for k in SPREAD_KEYS]
    dr = drift(os.path.join(path, "checkpoints"), train.x, train.labels, module=model,
               variables=variables, steps=save_at.tolist(), inits=inits)
    kernels = list(dr.kernels)
    final = net.replace(params=final_params)

    _say(progress, "forecast, risk estimates, drift, alignment, feature rank")
    with cautions.watch():
        # the exact (N, N, O, O) kernel: the model is small enough, so no K ⊗ I_O assumption
        fc = forecast(k0_full, y, curves["train_outputs"][0], lr=lr, steps=record,
                      k_test_train=k0x_full, f0_test=curves["test_outputs"][0], y_test=yt)
        # the gap on outputs relative to the initial residual, the verdict's own definition
        gaps = {part: output_gap(curves[f"{part}_outputs"], getattr(fc, f"{part}_outputs"),
                                 scale=float(np.linalg.norm(curves[f"{part}_outputs"][0] - t)),
                                 steps=record)
                for part, t in (("train", y), ("test", yt))}
        verdict = laziness(relative_change=dr.relative_change, distance=dr.distance_to_initial,
                           steps=dr.steps, forecast_gap=gaps["train"], gap_steps=record,
                           spread=dr.laziness.spread)
        k_final_x = ntk(final, test.x, train.x, progress=False)
        risk_part = _risk_part(k0, k0x, kernels[-1], k_final_x, train, test, cfg)
        ranks = {"initialization": feature_rank(net, train.x, layer=f"hidden_{cfg.depth - 1}"),
                 f"step {cfg.steps}": feature_rank(final, train.x,
                                                   layer=f"hidden_{cfg.depth - 1}")}
    np.savez_compressed(os.path.join(path, ARRAYS), k_init=k0, k_final=kernels[-1],
                        labels=train.labels)
    arch = "→".join(map(str, [train.x.shape[1], *[cfg.width] * cfg.depth, classes]))
    results = {
        "kind": "demo",
        "dtype": str(k0.dtype),
        "data": {
            "scenario": "pump condition monitoring (simulated readings, seed 0)",
            "n_train": n, "n_test": len(test), "features": list(train.feature_names),
            "units": list(train.units), "class_names": list(train.class_names),
            "train_counts": np.bincount(train.labels, minlength=classes).tolist(),
        },
        "model": {"architecture": f"MLP {arch}, tanh, NTK parameterization",
                  "parameters": net.num_params, "width": cfg.width, "depth": cfg.depth},
        "training": {
            "loss": "trained on L = (1/N) Σ_i ½‖f(x_i) − y_i‖² (one-hot y), which is O/2 times "
                    "the MSE every number of the report is in",
            "optimizer": "optax.sgd, full batch", "lr": lr, "max_stable_lr": fc.max_stable_lr,
            "steps": cfg.steps, "checkpoint_steps": save_at.tolist(),
            "parameter_change": _relative_change(net.params, final_params),
        },
        "laziness": verdict.to_dict(),
        "forecast": {
            "steps": record.tolist(), "tolerance": verdict.gap_threshold,
            "train_gap": gaps["train"].tolist(), "test_gap": gaps["test"].tolist(),
            "largest_train_gap": float(gaps["train"].max()),
            "largest_test_gap": float(gaps["test"].max()),
            **{f"observed_{part}_mse": _mse_per_output(curves[f"{part}_outputs"], t).tolist()
               for part, t in (("train", y), ("test", yt))},
            **{f"forecast_{part}_mse": _mse_per_output(getattr(fc, f"{part}_outputs"), t).tolist()
               for part, t in (("train", y), ("test", yt))},
            **{f"observed_{k}": np.asarray(curves[k]).tolist()
               for k in ("train_accuracy", "test_accuracy")},
            **{f"forecast_{k}": getattr(fc, k).tolist()
               for k in ("train_accuracy", "test_accuracy")},
        },
        "drift": {
            "steps": dr.steps.tolist(),
            "kernel_distance": dr.distance_to_initial.tolist(),
            "relative_change": dr.relative_change.tolist(),
            "alignment": dr.alignment.tolist(),
            "threshold": dr.threshold,
            "init_spread": dataclasses.asdict(dr.laziness.spread),
        },
        "risk": risk_part,
        "feature_rank": {"layer": f"hidden_{cfg.depth - 1}", "width": cfg.width,
                         "checkpoints": {name: _rank_numbers(r) for name, r in ranks.items()}},
    }
    return results, cautions


def _rank_numbers(r) -> dict:
    return {k: getattr(r, k) for k in ("num_examples", "num_features", "rank", "full_rank",
                                         "sigma_max", "sigma_min", "tol", "margin")}


def _relative_change(before, after) -> float:
    """``‖θ_after − θ_before‖ / ‖θ_before‖`` over all parameters."""
    flat = [np.concatenate([np.ravel(a) for a in jax.tree_util.tree_leaves(t)])
            for t in (before, after)]
    return float(np.linalg.norm(flat[1] - flat[0]) / np.linalg.norm(flat[0]))


def _risk_part(k0, k0x, k_final, k_final_x, train, test, cfg: _Setting) -> dict:
    """GCV/KARE/LOO over a ridge grid against the held-out error of kernel ridge on ``k0``; all
    errors are MSE (mean over examples and outputs of (f − y)²)."""
    y, yt = train.one_hot, test.one_hot
    scale = float(np.mean(np.diag(k0)))
    ridges = scale * np.logspace(-6, 2, cfg.ridges)
    est = risk(k0, y, ridges=ridges)
    pred = ridge_fit(k0, y, ridge=ridges, k_test_train=k0x).test_predictions  # (R, M, O)
    held = np.mean((pred - yt[None]) ** 2, axis=(1, 2))
    acc = np.mean(np.argmax(pred, axis=2) == test.labels[None], axis=1)
    chosen = est.recommended  # GCV's ridge, or LOO's when the two disagree (risk warns then)
    i = int(np.flatnonzero(ridges == chosen)[0])
    # the same ridge relative to the kernel's scale, on the kernel of the trained network
    moved = ridge_fit(k_final, y, ridge=chosen * float(np.mean(np.diag(k_final))) / scale,
                      k_test_train=k_final_x).test_predictions
    return {
        "ridges": ridges.tolist(), "gcv": est.gcv.tolist(), "kare": est.kare.tolist(),
        "loo": est.loo.tolist(), "heldout": held.tolist(), "heldout_accuracy": acc.tolist(),
        "best": dict(est.best), "chosen_ridge": float(chosen), "chosen_by": est.recommended_by,
        "estimators_agree": est.agree, "loo_over_gcv": est.ratio,
        "gcv_at_chosen": float(est.gcv[i]), "loo_at_chosen": float(est.loo[i]),
        "heldout_at_chosen": float(held[i]), "heldout_accuracy_at_chosen": float(acc[i]),
        "final_kernel_heldout": float(np.mean((moved - yt) ** 2)),
        "final_kernel_heldout_accuracy": float(np.mean(np.argmax(moved, 1) == test.labels)),
    }
