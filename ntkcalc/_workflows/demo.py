"""The end-to-end demo: the workflow for your own run (`analyse_run`), run on built-in data.

Steps:

1. the seeded pump-condition readings (`pump_readings`), a train/test split;
2. an MLP in the NTK parameterization (weights N(0, 1), pre-activations scaled by ``1/√fan_in``,
   so a modest width stays near the lazy regime), float64;
3. full-batch gradient descent with optax on ``L = (1/N) Σ_i ½‖f(x_i) − y_i‖²`` (one-hot ``y``),
   the convention of `forecast`, at half the stability limit ``2N/λ_max`` of the initial full
   kernel; orbax checkpoints at several steps, the outputs on train and test recorded at about
   ``curve_points`` log-spaced steps;
4. `analyse_run` on the checkpoint directory, with the recorded outputs, the test set and two
   independent initializations (the init-spread yardstick of the verdict);
5. `RunAnalysis.write` with a `RunDescription` of the data, model and training: the report.

There is no second pipeline: every number of the demo's report comes from the `RunAnalysis`.
"""

from __future__ import annotations

import dataclasses
import json
import os
import sys
import time
from typing import Literal, get_args

import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np
import optax
import orbax.checkpoint as ocp
import scipy.sparse.linalg

from .._adapters.net import Net
from .._analysis._result import Result
from .._engine.options import check_choice
from .._kernel import ntk
from .data import pump_readings
from .report import RunDescription
from .study import RunAnalysis, analyse_run

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
    """What `run_demo` produced, and the numbers of its five-line summary (all read from the
    report, which renders ``analysis``).

    Fields:
        out_dir: the run directory (``checkpoints/``, ``result.json``, the report).
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
        analysis: the `RunAnalysis` of the run, every answer typed.
        description: the `RunDescription` the report was written with.
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
    analysis: RunAnalysis
    description: RunDescription


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


def _record_steps(steps: int, points: int, extra) -> np.ndarray:
    """0, then about ``points`` log-spaced steps up to ``steps``, plus ``extra``."""
    grid = np.round(np.geomspace(1, steps, points)).astype(np.int64)
    return np.unique(np.concatenate([[0], grid, np.asarray(extra, np.int64)]))


def _checkpoint_steps(cfg: _Setting) -> np.ndarray:
    """0, then ``checkpoints − 1`` log-spaced steps from ``steps/64`` to ``steps``."""
    grid = np.geomspace(cfg.steps / 64, cfg.steps, cfg.checkpoints - 1)
    return np.unique(np.concatenate([[0], np.round(grid)]).astype(np.int64))


def _train(net: Net, train, test, *, lr: float, steps: int, record, save_at, manager):
    """Full-batch gradient descent; outputs on train and test at ``record``, orbax checkpoints
    at ``save_at``. Returns the (T, N, O) and (T, M, O) recorded outputs."""
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
    seen, seen_test = [], []
    for t in range(steps + 1):
        if t in save_at:
            manager.save(t, args=ocp.args.StandardSave(params))
        if t in record:
            f, ft = evaluate(params)
            seen.append(np.asarray(f))
            seen_test.append(np.asarray(ft))
        if t < steps:
            params, opt_state = step(params, opt_state)
    manager.wait_until_finished()
    return np.stack(seen), np.stack(seen_test)


def _say(progress: bool, text: str) -> None:
    if progress:
        print(f"[ntkcalc demo] {text}", file=sys.stderr, flush=True)


def _check_args(out_dir, scale, progress) -> str:
    if not isinstance(out_dir, str | os.PathLike):
        raise TypeError(
            f"`out_dir` must be a path (str or os.PathLike), got {type(out_dir).__name__}.")
    check_choice("scale", scale, get_args(Scale))
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
    """Train a small MLP on built-in pump readings, run `analyse_run` on its checkpoints and write
    the report.

    Args:
        out_dir: directory for the run (created); must not hold an earlier run's checkpoints.
        scale: ``"full"`` (600 training examples, width 512, 600 steps) or ``"small"`` (160
            examples, width 128, 300 steps; for tests).
        progress: print each stage to stderr.

    Returns:
        `DemoResult`; its ``summary`` (five lines) is what the command line prints.
    """
    path = _check_args(out_dir, scale, progress)
    os.makedirs(path, exist_ok=True)
    start = time.perf_counter()
    with jax.enable_x64(True):
        analysis, description = _run(path, _SETTINGS[scale], progress=progress)
    _say(progress, "report")
    html, report_json = analysis.write(path, description=description)
    with open(report_json, encoding="utf-8") as fh:
        report = json.load(fh)
    seconds = time.perf_counter() - start
    sec = report["sections"]
    fc, dr, rk = sec["forecast"], sec["drift"], sec["risk"]
    return DemoResult(
        out_dir=path, report_html=html, report_json=report_json, summary=tuple(report["summary"]),
        cautions=tuple(report["cautions"]), seconds=seconds, lr=fc["lr"],
        steps=int(analysis.steps[-1]), lazy=analysis.lazy, verdict=analysis.verdict,
        forecast_gap=fc["largest_train_gap"], train_loss=fc["observed_train_mse"][-1],
        forecast_train_loss=fc["forecast_train_mse"][-1], test_loss=fc["observed_test_mse"][-1],
        forecast_test_loss=fc["forecast_test_mse"][-1],
        kernel_distance=dr["kernel_distance"][-1], relative_change=dr["relative_change"][-1],
        alignment_init=dr["alignment"][0], alignment_final=dr["alignment"][-1],
        gcv_ridge=rk["chosen_ridge"], gcv_error=rk["gcv_at_chosen"],
        heldout_error=rk["heldout_at_chosen"], heldout_accuracy=rk["heldout_accuracy_at_chosen"],
        analysis=analysis, description=description,
    )


def _model(cfg: _Setting, train):
    """The demo's MLP and its variables at PRNG key 0 (float64)."""
    model = _Mlp(width=cfg.width, depth=cfg.depth, classes=len(train.class_names))
    return model, model.init(jax.random.key(0), jnp.zeros((1, train.x.shape[1]), jnp.float64))


def _run(path: str, cfg: _Setting, *, progress: bool) -> tuple[RunAnalysis, RunDescription]:
    """Data, training with checkpoints and recorded outputs, then `analyse_run`."""
    train, test = pump_readings(cfg.n_train, cfg.n_test, seed=0)
    classes, n = len(train.class_names), len(train)
    _say(progress, f"data: {n} train / {len(test)} test pump readings, {classes} classes")
    model, variables = _model(cfg, train)
    net = Net.from_linen(model, variables)

    _say(progress, f"learning rate from the initial kernel ({net.num_params:,} parameters)")
    k0 = np.asarray(ntk(net, train.x, outputs="full", progress=False))
    flat = k0.transpose(0, 2, 1, 3).reshape(n * classes, n * classes)
    # λ_max alone by Lanczos (ARPACK): a full eigvalsh of the (N·O, N·O) matrix took 7 s of the
    # run at N·O = 2400 (measured on two shared cores)
    top = scipy.sparse.linalg.eigsh(flat, k=1, which="LA", return_eigenvectors=False)
    lr = n / float(top[0])  # half the stability limit 2N/λ_max

    save_at = _checkpoint_steps(cfg)
    record = _record_steps(cfg.steps, cfg.curve_points, save_at)
    _say(progress, f"training: {cfg.steps} full-batch steps at lr={lr:.4g}, checkpoints at "
                   f"steps {save_at.tolist()}")
    ckpt = os.path.join(path, "checkpoints")
    options = ocp.CheckpointManagerOptions(max_to_keep=None, enable_async_checkpointing=False)
    with ocp.CheckpointManager(ckpt, options=options) as manager:
        seen, seen_test = _train(net, train, test, lr=lr, steps=cfg.steps, record=record,
                                 save_at=save_at, manager=manager)
    _say(progress, "analyse_run: kernels at the checkpoints and at independent initializations, "
                   "forecasts, risk, feature rank")
    inits = [Net.from_linen(model, model.init(jax.random.key(k), train.x[:1]))
             for k in SPREAD_KEYS]
    analysis = analyse_run(
        ckpt, train.x, train.labels, module=model, variables=variables, x_test=test.x,
        y_test=test.labels, lr=lr, horizon=cfg.steps, full_batch_gd=True,
        recorded_steps=record, recorded_train=seen, recorded_test=seen_test, inits=inits,
        layer=f"hidden_{cfg.depth - 1}", ridges=cfg.ridges)
    arch = "→".join(map(str, [train.x.shape[1], *[cfg.width] * cfg.depth, classes]))
    description = RunDescription(
        title="pump condition demo",
        data="simulated pump readings (pump condition monitoring, seed 0)",
        model=f"MLP {arch}, tanh, NTK parameterization",
        training="optax.sgd, full batch, on L = (1/N) Σ_i ½‖f(x_i) − y_i‖² (one-hot y), O/2 "
                 "times the MSE every number of the report is in",
        class_names=tuple(train.class_names),
        details=(("features", ", ".join(f"{f} [{u}]" for f, u in zip(
            train.feature_names, train.units, strict=True))),
                 ("scale", f"{cfg.n_train} train / {cfg.n_test} test, width {cfg.width}, depth "
                           f"{cfg.depth}, {cfg.steps} steps")),
    )
    return analysis, description
