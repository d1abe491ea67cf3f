"""Your own training run, end to end: from checkpoints to every answer, in one typed result.

`analyse_run` takes a model's checkpoints (an orbax ``CheckpointManager`` directory with the linen
module or nnx model they were saved from, or ``(step, Net)`` pairs), the training inputs and
targets, and optionally test inputs and targets. It computes each kernel in the mode its answer
needs, so nobody wires modes by hand:

- the **trace kernel** ``Σ_a Θ_aa`` (N, N) on the training set at every checkpoint: drift
  (distance ``1 − cos(K_t, K_0)`` and relative change ``‖K_t − K_0‖_F/‖K_0‖_F``), centered
  kernel-target alignment (Cortes, Mohri & Rostamizadeh, JMLR 13, 2012), spectrum, and the
  laziness verdict (`ntkcalc.laziness`, through `ntkcalc.drift`);
- the trace kernel **per parameter group** (`ntk_by_layer`) at the first and last checkpoint:
  which layer groups moved;
- the numerical rank of the readout's features at every checkpoint (`feature_rank`): the
  interpolation check;
- at each checkpoint chosen in ``forecast_from`` (default the first and the last): the **full
  kernel** (N, N, O, O) on train and test-vs-train (or, above `FULL_KERNEL_ROWS` rows N·O, the
  per-output kernel ``trace / O`` with its assumption ``Θ = K ⊗ I_O`` recorded), the outputs there,
  and the forecast of gradient descent on the model linearized around that checkpoint,
  ``f_lin(θ, x) = f(θ_t, x) + J_t(x)(θ − θ_t)`` (Lee et al., NeurIPS 2019, arXiv:1902.06720): "if
  training continued lazily from step t, where does it land?";
- at the same checkpoints, kernel ridge on the trace kernel: leave-one-out, GCV and KARE over a
  ridge grid (`risk`), the test error of kernel ridge at the recommended ridge
  (`RiskEstimates.recommended`: GCV's when GCV and LOO agree, else LOO's) when a test set is
  given.

Past the exact kernel's reach (``kernel="auto"``: the (T, N, N) kernels do not fit the memory
budget, or the planner's time estimate for them exceeds `EXACT_SECONDS`; or ``kernel="sketch"``)
the answers come from sketched NTK features (`ntk_features`, trace, one seed for every
checkpoint), each with its jackknife error bar (`SketchedAnswers`): drift as the kernel distance
and the relative change to the first checkpoint (`features_distance`,
`features_relative_change`; the laziness verdict reads both, as on the exact path), alignment
(`features_alignment`), top eigenvalues (`features_spectrum`), kernel ridge with GCV and its test
error (`features_ridge`). Answers that need the exact kernel — forecasts, the per-group kernels —
are not computed then, and the result's cautions say so; ``kinds`` and ``kernel`` say which path
was taken and why.

Errors are in one convention: MSE, the mean over examples and outputs of ``(f − y)²``.
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
import os
import warnings
from collections.abc import Sequence
from typing import get_args

import jax
import numpy as np

from .._adapters.net import Net
from .._analysis import _checks
from .._analysis._batches import batch_slices, pad_rows
from .._analysis._result import Result, save_record
from .._analysis.alignment import alignment
from .._analysis.expressivity import FeatureRank, feature_rank
from .._analysis.forecast import Forecast, Loss, forecast, gap_scale
from .._analysis.laziness import Laziness, laziness, output_gap
from .._analysis.laziness import relative_change as _relative_change
from .._analysis.ridge import ridge_fit
from .._analysis.risk import RiskEstimates, risk
from .._analysis.spectrum import Spectrum, spectrum
from .._engine.options import check_choice
from .._kernel import ntk, ntk_by_layer
from .._kind import KernelArray, per_output_kernel
from .._sketch.analysis import (
    Uncertain,
    features_alignment,
    features_changes,
    features_ridge,
    features_spectrum,
    features_trace,
)
from .._sketch.features import ntk_features
from . import plots
from .choice import EXACT_SECONDS, KernelChoice, KernelPath, choose_kernel
from .drift import DEFAULT_THRESHOLD, MOVED_NOTE, Drift, _from_directory, drift

#: Above this many (example, output) rows N·O the forecast uses the per-output kernel ``trace / O``
#: instead of the full (N, N, O, O) kernel. The forecast eigendecomposes the (N·O, N·O) matrix
#: (4096 rows: 128 MiB in float64), a cost growing as (N·O)³: measured 2400 rows in 38 s with
#: scipy's eigh on two CPU cores shared with other work (load 10). Our choice: it keeps the demo's
#: 600 examples × 4 outputs exact.
FULL_KERNEL_ROWS = 4096

#: Ridge grid of the risk estimates: ``mean(diag K) · 10^p`` for p in [RIDGE_DECADES] (our choice,
#: as in the demo: from near interpolation to far above the kernel's scale).
RIDGE_DECADES = (-6.0, 2.0)

#: Examples per forward pass when the workflow evaluates the network (the last batch padded, so
#: each batch shape compiles once).
OUTPUT_BATCH = 1024

#: Features per example of the sketched path (docs/sketch.md: relative error of a top
#: eigenvalue ≈ √(c/k), c ≈ 2-8, measured there).
FEATURES_K = 2048
#: Top eigenvalues reported by the sketched path.
SKETCH_TOP = 10
#: Ridge grid of the sketched path: from ``tr K̂ / N · 10^p₀`` to ``tr K̂ / N · 10^p₁`` (our
#: choice), never below ``tr K̂ / k`` when N > k: below that the sketch's bias dominates
#: (docs/sketch.md).
SKETCH_RIDGE_DECADES = (-2.0, 1.0)

SKETCH_REFUSED = (
    "{what} not computed: {why} It needs the exact kernel, which was not computed ({reason}); "
    "rerun with kernel='exact' on a subset of the examples (x_train[:n]) for it."
)

#: A sketched verdict failed on the kernel's change, without the yardsticks that can excuse it.
SKETCH_KERNEL_ONLY_NOTE = (
    "Not lazy on the kernel's change alone: the sketched path measures neither how much the kernel "
    "differs between independent initializations (`inits`) nor whether the outputs follow the "
    "linearized forecast (`lr`), either of which can show a change this size to be ordinary (the "
    "exact path's verdict weighs both); rerun with kernel='exact' on a subset of the examples "
    "(x_train[:n]), with `inits` and `lr`, to decide.")

PER_OUTPUT_NOTE = (
    "The forecast from step {step} uses the per-output kernel trace / {o} (assuming Θ = K ⊗ I_{o}, "
    "no cross-output terms) because the full kernel has N·O = {rows} rows, above {limit}; pass "
    "full_kernel_rows={rows} for the exact forecast."
)
FLOAT32_NOTE = (
    "Kernels are float32 (about 7 significant digits): small eigenvalues, the numerical rank and "
    "leave-one-out estimates near interpolation are at rounding level. Enable JAX x64 for float64."
)
GAP_NOTE = (
    "Not lazy: the run's training outputs depart from the forecast of the model linearized at "
    "step {step} by up to {gap:.1%} of the initial residual (threshold {tol:.0%}), so the "
    "forecasts describe the linearized model, not this network."
)
NOT_GD_NOTE = (
    "The forecasts are of full-batch gradient descent on L = (1/N) Σ_i ½‖f(x_i) − y_i‖² with "
    "lr={lr:g}; they were not compared with the checkpoints (full_batch_gd=False), so the laziness "
    "verdict rests on the kernel alone."
)


class _Cautions:
    """Collects the RuntimeWarnings of the analysis: each becomes a caution of the result."""

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


@dataclasses.dataclass(frozen=True, repr=False)
class GroupChange(Result):
    """How one parameter group's kernel moved between the first and last checkpoint.

    Fields:
        group: the group's name (top-level parameter path, as `ntk_by_layer` names it).
        relative_change: ``‖K_g,T − K_g,0‖_F / ‖K_g,0‖_F`` of the group's trace kernel.
        share_first, share_last: the group's share of the kernel's trace, ``tr K_g / tr K``, at
            the first and last checkpoint.
        moved: ``relative_change`` above the laziness threshold.
    """

    group: str
    relative_change: float
    share_first: float
    share_last: float
    moved: bool


@dataclasses.dataclass(frozen=True, repr=False)
class CheckpointAnswers(Result):
    """The answers that need a kernel at one checkpoint: forecast, risk, spectrum.

    Fields:
        step: the training step of the checkpoint.
        kernel: which kernel the forecast used: ``"full"`` (exact (N, N, O, O)) or the
            per-output kernel with its assumption (``Forecast.kernel``).
        kernel_dtype: the dtype the kernels were computed in.
        forecast: the linearized model around this checkpoint trained by gradient descent for
            ``forecast.steps`` more steps (None without ``lr``).
        train_mse, test_mse: (T,) forecast MSE on train and test (test None without a test set);
            None without ``lr``.
        gap: (S,) the gap ``‖f_obs − f_lin‖_F / ‖f_t − y‖_F`` on the training outputs at the
            steps ``gap_steps`` after this checkpoint (the later checkpoints, or the recorded
            outputs when given; `laziness.output_gap`), when the run was full-batch gradient
            descent with ``lr`` (``full_batch_gd``); else None.
        test_gap: (S,) the same on the test outputs (scale ``‖f_t(test) − y_test‖_F``), when
            recorded test outputs were given; else None.
        gap_steps: (S,) the training steps of ``gap``, or None.
        observed_train_mse, observed_test_mse: (S,) MSE of the run itself at ``gap_steps``
            (test: with recorded test outputs), or None.
        observed_train_accuracy, observed_test_accuracy: (S,) accuracy of the run itself at
            ``gap_steps`` for classification targets, or None.
        spectrum: `Spectrum` of the trace kernel on the training set.
        alignment: centered kernel-target alignment of the trace kernel.
        risk: `RiskEstimates` of kernel ridge on the trace kernel (ridges on its axis).
        ridge: the recommended ridge, ``risk.recommended``: GCV's when GCV and leave-one-out
            agree, else LOO's (``risk.recommended_by`` says which).
        loo, gcv: the LOO and GCV estimates at that ridge (MSE).
        test_mse_ridge: MSE of kernel ridge at ``ridge`` on the test set, or None.
        test_accuracy_ridge: its accuracy for classification targets, or None.
        test_mse_by_ridge: (R,) MSE of kernel ridge on the test set at every ridge of
            ``risk.ridges``, or None without a test set.
        test_accuracy_by_ridge: (R,) its accuracy at every ridge for classification targets,
            or None.
    """

    step: int
    kernel: str
    kernel_dtype: str
    forecast: Forecast | None
    train_mse: np.ndarray | None
    test_mse: np.ndarray | None
    gap: np.ndarray | None
    test_gap: np.ndarray | None
    gap_steps: np.ndarray | None
    observed_train_mse: np.ndarray | None
    observed_test_mse: np.ndarray | None
    observed_train_accuracy: np.ndarray | None
    observed_test_accuracy: np.ndarray | None
    spectrum: Spectrum
    alignment: float
    risk: RiskEstimates
    ridge: float
    loo: float
    gcv: float
    test_mse_ridge: float | None
    test_accuracy_ridge: float | None
    test_mse_by_ridge: np.ndarray | None
    test_accuracy_by_ridge: np.ndarray | None


@dataclasses.dataclass(frozen=True, repr=False)
class SketchedCheckpoint(Result):
    """The answers from sketched features at one checkpoint of ``forecast_from``.

    Fields:
        step: the training step.
        eigenvalues: `Uncertain` top eigenvalues of the train trace kernel (descending; a sketch
            pushes them up by about tr K / k: read ``.corrected``, `features_spectrum`).
        ridges: (R,) the ridge grid (`SKETCH_RIDGE_DECADES` times ``tr K̂ / N``).
        gcv: (R,) GCV estimates of kernel ridge at each ridge (their values).
        ridge: the ridge with the smallest GCV.
        fit: `FeatureRidge` at ``ridge`` (train MSE, GCV, LOO, test MSE with error bars).
    """

    step: int
    eigenvalues: Uncertain
    ridges: np.ndarray
    gcv: np.ndarray
    ridge: float
    fit: object


@dataclasses.dataclass(frozen=True, repr=False)
class SketchedAnswers(Result):
    """What `analyse_run` answered from sketched NTK features instead of exact kernels.

    Fields:
        k, seed: features per example and the projections' seed, shared by every checkpoint
            (so the distance between checkpoints is the kernels', not two sketches').
        distance: (T,) `Uncertain` kernel distance ``1 − cos(K_t, K_0)`` to the first checkpoint
            (`features_distance`; None at the first). Near 0 its jackknife bias can exceed its
            error bar (docs/sketch.md): read ``.corrected``, as the verdict and the report do.
        relative_change: (T,) `Uncertain` relative change ``‖K_t − K_0‖_F / ‖K_0‖_F`` to the
            first checkpoint (`features_relative_change`; None at the first), read the same way.
        alignment: (T,) `Uncertain` centered kernel-target alignment per checkpoint.
        checkpoints: `SketchedCheckpoint` at each step of ``forecast_from``.
        refused: the answers that need the exact kernel, each with the reason (also cautions).
        store: the directory of the features stores (`analyse_run`'s ``store``), or None when
            the features were held in memory.
        computed, reused: blocks of features computed in this call and found complete in the
            stores (a resumed run reuses what an interrupted one finished).
    """

    k: int
    seed: int
    distance: tuple
    relative_change: tuple
    alignment: tuple
    checkpoints: tuple[SketchedCheckpoint, ...]
    refused: tuple[str, ...]
    store: str | None = None
    computed: int = 0
    reused: int = 0

    def to_dict(self) -> dict:
        """Every number as plain values: each estimate as value, error, bias and corrected
        (value − bias)."""
        return _plain({
            "k": self.k, "seed": self.seed, "store": self.store, "computed": self.computed,
            "reused": self.reused,
            "distance": [None if d is None else _uncertain(d) for d in self.distance],
            "relative_change": [None if d is None else _uncertain(d)
                                for d in self.relative_change],
            "alignment": [_uncertain(a) for a in self.alignment],
            "checkpoints": [{
                "step": c.step, "eigenvalues": _uncertain(c.eigenvalues),
                "ridges": c.ridges, "gcv": c.gcv, "ridge": c.ridge,
                "train_mse": _uncertain(c.fit.train_mse), "gcv_at_ridge": _uncertain(c.fit.gcv),
                "loo_at_ridge": c.fit.loo,
                "test_mse": None if c.fit.test_mse is None else _uncertain(c.fit.test_mse),
            } for c in self.checkpoints],
            "refused": list(self.refused),
        })


def _uncertain(u: Uncertain) -> dict:
    return {"value": u.value, "error": u.error, "bias": u.bias, "corrected": u.corrected,
            "groups": u.groups}


@dataclasses.dataclass(frozen=True, repr=False)
class RunAnalysis(Result):
    """Everything `analyse_run` found about one training run.

    Fields:
        steps: (T,) the checkpoints' training steps.
        num_train, num_test: examples in the training and test sets (num_test 0 without one).
        num_outputs: O, the model's outputs.
        num_params: the model's number of parameters.
        parameter_change: ``‖θ_T − θ_0‖ / ‖θ_0‖`` between the first and last checkpoint.
        labels: (N,) the training set's integer classes for classification targets, else None.
        dtype: the dtype of every kernel.
        kinds: answer → the kernel it came from (e.g. ``"drift": "trace (N, N)"``), and
            ``"kernel"``: which path and why.
        drift: `Drift` over the checkpoints (trace kernels on the training set); None when the
            answers came from sketched features (``sketched``).
        laziness: the one laziness verdict (`ntkcalc.laziness`): the kernel criteria of
            ``drift`` and, with ``full_batch_gd``, the forecast gap of the first checkpoint.
        lazy: ``laziness.lazy``; verdict: ``laziness.sentence``.
        groups: per parameter group, how its kernel moved (`GroupChange`).
        feature_ranks: (T,) the interpolation check at each checkpoint (`FeatureRank`), or None
            at a checkpoint where it could not be computed (the reason is in ``cautions``).
        checkpoints: `CheckpointAnswers` at each step of ``forecast_from``.
        cautions: where a number may mislead (non-lazy run, per-output approximation,
            conditioning, precision, estimator disagreement), one sentence each.
        kernel: ``"exact"`` (kernels by `ntk`) or ``"sketch"`` (features by `ntk_features`:
            ``drift`` is None, ``groups`` and ``checkpoints`` are empty, the answers are in
            ``sketched``, the laziness verdict rests on the bias-corrected sketched kernel
            relative change and distance).
        sketched: `SketchedAnswers`, or None on the exact path.
        choice: `KernelChoice`: which path and the numbers it was chosen by (memory, the
            planner's estimates, the limit); ``choice.reason`` is the sentence the report prints.
    """

    steps: np.ndarray
    num_train: int
    num_test: int
    num_outputs: int
    num_params: int
    parameter_change: float
    labels: np.ndarray | None
    dtype: str
    kinds: dict
    drift: Drift | None
    laziness: Laziness
    lazy: bool
    verdict: str
    groups: tuple[GroupChange, ...]
    feature_ranks: tuple[FeatureRank | None, ...]
    checkpoints: tuple[CheckpointAnswers, ...]
    cautions: tuple[str, ...]
    kernel: str = "exact"
    sketched: SketchedAnswers | None = None
    choice: KernelChoice | None = None

    def to_dict(self) -> dict:
        """Every number as plain Python values (NaN and inf → None); what `to_json` writes."""
        d = self.drift
        return _plain({
            "kernel": self.kernel,
            "choice": None if self.choice is None else self.choice.to_dict(),
            "sketched": None if self.sketched is None else self.sketched.to_dict(),
            "steps": self.steps, "num_train": self.num_train, "num_test": self.num_test,
            "num_outputs": self.num_outputs, "num_params": self.num_params,
            "parameter_change": self.parameter_change, "labels": self.labels, "dtype": self.dtype,
            "kinds": self.kinds,
            "lazy": self.lazy, "verdict": self.verdict, "laziness": self.laziness.to_dict(),
            "drift": None if d is None else {"table": d.to_dict(), "threshold": d.threshold,
                                             "notes": list(d.notes)},
            "groups": [dataclasses.asdict(g) for g in self.groups],
            "feature_rank": [None if r is None else _rank_numbers(r) for r in self.feature_ranks],
            "checkpoints": [_answers_numbers(a) for a in self.checkpoints],
            "cautions": list(self.cautions),
        })

    def to_json(self, *, indent: int | None = None) -> str:
        """`to_dict` as JSON."""
        return json.dumps(self.to_dict(), indent=indent, ensure_ascii=False, allow_nan=False)

    def plot(self):
        """An overview: kernel change with the threshold, alignment, forecast MSE from each chosen
        checkpoint, and the spectra; returns a matplotlib Figure (no pyplot, any backend)."""
        from matplotlib.figure import Figure

        if self.sketched is not None:
            return self._plot_sketched(Figure(figsize=(12.0, 3.8), layout="constrained"))
        fig = Figure(figsize=(10.0, 7.0), layout="constrained")
        change, align, fc, spec = fig.subplots(2, 2).ravel()
        d = self.drift
        change.plot(d.steps, d.relative_change, "o-", color=plots.OBSERVED,
                    label="relative change ‖K_t − K_0‖/‖K_0‖")
        change.plot(d.steps, d.distance_to_initial, "s--", color=plots.ESTIMATE,
                    label="distance 1 − cos(K_t, K_0)")
        change.axhline(d.threshold, color=plots.REFERENCE, ls=":",
                       label=f"threshold {d.threshold:.0%}")
        change.set(xlabel="training step", ylabel="kernel change",
                   title=self.laziness.outcome)
        change.legend(fontsize="small", frameon=False, loc="center right")
        align.plot(d.steps, d.alignment, "o-", color=plots.THIRD)
        align.set(xlabel="training step", ylabel="centered alignment A(K_t, YYᵀ)",
                  title="Kernel-label alignment")
        for a in self.checkpoints:
            if a.forecast is None:
                continue
            t = a.step + a.forecast.steps
            (line,) = fc.plot(t, a.train_mse, "-", label=f"train, from step {a.step}")
            if a.test_mse is not None:
                fc.plot(t, a.test_mse, "--", color=line.get_color(),
                        label=f"test, from step {a.step}")
        fc.set_yscale("log")
        fc.set(xlabel="training step", ylabel=plots.axis_label(plots.MSE_LABEL),
               title="Lazy forecast from each chosen checkpoint")
        fc.legend(fontsize="small", frameon=False)
        for a in self.checkpoints:
            w = a.spectrum.eigenvalues
            w = w[w > 0]
            spec.loglog(np.arange(1, w.size + 1), w, ".", markersize=3, label=f"step {a.step}")
        spec.set(xlabel="rank i", ylabel="eigenvalue λ_i", title="Trace kernel spectrum")
        spec.legend(fontsize="small", frameon=False)
        return fig

    def _plot_sketched(self, fig):
        """The sketched answers with their error bars (± one jackknife standard error)."""
        sk = self.sketched
        change, align, spec = fig.subplots(1, 3)
        for ests, fmt, color, label in (
                (sk.relative_change, "o-", plots.OBSERVED, "relative change ‖K_t − K_0‖/‖K_0‖"),
                (sk.distance, "s--", plots.ESTIMATE, "distance 1 − cos(K_t, K_0)")):
            later = [(s, d) for s, d in zip(self.steps, ests, strict=True) if d is not None]
            change.errorbar([s for s, _ in later], [d.corrected for _, d in later],
                            yerr=[d.error for _, d in later], fmt=fmt, color=color,
                            label=f"{label}, bias-corrected")
        change.axhline(self.laziness.kernel_threshold, color=plots.REFERENCE, ls=":",
                       label=f"threshold {self.laziness.kernel_threshold:.0%}")
        change.set(xlabel="training step", ylabel="kernel change (sketched)",
                   title=self.laziness.outcome)
        change.legend(fontsize="small", frameon=False)
        align.errorbar(self.steps, [a.value for a in sk.alignment],
                       yerr=[a.error for a in sk.alignment], fmt="o-", color=plots.THIRD)
        align.set(xlabel="training step", ylabel="centered alignment A(K_t, YYᵀ)",
                  title="Kernel-label alignment (sketched)")
        for c in sk.checkpoints:
            w = np.asarray(c.eigenvalues.corrected)
            spec.errorbar(np.arange(1, w.size + 1), w, yerr=c.eigenvalues.error, fmt=".",
                          label=f"step {c.step}")
        spec.set(xscale="log", yscale="log", xlabel="rank i", ylabel="eigenvalue λ_i",
                 title=f"Top of the trace kernel spectrum (k = {sk.k})")
        spec.legend(fontsize="small", frameon=False)
        return fig

    def write(self, directory, *, description=None) -> tuple[str, str]:
        """Write ``result.json`` (`to_json`, every field) and the report (`write_report`:
        ``report.html``, self-contained with its figures as base64 PNG, and ``report.json``, every
        number it shows) into ``directory`` (created), with ``result.npz``, the result and
        ``description`` as they are (arrays included), for `read` and ``write_report(directory)``.

        Args:
            directory: where the files go.
            description: a `RunDescription` of the data, model and training (what the numbers
                cannot say), or None.

        Returns:
            ``(html_path, json_path)``: ``report.html`` and ``report.json``, as `write_report`
            returns them; ``result.json`` is beside them.
        """
        from .report import RECORD, RESULT, write_report  # the report renders this result

        html_path, json_path = write_report(self, out=directory, description=description)
        with open(os.path.join(os.path.dirname(html_path), RESULT), "w", encoding="utf-8") as fh:
            fh.write(self.to_json(indent=1))
        save_record({"analysis": self, "description": description},
                    os.path.join(os.path.dirname(html_path), RECORD))
        return html_path, json_path

    # -- reading back (`write` saved it) ---------------------------------------------------
    @classmethod
    def read(cls, directory) -> RunAnalysis:
        """The `RunAnalysis` that `write` saved in ``directory``, every field as it was (from its
        ``result.npz``; ``result.json`` holds the same numbers for people and other programs)."""
        from .report import read_run

        return read_run(directory)[0]


# -- the workflow ---------------------------------------------------------------------------------
def analyse_run(
    source,
    x_train,
    y_train,
    *,
    module=None,
    example=None,
    variables=None,
    item: str | None = None,
    subtree: str | None = None,
    steps: Sequence[int] | None = None,
    x_test=None,
    y_test=None,
    lr: float | None = None,
    horizon: int | None = None,
    forecast_from: Sequence[int] | None = None,
    loss: Loss = "mse",
    full_batch_gd: bool = False,
    recorded_steps=None,
    recorded_train=None,
    recorded_test=None,
    inits: Sequence[Net] | None = None,
    layer: str | None = None,
    threshold: float = DEFAULT_THRESHOLD,
    ridges: int = 25,
    full_kernel_rows: int = FULL_KERNEL_ROWS,
    kernel: KernelPath = "auto",
    features: int = FEATURES_K,
    memory=None,
    store=None,
    exact_seconds: float = EXACT_SECONDS,
    progress: bool = False,
) -> RunAnalysis:
    """From a training run's checkpoints to drift, laziness, forecasts, test error, interpolation
    check, spectrum and alignment (the module docstring lists which kernel serves which answer).

    Args:
        source: an orbax ``CheckpointManager`` directory (then ``module``, and for linen
            ``example`` or ``variables``, ``item``, ``subtree`` as in `load_checkpoint`), or a
            sequence of at least two ``(step, Net)`` pairs in training order.
        x_train: (N, ...) training inputs (or the subset to analyse).
        y_train: (N,) integer class labels (read as one-hot rows, the label convention), (N, O)
            one-hot rows or (N,)/(N, O) real targets.
        module: for a checkpoint directory: the flax linen module or nnx model the checkpoints
            were saved from, or a function of no arguments that returns it (a factory).
        example, variables, item, subtree: for a checkpoint directory, as in `load_checkpoint`;
            a linen module without ``example`` or ``variables`` is shaped by ``x_train[:1]``.
        steps: for a directory, the saved steps to use (default all).
        x_test, y_test: optional test inputs and targets (same formats), for the forecast's test
            curve and the test error of kernel ridge.
        lr: the learning rate of the forecasts; None skips them (risk, drift and the rest are
            still computed).
        horizon: how many steps each forecast runs past its checkpoint (default: the run's
            length, last step − first step, at least 1).
        forecast_from: the checkpoint steps to forecast from and compute risk at (default the
            first and the last).
        loss: the forecast's loss, ``"mse"`` or ``"cross-entropy"`` (`forecast`).
        full_batch_gd: the run *was* full-batch gradient descent on that loss with ``lr`` (as
            `forecast` defines it). Then each forecast is compared with the later checkpoints'
            outputs, and the gap of the forecast from the first checkpoint enters the laziness
            verdict. Leave False for minibatch or adaptive optimizers: the gap would measure the
            optimizer, not laziness.
        recorded_steps, recorded_train, recorded_test: the run's own outputs recorded while
            training (with ``full_batch_gd``): (S,) increasing steps, (S, N, O) outputs on
            ``x_train`` and optionally (S, M, O) on ``x_test``. The forecasts are compared with
            these at every recorded step instead of at the checkpoints alone.
        inits: Nets of the same architecture at independent initializations: the init-spread
            yardstick of the verdict (`drift`).
        layer: the features of the interpolation check (`feature_rank`'s ``layer``; default its
            own, the readout's input).
        threshold: the laziness threshold on the kernel's change (default 5%).
        ridges: number of ridges in the risk grid (log-spaced over `RIDGE_DECADES` times the
            kernel's mean diagonal).
        full_kernel_rows: the largest N·O for which forecasts use the exact full kernel.
        kernel: ``"exact"`` (kernels by `ntk`), ``"sketch"`` (sketched features, every answer
            with an error bar; forecasts and per-group kernels are not computed, and the cautions
            say so) or ``"auto"``: the sketch when the T exact (N, N) trace kernels do not fit
            ``memory``, or when the planner estimates the exact kernels at more than
            ``exact_seconds``. ``result.kernel`` and ``result.kinds["kernel"]`` say which was
            used and why.
        features: features per example on the sketched path (`ntk_features`' k).
        memory: the memory budget (bytes or e.g. ``"8GB"``; default half the memory available
            now) of the choice and of the features: without ``store`` it holds every
            checkpoint's features, with ``store`` only the projections and one block of them
            (`ntk_features`' ``memory``).
        store: a directory for the sketched path's features (created): each checkpoint's
            training features go to a resumable zarr store ``<store>/step-<S>-train.zarr`` (and
            the test features at each step of ``forecast_from`` to ``step-<S>-test.zarr``), one
            seed for all, and the answers read them from disk in chunks. Calling again with the
            same arguments after an interruption computes only the blocks not yet finished
            (``result.sketched.computed`` and ``.reused`` count them). None: features in memory.
            Kernels of the exact path are held in memory either way.
        exact_seconds: the time limit of ``kernel="auto"`` for the exact path.
        progress: progress bars of the kernel computations.

    Returns:
        `RunAnalysis`; ``write(directory)`` gives the JSON and HTML report.
    """
    x = _checks.examples("x_train", x_train)
    if lr is not None:
        lr = _checks.positive("lr", lr)
    if horizon is not None:
        horizon = _checks.positive_int("horizon", horizon)
    full_kernel_rows = _checks.positive_int("full_kernel_rows", full_kernel_rows)
    ridges = _checks.positive_int("ridges", ridges)
    check_choice("loss", loss, get_args(Loss))
    if not isinstance(full_batch_gd, bool):
        raise TypeError(f"`full_batch_gd` must be True or False, got {full_batch_gd!r}.")
    if full_batch_gd and lr is None:
        raise ValueError("`full_batch_gd=True` compares the forecast with the run: pass its `lr`.")
    if (x_test is None) != (y_test is None):
        raise ValueError("`x_test` and `y_test` go together: pass both or neither.")
    check_choice("kernel", kernel, get_args(KernelPath))
    features = _checks.positive_int("features", features)
    exact_seconds = _checks.positive("exact_seconds", exact_seconds)
    if store is not None and not isinstance(store, str | os.PathLike):
        raise TypeError(f"`store` must be a directory path (str or os.PathLike) for the features "
                        f"stores, got {type(store).__name__}.")
    if store is not None and kernel == "exact":
        raise ValueError("`store` holds sketched features, and `kernel`='exact' computes none: "
                         "leave out `store`, or pass kernel='auto' or 'sketch'.")
    step_arr, nets = _checkpoints(source, steps, dict(module=module, example=example,
                                                      variables=variables, item=item,
                                                      subtree=subtree), x)
    chosen = _forecast_steps(forecast_from, step_arr)
    xt = None if x_test is None else _checks.examples("x_test", x_test)

    run = jax.jit(nets[0].call)  # every Net shares the first one's call (`Net.replace`)
    outputs = [_outputs(run, net, x) for net in nets]
    n, o = outputs[0].shape[0], int(np.prod(outputs[0].shape[1:], dtype=np.int64))
    outputs = [f.reshape(n, o) for f in outputs]
    bad = [int(s) for s, f in zip(step_arr, outputs, strict=True) if not np.all(np.isfinite(f))]
    if bad:
        raise ValueError(
            f"The model's outputs on `x_train` are not finite at steps {bad}: the run diverged "
            "there (or the checkpoints are damaged). Pass the steps before it (`steps=` for a "
            "directory); no kernel of a diverged network describes training."
        )
    y = _checks.targets("y_train", y_train, n=n, kname="x_train", kshape=x.shape, num_classes=o)
    _checks.same_outputs("y_train", y, want=o, ref="the model's outputs")
    yt = labels_t = None
    if xt is not None:
        yt = _checks.targets("y_test", y_test, n=xt.shape[0], kname="x_test", kshape=xt.shape,
                             num_classes=o)
        _checks.same_outputs("y_test", yt, want=o, ref="the model's outputs")
        labels_t = _class_labels(y_test, yt)
    labels = _class_labels(y_train, y)
    record = _recorded(recorded_steps, recorded_train, recorded_test, full_batch_gd=full_batch_gd,
                       n=n, o=o, m=None if xt is None else xt.shape[0])
    if record is None and full_batch_gd:  # the checkpoints are the recorded outputs
        record = (step_arr, np.stack(outputs), None)
    options = {"progress": progress}
    cautions = _Cautions()
    choice = choose_kernel(kernel, nets, x, xt, k=features, memory=memory, limit=exact_seconds,
                           answers=len(chosen), forecasts=lr is not None, o=o,
                           to_store=store is not None)
    if choice.path == "sketch":
        return _sketched_run(nets, step_arr, x, y, xt, yt, chosen, labels=labels, k=features,
                             memory=memory, store=store, choice=choice, lr=lr, inits=inits,
                             layer=layer, threshold=threshold, progress=progress,
                             cautions=cautions)
    with cautions.watch():
        dr = drift(nets, x, y, steps=step_arr.tolist(), inits=inits, threshold=threshold,
                   **options)
        groups = _groups(nets[0], nets[-1], x, threshold=threshold, options=options)
    dtype = str(dr.kernels.dtype)
    ranks = tuple(_feature_rank(net, x, layer, step, cautions)
                  for net, step in zip(nets, step_arr, strict=True))
    span = max(int(step_arr[-1] - step_arr[0]), 1) if horizon is None else horizon
    answers = []
    for s in chosen:
        i = int(np.flatnonzero(step_arr == s)[0])
        with cautions.watch():
            answers.append(_answers(
                nets[i], int(s), x, y, xt, yt, labels, labels_t, kernel=dr.kernels[i],
                f=outputs[i],
                ft=None if xt is None else _outputs(run, nets[i], xt),
                lr=lr, loss=loss,
                horizon=span, ridges=ridges, full_rows=full_kernel_rows, options=options,
                record=record, cautions=cautions))
    verdict = dr.laziness
    first = answers[0] if answers and answers[0].step == step_arr[0] else None
    if first is not None and first.gap is not None:
        verdict = laziness(relative_change=dr.relative_change, distance=dr.distance_to_initial,
                           steps=dr.steps, forecast_gap=first.gap, gap_steps=first.gap_steps,
                           spread=dr.laziness.spread, kernel_threshold=threshold,
                           kind=dr.laziness.kind, precision=dr.laziness.precision)
    # the drift's own note on a moved kernel is its verdict without the forecast gap: kept only
    # when the one verdict agrees
    notes = [c for c in dr.notes if c != MOVED_NOTE or not verdict.lazy]
    if "forecast_gap" in verdict.failed:
        notes.append(GAP_NOTE.format(step=first.step, gap=verdict.forecast_gap,
                                     tol=verdict.gap_threshold))
    if dtype == "float32":
        notes.append(FLOAT32_NOTE)
    if lr is not None and not full_batch_gd:
        notes.append(NOT_GD_NOTE.format(lr=lr))
    kinds = {
        "kernel": f"exact: {choice.reason}",
        "drift, alignment, spectrum, risk, groups": f"trace (N, N) = ({n}, {n})",
        "test error of kernel ridge": "trace, test × train" if xt is not None else "none",
        "forecast": ", ".join(sorted({a.kernel for a in answers})) if lr is not None else "none",
        "feature rank": _rank_kind(layer),
        "dtype": dtype,
    }
    return RunAnalysis(
        **_common_fields(nets, step_arr, n, xt, o, labels, dtype), kinds=kinds, drift=dr,
        laziness=verdict, lazy=verdict.lazy,
        verdict=verdict.sentence, groups=groups, feature_ranks=ranks, checkpoints=tuple(answers),
        cautions=tuple(dict.fromkeys(notes + cautions.items)), choice=choice,
    )


# -- pieces ---------------------------------------------------------------------------------------
def _common_fields(nets, step_arr, n: int, xt, o: int, labels, dtype: str) -> dict:
    """The fields of a `RunAnalysis` that both paths fill alike."""
    return dict(steps=step_arr, num_train=n, num_test=0 if xt is None else int(xt.shape[0]),
                num_outputs=o, num_params=nets[0].num_params,
                parameter_change=_parameter_change(nets[0], nets[-1]), labels=labels,
                dtype=dtype)


def _rank_kind(layer) -> str:
    return ("features of the readout's input (no kernel)" if layer is None
            else f"features of {layer!r} (no kernel)")


def _sketched_run(nets, step_arr, x, y, xt, yt, chosen, *, labels, k, memory, store, choice,
                  lr, inits, layer, threshold, progress, cautions) -> RunAnalysis:
    """The workflow on sketched features (`SketchedAnswers`); the exact-only answers refused.
    With ``store`` the features go to stores under it (`_feature_stores`) and are read back in
    chunks by the analyses."""
    n, o = y.shape
    reason = choice.reason
    stores = _feature_stores(store, step_arr, chosen)
    opts = dict(k=k, seed=0, memory=memory, progress=progress)
    feats = [ntk_features(net, x, store=stores.get((int(s), "train")), **opts)
             for net, s in zip(nets, step_arr, strict=True)]
    refused = []
    if lr is not None:
        refused.append(SKETCH_REFUSED.format(
            what="Forecasts", why="they run gradient descent on the exact (N·O, N·O) kernel's "
            "eigendecomposition, which features only estimate to within their noise.",
            reason=reason))
    refused.append(SKETCH_REFUSED.format(
        what="Per-group kernel change", why="it needs each parameter group's own kernel.",
        reason=reason))
    if inits is not None:
        refused.append(SKETCH_REFUSED.format(
            what="The init-spread yardstick (`inits`)", why="it compares exact kernels of "
            "independent initializations.", reason=reason))
    with cautions.watch():
        pairs = [None] + [features_changes(f, feats[0]) for f in feats[1:]]
        distance = tuple(None if p is None else p[0] for p in pairs)
        change = tuple(None if p is None else p[1] for p in pairs)
        align = tuple(features_alignment(f, y) for f in feats)
        answers, tests = [], []
        for s in chosen:
            i = int(np.flatnonzero(step_arr == s)[0])
            f = feats[i]
            eig, _ = features_spectrum(f, top=min(SKETCH_TOP, k))
            ft = None
            if xt is not None:
                ft = ntk_features(nets[i], xt, store=stores.get((int(s), "test")), **opts)
                tests.append(ft)
            trace = features_trace(f)
            low = max(10 ** SKETCH_RIDGE_DECADES[0] * trace / n, trace / k if n > k else 0.0)
            grid = np.geomspace(low, 10 ** SKETCH_RIDGE_DECADES[1] * trace / n, 7)
            fits = [features_ridge(f, y, ridge=r, test_features=ft, y_test=yt) for r in grid]
            gcv = np.asarray([fit.gcv.value for fit in fits])
            j = int(np.argmin(gcv))
            answers.append(SketchedCheckpoint(step=int(s), eigenvalues=eig, ridges=grid, gcv=gcv,
                                              ridge=float(grid[j]), fit=fits[j]))
    # the verdict on both kernel criteria, bias-corrected (ratios of sketched norms are biased,
    # near 0 by more than their error bars) with their error bars, as estimated (below 0 too):
    # within its error bars of the threshold a criterion is "not resolved" (`laziness`)
    verdict = laziness(**_sketched_criteria(distance=distance, relative_change=change),
                       steps=step_arr, kernel_threshold=threshold)
    sketched = SketchedAnswers(
        k=k, seed=0, distance=distance, relative_change=change, alignment=align,
        checkpoints=tuple(answers),
        refused=tuple(refused), store=None if store is None else os.path.abspath(store),
        computed=sum(f.computed for f in feats + tests),
        reused=sum(f.reused for f in feats + tests))
    dtype = feats[0].dtype
    ranks = tuple(_feature_rank(net, x, layer, step, cautions)
                  for net, step in zip(nets, step_arr, strict=True))
    notes = [f"Sketched features (k = {k}) instead of exact kernels: {reason}. Every number is "
             f"an estimate with a jackknife error bar; the laziness verdict rests on the "
             f"bias-corrected sketched relative change and distance with their error bars, and "
             f"is \"not resolved\" where neither failed and one lies within {verdict.bars:g} "
             f"error bars of the threshold.",
             *refused]
    if verdict.failed:
        notes.append(SKETCH_KERNEL_ONLY_NOTE)
    if dtype == "float32":
        notes.append(FLOAT32_NOTE)
    kinds = {
        "kernel": f"sketch: {reason}",
        "drift, alignment, spectrum, risk": f"sketched trace features ({n}, {k}), seed 0, "
        "jackknife error bars",
        "test error of kernel ridge": "sketched features, test × train" if xt is not None
        else "none",
        "forecast": "not computed (needs the exact kernel)" if lr is not None else "none",
        "groups": "not computed (needs each group's exact kernel)",
        "feature rank": _rank_kind(layer),
        "dtype": dtype,
    }
    return RunAnalysis(
        **_common_fields(nets, step_arr, n, xt, o, labels, dtype), kinds=kinds, drift=None,
        laziness=verdict, lazy=verdict.lazy, verdict=verdict.sentence,
        groups=(), feature_ranks=ranks, checkpoints=(),
        cautions=tuple(dict.fromkeys(notes + cautions.items)), kernel="sketch",
        sketched=sketched, choice=choice)


def _sketched_criteria(**criteria) -> dict:
    """`laziness`'s keywords for the sketched kernel criteria: each (T,) tuple of `Uncertain`
    (None at the first checkpoint, which is 0 exactly) as its bias-corrected values and their
    standard errors."""
    out = {}
    for name, ests in criteria.items():
        out[name] = [0.0] + [float(e.corrected) for e in ests[1:]]
        out[f"{name}_error"] = [0.0] + [float(e.error) for e in ests[1:]]
    return out


def _feature_stores(store, step_arr, chosen) -> dict:
    """``{(step, "train" | "test"): path}`` of the features stores under ``store`` (created;
    empty without one): every checkpoint's training features, the test features at ``chosen``."""
    if store is None:
        return {}
    root = os.fspath(store)
    os.makedirs(root, exist_ok=True)
    paths = {(int(s), "train"): os.path.join(root, f"step-{int(s)}-train.zarr") for s in step_arr}
    paths.update({(int(s), "test"): os.path.join(root, f"step-{int(s)}-test.zarr")
                  for s in chosen})
    return paths


def _checkpoints(source, steps, load: dict, x) -> tuple[np.ndarray, list[Net]]:
    """(steps, Nets) from a checkpoint directory or ``(step, Net)`` pairs.

    For a directory, ``module`` may be a factory (a function of no arguments returning the
    module); a linen module without ``example`` or ``variables`` takes its variables' shapes
    from the first training example.
    """
    if isinstance(source, str | os.PathLike):
        from flax import linen, nnx

        module = load["module"]
        if module is not None and not isinstance(module, linen.Module | nnx.Module):
            if not callable(module):
                raise TypeError(
                    "`module` must be a flax linen module, an nnx model or a function of no "
                    f"arguments returning one, got {type(module).__name__}.")
            load = {**load, "module": module()}
        if isinstance(load["module"], linen.Module) and load["example"] is None and (
                load["variables"] is None):
            load = {**load, "example": x[:1]}
        chosen, nets = _from_directory(source, steps, load)
        return np.asarray(chosen, dtype=np.int64), list(nets)
    if any(v is not None for v in load.values()) or steps is not None:
        raise ValueError(
            "`module`, `example`, `variables`, `item`, `subtree` and `steps` are for a checkpoint "
            "directory; `source` is a sequence of (step, Net) pairs. Leave them out."
        )
    pairs = list(source) if isinstance(source, Sequence) else None
    if pairs is None or len(pairs) < 2 or not all(
            isinstance(p, tuple) and len(p) == 2 and isinstance(p[1], Net) for p in pairs):
        raise TypeError(
            "`source` must be a checkpoint directory or a sequence of at least two (step, Net) "
            f"pairs, got {type(source).__name__}"
            f"{f' of length {len(pairs)}' if pairs is not None else ''}."
        )
    step_arr = np.asarray([p[0] for p in pairs])
    if not np.issubdtype(step_arr.dtype, np.integer) or np.any(np.diff(step_arr) <= 0):
        raise ValueError(
            f"The steps of `source` must be increasing integers, got {step_arr.tolist()[:8]}. "
            "Sort the run by step."
        )
    first = pairs[0][1]
    nets = [first] + [p[1] if p[1].call is not first.call else
                      first.replace(params=p[1].params, state=p[1].state) for p in pairs[1:]]
    return step_arr.astype(np.int64), nets


def _outputs(run, net: Net, x) -> np.ndarray:
    """The network's outputs on ``x`` in batches of `OUTPUT_BATCH` examples."""
    size = min(OUTPUT_BATCH, x.shape[0])
    return np.concatenate([np.asarray(run(net.params, net.state, pad_rows(x[a:b], size)))[:b - a]
                           for a, b in batch_slices(x.shape[0], size)])


def _recorded(steps, train, test, *, full_batch_gd: bool, n: int, o: int, m: int | None):
    """``(steps (S,), train (S, N, O), test (S, M, O) or None)`` validated, or None."""
    if steps is None and train is None and test is None:
        return None
    if not full_batch_gd:
        raise ValueError(
            "Recorded outputs are compared with the forecasts only for a run of full-batch "
            "gradient descent with `lr`: pass full_batch_gd=True (and `lr`), or leave out "
            "`recorded_steps`, `recorded_train` and `recorded_test`.")
    if steps is None or train is None:
        raise ValueError("`recorded_steps` and `recorded_train` go together: pass both.")
    at = np.asarray(steps)
    if at.ndim != 1 or not np.issubdtype(at.dtype, np.integer) or np.any(np.diff(at) <= 0):
        raise ValueError(
            f"`recorded_steps` must be a 1-D increasing array of integers, got {steps!r}.")
    out = []
    for name, arr, rows in (("recorded_train", train, n), ("recorded_test", test, m)):
        if arr is None:
            out.append(None)
            continue
        if rows is None:
            raise ValueError("`recorded_test` needs `x_test` and `y_test`.")
        arr = _checks.finite_array(name, arr)
        if arr.shape[:2] != (at.size, rows) or int(np.prod(arr.shape[2:])) != o:
            raise ValueError(
                f"`{name}` is {arr.shape}; it must be ({at.size}, {rows}, {o}): the outputs at "
                "each of `recorded_steps` on every example.")
        out.append(arr.reshape(at.size, rows, o))
    return at.astype(np.int64), out[0], out[1]


def _forecast_steps(forecast_from, step_arr: np.ndarray) -> np.ndarray:
    if forecast_from is None:
        return np.unique(step_arr[[0, -1]])
    chosen = np.unique(np.asarray(forecast_from))
    if chosen.ndim != 1 or chosen.size == 0 or not np.issubdtype(chosen.dtype, np.integer):
        raise ValueError(
            f"`forecast_from` must be a non-empty sequence of step numbers, got {forecast_from!r}.")
    missing = sorted(set(chosen.tolist()) - set(step_arr.tolist()))
    if missing:
        raise ValueError(
            f"`forecast_from` {missing} are not checkpoints of the run; its steps are "
            f"{step_arr.tolist()}.")
    return chosen


def _class_labels(y_given, onehot: np.ndarray) -> np.ndarray | None:
    """Integer classes of classification targets (labels or one-hot rows), else None."""
    if _checks.is_label_array(y_given):
        return np.asarray(y_given).astype(np.int64)
    one_hot = np.all((onehot == 0) | (onehot == 1)) and np.all(onehot.sum(axis=1) == 1)
    return np.argmax(onehot, axis=1) if onehot.shape[1] > 1 and one_hot else None


def _groups(first: Net, last: Net, x, *, threshold: float, options: dict) -> tuple:
    """`GroupChange` of each top-level parameter group between the first and last Net."""
    before = ntk_by_layer(first, x, outputs="trace", **options)
    after = ntk_by_layer(last, x, outputs="trace", **options)
    tr0 = sum(float(np.trace(k)) for k in before.values())
    tr1 = sum(float(np.trace(k)) for k in after.values())
    out = []
    for name, k0 in before.items():
        k0 = np.asarray(k0)
        if not np.any(k0):  # a group the outputs do not depend on here
            change = 0.0 if not np.any(after[name]) else float("inf")
        else:
            change = _relative_change(after[name], k0)
        out.append(GroupChange(group=name, relative_change=change,
                               share_first=float(np.trace(k0)) / tr0,
                               share_last=float(np.trace(after[name])) / tr1,
                               moved=bool(change > threshold)))
    return tuple(out)


def _feature_rank(net: Net, x, layer, step: int, cautions: _Cautions) -> FeatureRank | None:
    """The interpolation check at one checkpoint; None, with the reason as a caution, when the
    features cannot be found."""
    # the NTK Gram's λ_min is left out: the kernels' spectra are in the result already
    opts = {"ntk_gram": "none"} if layer is None else {"layer": layer, "ntk_gram": "none"}
    try:
        with cautions.watch():
            return feature_rank(net, x, **opts)
    except (ValueError, TypeError) as err:
        cautions.items.append(f"Feature rank at step {step} not computed: {err}")
        return None


def _mse(f, y) -> np.ndarray:
    """The one error convention: mean over examples and outputs of ``(f − y)²`` (per leading
    index for stacked outputs)."""
    return np.mean((np.asarray(f) - np.asarray(y)) ** 2, axis=(-2, -1))


def _accuracy(f, labels) -> np.ndarray:
    """Fraction with ``argmax_a f_a == label`` (per leading index for stacked outputs)."""
    return np.mean(np.argmax(np.asarray(f), axis=-1) == labels, axis=-1)


def _forecast_grid(horizon: int, later: list[int]) -> np.ndarray:
    """0, about 40 log-spaced steps up to ``horizon``, and the offsets of the recorded steps."""
    grid = np.round(np.geomspace(1, horizon, 40)).astype(np.int64)
    return np.unique(np.concatenate([[0], grid, np.asarray(later, np.int64)]))


def _answers(net, step, x, y, xt, yt, labels, labels_t, *, kernel, f, ft, lr, loss, horizon, ridges,
             full_rows, options, record, cautions) -> CheckpointAnswers:
    """Forecast (from ``f``, ``ft``: the outputs at this checkpoint), spectrum, alignment, risk
    and kernel-ridge test error at one checkpoint; ``kernel`` is its (N, N) trace kernel."""
    n, o = y.shape
    k = np.asarray(kernel)
    kx = None  # the test-train trace kernel
    fc = train_mse = test_mse = gap = test_gap = gap_steps = seen = seen_test = None
    kernel_used = "trace"
    if lr is not None:
        ft = None if ft is None else ft.reshape(len(xt), o)
        if n * o <= full_rows:
            k_fc = ntk(net, x, outputs="full", **options)
            kx_fc = None if xt is None else ntk(net, xt, x, outputs="full", **options)
            kx = None if kx_fc is None else np.einsum("ijaa->ij", np.asarray(kx_fc))
        else:
            cautions.items.append(PER_OUTPUT_NOTE.format(step=step, o=o, rows=n * o,
                                                         limit=full_rows))
            k_fc = per_output_kernel(_trace_kernel(k, o))
            kx = None if xt is None else np.asarray(ntk(net, xt, x, outputs="trace", **options))
            kx_fc = None if kx is None else per_output_kernel(_trace_kernel(kx, o))
        keep = None if record is None else (record[0] >= step) & (record[0] <= step + horizon)
        offsets = [] if keep is None else (record[0][keep] - step).tolist()
        fc = forecast(k_fc, y, f, lr=lr, steps=_forecast_grid(horizon, offsets),
                      k_test_train=kx_fc, f0_test=ft, y_test=yt, loss=loss, progress=False)
        kernel_used = fc.kernel
        train_mse = _mse(fc.train_outputs, y)
        test_mse = None if yt is None else _mse(fc.test_outputs, yt)
        if keep is not None and np.any(keep):
            gap_steps, seen = record[0][keep], record[1][keep]
            at = np.searchsorted(fc.steps, gap_steps - step)
            gap = output_gap(seen, fc.train_outputs[at],
                             scale=gap_scale(fc.train_outputs, fc.train_loss[0], loss=loss),
                             steps=gap_steps, observed_name="recorded_train")
            if record[2] is not None:
                seen_test = record[2][keep]
                test_gap = output_gap(seen_test, fc.test_outputs[at],
                                      scale=gap_scale(fc.test_outputs, fc.test_loss[0],
                                                      loss=loss),
                                      steps=gap_steps, observed_name="recorded_test")
    elif xt is not None:
        kx = np.asarray(ntk(net, xt, x, outputs="trace", **options))
    spec = spectrum(kernel, num_examples=n)
    scale = float(np.mean(np.diag(k)))
    grid = scale * np.logspace(*RIDGE_DECADES, ridges)
    est = risk(k, y, ridges=grid)
    r = est.recommended  # GCV's ridge when GCV and LOO agree, else LOO's
    i = int(np.flatnonzero(est.ridges == r)[0])
    mse_r = acc_r = held = held_acc = None
    if kx is not None:  # kernel ridge on the test set at every ridge of the grid (R, M, O)
        pred = ridge_fit(k, y, ridge=est.ridges, k_test_train=kx).test_predictions
        held = _mse(pred, yt[None])
        mse_r = float(held[i])
        if labels_t is not None:
            held_acc = _accuracy(pred, labels_t)
            acc_r = float(held_acc[i])
    return CheckpointAnswers(
        step=step, kernel=kernel_used, kernel_dtype=str(k.dtype), forecast=fc,
        train_mse=train_mse, test_mse=test_mse, gap=gap, test_gap=test_gap, gap_steps=gap_steps,
        observed_train_mse=None if seen is None else _mse(seen, y),
        observed_test_mse=None if seen_test is None else _mse(seen_test, yt),
        observed_train_accuracy=None if seen is None or labels is None else _accuracy(seen, labels),
        observed_test_accuracy=None if seen_test is None or labels_t is None
        else _accuracy(seen_test, labels_t), spectrum=spec,
        alignment=alignment(k, y), risk=est, ridge=float(r), loo=float(est.loo[i]),
        gcv=float(est.gcv[i]), test_mse_ridge=mse_r, test_accuracy_ridge=acc_r,
        test_mse_by_ridge=held, test_accuracy_by_ridge=held_acc,
    )


def _parameter_change(first: Net, last: Net) -> float:
    """``‖θ_last − θ_first‖ / ‖θ_first‖`` over all parameter leaves."""
    flat = [np.concatenate([np.ravel(np.asarray(a)) for a in jax.tree_util.tree_leaves(n.params)])
            for n in (first, last)]
    return float(np.linalg.norm(flat[1] - flat[0]) / np.linalg.norm(flat[0]))


def _trace_kernel(k: np.ndarray, o: int) -> KernelArray:
    """A plain trace kernel told its kind again (stacking over checkpoints dropped it)."""
    return KernelArray(k, kind="trace", num_outputs=o)


# -- JSON --------------------------------------------------------------------------------
def _plain(value):
    """Plain JSON values: arrays to lists, non-finite floats to None."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return _plain(value.tolist())
    if isinstance(value, np.generic):
        return _plain(value.item())
    if isinstance(value, float):
        return value if np.isfinite(value) else None
    return value


def _rank_numbers(r: FeatureRank) -> dict:
    names = ("num_examples", "num_features", "rank", "full_rank", "sigma_max", "sigma_min",
             "tol", "margin", "layer", "features", "precision", "reliable", "caution", "verdict")
    return {k: getattr(r, k) for k in names}


def _answers_numbers(a: CheckpointAnswers) -> dict:
    fc = a.forecast
    spec = a.spectrum
    return {
        "step": a.step, "kernel": a.kernel, "kernel_dtype": a.kernel_dtype,
        "forecast": None if fc is None else {
            "steps_after": fc.steps, "lr": fc.lr, "loss": fc.loss, "train_loss": fc.train_loss,
            "test_loss": fc.test_loss, "train_mse": a.train_mse,
            "test_mse": a.test_mse, "train_accuracy": fc.train_accuracy,
            "test_accuracy": fc.test_accuracy, "max_stable_lr": fc.max_stable_lr,
            "stable": fc.stable,
            "gap": a.gap, "test_gap": a.test_gap, "gap_steps": a.gap_steps,
            "observed_train_mse": a.observed_train_mse,
            "observed_test_mse": a.observed_test_mse,
            "observed_train_accuracy": a.observed_train_accuracy,
            "observed_test_accuracy": a.observed_test_accuracy,
        },
        "spectrum": {"eigenvalues": spec.eigenvalues, "effective_rank": spec.effective_rank,
                     "decay_exponent": spec.decay_exponent,
                     "decay_fit_range": spec.decay_fit_range,
                     "condition_number": spec.condition_number,
                     "numerical_rank": spec.numerical_rank},
        "alignment": a.alignment,
        "risk": {"ridges": a.risk.ridges, "loo": a.risk.loo, "gcv": a.risk.gcv,
                 "kare": a.risk.kare, "agree": a.risk.agree, "loo_over_gcv": a.risk.ratio,
                 "ridge": a.ridge, "chosen_by": a.risk.recommended_by, "loo_at_ridge": a.loo,
                 "gcv_at_ridge": a.gcv, "test_mse": a.test_mse_ridge,
                 "test_accuracy": a.test_accuracy_ridge,
                 "test_mse_by_ridge": a.test_mse_by_ridge,
                 "test_accuracy_by_ridge": a.test_accuracy_by_ridge},
    }
