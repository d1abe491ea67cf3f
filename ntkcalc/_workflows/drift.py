"""Kernel drift over a training run: is the run lazy, and when did the kernel move?

The kernel K_t = Θ_t(X, X) on a fixed probe set X is computed at every saved step t; per step:

- distance to the initial kernel ``d(K_t, K_0)`` and to the previous step ``d(K_t, K_{t-1})``,
  with ``d(A, B) = 1 − ⟨A, B⟩_F / (‖A‖_F ‖B‖_F)`` (`kernel_distance`, in [0, 2]; blind to scale);
- velocity ``d(K_t, K_{t-1}) / (t − t_prev)``, distance per training step;
- relative change ``‖K_t − K_0‖_F / ‖K_0‖_F``, which does see a kernel that only grows or shrinks;
- centered kernel-target alignment with the probe labels, top eigenvalues and effective rank;
- optionally the numerical rank of one layer's features (`feature_rank`).

Verdict: the one laziness verdict (`ntkcalc.laziness`): the run is *lazy* when both the distance
to the initial kernel and the relative change stay at or below ``threshold`` (default 5%) at
every step; otherwise it is not, and the verdict names the first step above the threshold. With
``inits`` (Nets of the same architecture at independent initializations) the kernels at those
initializations give the yardstick: how much the kernel differs by the random initialization
alone, so that "the kernel moved" means moved beyond that. For a run that is not lazy, a kernel
from any single step (the initial one in particular) does not describe the run: forecasts built
on it will miss.
"""

from __future__ import annotations

import dataclasses
import json
import os
from collections.abc import Sequence

import numpy as np

from .._adapters.checkpoint import checkpoint_steps
from .._adapters.net import Net, load_checkpoint
from .._analysis import _checks
from .._analysis._checks import COND_WARN
from .._analysis._result import Result
from .._analysis.alignment import alignment, kernel_distance
from .._analysis.expressivity import feature_rank
from .._analysis.laziness import KERNEL_THRESHOLD, Laziness, init_spread, laziness
from .._analysis.laziness import relative_change as _relative_change
from .._analysis.spectrum import spectrum
from .._engine.options import METHODS, OUTPUTS, Method, Outputs, check_choice
from .._kernel import ntk
from .._words import counted

#: The laziness threshold on distance and relative change: `laziness.KERNEL_THRESHOLD`.
DEFAULT_THRESHOLD = KERNEL_THRESHOLD

MOVED_NOTE = (
    "Not lazy: the kernel changed during this run by more than the threshold, so a kernel taken "
    "at one step (the initial one in particular) does not describe the training dynamics, and "
    "forecasts built on it will be off."
)
ILL_NOTE = (
    "The kernel is ill-conditioned at steps {steps} (condition number up to {cond:.2g}): its "
    "smallest eigenvalues, and so the effective rank, are set by rounding rather than by the model."
)


@dataclasses.dataclass(frozen=True, repr=False)
class Drift(Result):
    """The kernel over a training run, one row per step (T steps, probe set of N examples).

    Fields:
        steps: (T,) training steps, increasing.
        distance_to_initial: (T,) ``1 − cos(K_t, K_0)`` (Frobenius cosine); 0 at the first step.
        distance_to_previous: (T,) ``1 − cos(K_t, K_{t-1})``; NaN at the first step.
        velocity: (T,) ``distance_to_previous / (steps[t] − steps[t-1])``; NaN at the first step.
        relative_change: (T,) ``‖K_t − K_0‖_F / ‖K_0‖_F``.
        alignment: (T,) centered kernel-target alignment with the probe labels (integer labels
            as one-hot rows).
        top_eigenvalues: (T, k) the k largest eigenvalues, descending.
        effective_rank: (T,) exp of the entropy of the normalized eigenvalues.
        condition_number: (T,) ``λ_max / λ_min`` (inf for a singular kernel).
        feature_rank: (T,) numerical rank of ``[H, 1]`` for the chosen layer, or None.
        kernels: (T, N, N) or (T, N, N, O[, O]): the kernel at each step.
        outputs: the outputs mode of the kernels.
        threshold: the laziness threshold on distance and relative change.
        lazy: whether both stayed <= threshold at every step (``laziness.lazy``).
        verdict: one line saying so, with the numbers (``laziness.sentence``).
        notes: cautions (a moved kernel, ill-conditioned kernels).
        laziness: the verdict (`ntkcalc.laziness`) with its criteria, thresholds and the init
            spread (``laziness.spread``, None without ``inits``).
    """

    steps: np.ndarray
    distance_to_initial: np.ndarray
    distance_to_previous: np.ndarray
    velocity: np.ndarray
    relative_change: np.ndarray
    alignment: np.ndarray
    top_eigenvalues: np.ndarray
    effective_rank: np.ndarray
    condition_number: np.ndarray
    feature_rank: np.ndarray | None
    kernels: np.ndarray
    outputs: str
    threshold: float
    lazy: bool
    verdict: str
    notes: tuple[str, ...]
    laziness: Laziness

    _COLUMNS = ("steps", "distance_to_initial", "distance_to_previous", "velocity",
                "relative_change", "alignment", "effective_rank", "condition_number")

    def __repr__(self) -> str:
        return (
            f"Drift({len(self.steps)} steps {self.steps[0]}..{self.steps[-1]}, "
            f"outputs={self.outputs!r}, kernels{self.kernels.shape[1:]}, lazy={self.lazy}, "
            f"verdict={self.verdict!r})"
        )

    def to_dict(self) -> dict[str, np.ndarray]:
        """The per-step table: column name → (T,) numpy array (eigenvalues as
        ``eigenvalue_1`` ... ``eigenvalue_k``; ``feature_rank`` when computed)."""
        table = {name: np.asarray(getattr(self, name)) for name in self._COLUMNS}
        for i in range(self.top_eigenvalues.shape[1]):
            table[f"eigenvalue_{i + 1}"] = self.top_eigenvalues[:, i]
        if self.feature_rank is not None:
            table["feature_rank"] = self.feature_rank
        return table

    def to_json(self, *, indent: int | None = None) -> str:
        """The table plus verdict, threshold, outputs, notes and the laziness criteria (with the
        init spread) as JSON (NaN and inf → null)."""
        finite = lambda v: v.item() if np.isfinite(v) else None
        table = {k: [finite(v) for v in col] for k, col in self.to_dict().items()}
        return json.dumps({
            "verdict": self.verdict, "lazy": bool(self.lazy), "threshold": self.threshold,
            "outputs": self.outputs, "notes": list(self.notes),
            "laziness": self.laziness.to_dict(), "table": table,
        }, indent=indent)

    def plot(self, ax=None):
        """Distances and relative change against step, with the threshold; returns the axes.

        Draws on ``ax`` or on a new matplotlib Figure (no pyplot, so any backend, Agg included).
        """
        if ax is None:
            from matplotlib.figure import Figure

            ax = Figure(figsize=(6.4, 3.6), layout="constrained").add_subplot()
        ax.plot(self.steps, self.distance_to_initial, marker="o", label="distance to initial")
        ax.plot(self.steps, self.distance_to_previous, marker=".", label="distance to previous")
        ax.plot(self.steps, self.relative_change, ls="--", label="relative change ‖K−K₀‖/‖K₀‖")
        ax.axhline(self.threshold, color="gray", lw=0.8, ls=":",
                   label=f"threshold {self.threshold:.0%}")
        spread = self.laziness.spread
        if spread is not None:
            ax.axhline(spread.relative_change, color="gray", lw=0.8, ls="-.",
                       label=f"relative change between {spread.count} inits")
        ax.set_xlabel("training step")
        ax.set_ylabel("kernel change")
        ax.set_title("lazy" if self.lazy else "not lazy", fontsize="medium")
        ax.legend(fontsize="small")
        return ax


# -- inputs ---------------------------------------------------------------------------------------
def _step_numbers(steps, count: int) -> np.ndarray:
    if steps is None:
        return np.arange(count)
    arr = np.asarray(steps)
    if arr.ndim != 1 or not np.issubdtype(arr.dtype, np.integer):
        raise ValueError(f"`steps` must be a 1-D sequence of integers, got {steps!r}.")
    if arr.size != count:
        raise ValueError(
            f"`steps` has {counted(arr.size, 'entry', 'entries')} but there are "
            f"{counted(count, 'Net')}. Pass one step per Net."
        )
    if np.any(np.diff(arr) <= 0):
        raise ValueError(
            f"`steps` must be strictly increasing, got {arr.tolist()[:8]}. Sort the run by step."
        )
    return arr.astype(np.int64)


def _from_directory(path, steps, load: dict):
    """(steps, iterator of Nets) for a CheckpointManager directory; one Net in memory at a time.

    Every Net after the first reuses the first one's compiled functions (`Net.replace`).
    """
    if load.get("module") is None:
        raise ValueError(
            "`module` is required with a checkpoint directory: pass the linen module or nnx "
            "model the checkpoints were saved from."
        )
    saved = checkpoint_steps(path)
    if steps is None:
        chosen = np.asarray(saved, dtype=np.int64)
    else:
        chosen = _step_numbers(steps, len(steps))
        missing = sorted(set(chosen.tolist()) - set(saved))
        if missing:
            raise ValueError(f"`steps` {missing} are not saved in {os.fspath(path)!r}; saved: "
                             f"{list(saved)}.")

    def nets():
        first = None
        for s in chosen:
            net = load_checkpoint(path, step=int(s), **load)
            if first is None:
                first = net
            yield first.replace(params=net.params, state=net.state)

    return chosen, nets()


def _square(k: np.ndarray, outputs: str) -> np.ndarray:
    """The kernel as one square matrix over (example, output) pairs."""
    n = k.shape[0]
    if outputs == "full":
        o = k.shape[2]
        return k.transpose(0, 2, 1, 3).reshape(n * o, n * o)
    if outputs == "diagonal":  # block-diagonal over outputs
        o = k.shape[2]
        return np.einsum("ija,ab->iajb", k, np.eye(o)).reshape(n * o, n * o)
    return k


def _targets(y: np.ndarray, outputs: str, kernel: np.ndarray) -> np.ndarray:
    """Labels for the alignment, by the label convention (1-D integers → one-hot rows)."""
    per_output = outputs in ("full", "diagonal")
    y = _checks.targets("y", y, n=kernel.shape[0], kname="x", kshape=kernel.shape,
                        num_classes=kernel.shape[2] if per_output else None)
    if per_output:
        o = kernel.shape[2]
        if y.shape[1] != o:
            raise ValueError(
                f"`y` is {y.shape}; with outputs={outputs!r} the labels must be (N, {o}), one "
                "column per model output (e.g. one-hot rows)."
            )
        return y.reshape(-1)
    return y


# -- the run --------------------------------------------------------------------------------------
def drift(
    source: str | os.PathLike | Sequence[Net],
    x,
    y,
    *,
    steps: Sequence[int] | None = None,
    module=None,
    example=None,
    variables=None,
    item: str | None = None,
    subtree: str | None = None,
    outputs: Outputs = "trace",
    method: Method = "auto",
    params=None,
    memory=None,
    top: int = 5,
    layer: str | None = None,
    threshold: float = DEFAULT_THRESHOLD,
    inits: Sequence[Net] | None = None,
    progress: bool = False,
) -> Drift:
    """The kernel on a probe set at every step of a training run, and how far it moved.

    Args:
        source: an orbax ``CheckpointManager`` directory (then ``module`` and, for linen,
            optionally ``example``/``variables``, ``item``, ``subtree`` as in `load_checkpoint`),
            or a sequence of at least two Nets in training order.
        x: (N, ...) probe inputs, the same at every step.
        y: (N,) or (N, O) probe targets for the alignment: real targets, one-hot rows, or a 1-D
            integer array of class labels (read as one-hot rows, the label convention).
        steps: step numbers: for Nets one per Net (default 0, 1, ...); for a directory the steps
            to use (default all saved).
        outputs: the kernel's outputs mode (`ntk`); ``"full"`` and ``"diagonal"`` are compared as
            (N·O, N·O) matrices over (example, output) pairs, with labels of shape (N, O).
        method, params, memory: passed to `ntk`.
        top: how many top eigenvalues to keep per step.
        layer: a layer name for the feature-rank check (`feature_rank`), or None to skip it.
        threshold: the laziness threshold in (0, 1) on the distance to the initial kernel and
            the relative change (default 0.05, `laziness.KERNEL_THRESHOLD`).
        inits: Nets of the same architecture at independent random initializations (say 2–4);
            their kernels and the run's first one give the init spread, the yardstick of the
            verdict (`init_spread`). Costs one kernel per Net.
        progress: pass ``progress`` to `ntk` for each kernel.

    Returns:
        `Drift`.
    """
    outputs = check_choice("outputs", outputs, OUTPUTS)
    check_choice("method", method, METHODS)
    if isinstance(top, bool) or not isinstance(top, int | np.integer) or top < 1:
        raise ValueError(f"`top` must be an integer >= 1, got {top!r}.")
    if not isinstance(threshold, int | float) or not 0 < threshold < 1:
        raise ValueError(f"`threshold` must be a number in (0, 1), got {threshold!r}.")
    x, y = np.asarray(x), np.asarray(y)
    if x.ndim < 1 or x.shape[0] < 2:
        raise ValueError(f"`x` must hold at least 2 probe examples on axis 0, got {x.shape}.")
    if y.ndim not in (1, 2) or y.shape[0] != x.shape[0]:
        raise ValueError(
            f"`y` is {y.shape} but `x` has {x.shape[0]} examples: pass (N,) or (N, O) labels, "
            "one row per probe example."
        )
    load = {"module": module, "example": example, "variables": variables, "item": item,
            "subtree": subtree}
    if isinstance(source, str | os.PathLike):
        step_arr, nets = _from_directory(source, steps, load)
    else:
        if any(v is not None for v in load.values()):
            raise ValueError(
                "`module`, `example`, `variables`, `item` and `subtree` are for a checkpoint "
                "directory; `source` is a sequence of Nets. Leave them out."
            )
        nets = list(source)
        bad = [i for i, n in enumerate(nets) if not isinstance(n, Net)]
        if bad:
            raise TypeError(
                f"`source` must be a checkpoint directory or a sequence of Nets; item {bad[0]} is "
                f"a {type(nets[bad[0]]).__name__}."
            )
        step_arr = _step_numbers(steps, len(nets))
    if len(step_arr) < 2:
        raise ValueError(f"drift needs at least 2 steps, got {len(step_arr)}.")
    inits = [] if inits is None else [inits] if isinstance(inits, Net) else list(inits)
    bad = [i for i, n in enumerate(inits) if not isinstance(n, Net)]
    if bad:
        raise TypeError(
            "`inits` must be a sequence of Nets at independent initializations; item "
            f"{bad[0]} is a {type(inits[bad[0]]).__name__}."
        )

    options = dict(method=method, outputs=outputs, params=params, memory=memory,
                   progress=progress)
    kernels, squares, ranks, specs, aligns = [], [], [], [], []
    for net in nets:
        k = np.asarray(ntk(net, x, **options))
        kernels.append(k)
        squares.append(_square(k, outputs))
        specs.append(spectrum(squares[-1], top=min(top, squares[-1].shape[0]),
                              num_examples=x.shape[0]))
        aligns.append(alignment(squares[-1], _targets(y, outputs, k), centered=True))
        if layer is not None:
            ranks.append(feature_rank(net, x, layer=layer).rank)
    spread = None
    if inits:
        spread = init_spread([squares[0], *(_square(np.asarray(ntk(n, x, **options)), outputs)
                                            for n in inits)])
    return _summarize(step_arr, kernels, squares, specs, aligns, ranks if layer else None,
                      outputs=outputs, threshold=float(threshold), spread=spread)


def _summarize(steps, kernels, squares, specs, aligns, ranks, *, outputs, threshold,
               spread) -> Drift:
    k0 = squares[0]
    to_initial = np.array([kernel_distance(k, k0) for k in squares])
    to_initial[0] = 0.0
    to_previous = np.array([np.nan] + [kernel_distance(b, a) for a, b in zip(squares, squares[1:])])
    velocity = to_previous / np.concatenate([[np.nan], np.diff(steps)])
    relative = np.array([_relative_change(k, k0) for k in squares])
    cond = np.array([s.condition_number for s in specs])
    verdict = laziness(relative_change=relative, distance=to_initial, steps=steps, spread=spread,
                       kernel_threshold=threshold, kind=outputs, precision=kernels[0].dtype)
    lazy = verdict.lazy
    notes = [] if lazy else [MOVED_NOTE]
    ill = cond > COND_WARN
    if np.any(ill):
        notes.append(ILL_NOTE.format(steps=steps[ill].tolist(), cond=cond[ill].max()))
    return Drift(
        steps=np.asarray(steps), distance_to_initial=to_initial, distance_to_previous=to_previous,
        velocity=velocity, relative_change=relative, alignment=np.array(aligns),
        top_eigenvalues=np.array([s.eigenvalues for s in specs]),
        effective_rank=np.array([s.effective_rank for s in specs]), condition_number=cond,
        feature_rank=None if ranks is None else np.array(ranks),
        kernels=np.stack(kernels), outputs=outputs, threshold=threshold, lazy=lazy,
        verdict=verdict.sentence, notes=tuple(notes), laziness=verdict,
    )
