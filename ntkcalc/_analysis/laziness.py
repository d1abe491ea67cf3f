"""The laziness verdict: one definition, used by `drift`, `Forecast.departure`, the report and the
command line.

A training run is *lazy* when the network stays close to its linearization at initialization, so
that the initial kernel describes it (Jacot, Gabriel & Hongler, NeurIPS 2018, arXiv:1806.07572;
Chizat, Oyallon & Bach, NeurIPS 2019, arXiv:1812.07956). Three criteria, each with its threshold:

1. **Kernel relative change** ``c(t) = ‖K_t − K_0‖_F / ‖K_0‖_F``, which sees a kernel that only
   grows or shrinks. For wide networks in the NTK parameterization it shrinks as ``1/√width``
   (Lee et al., "Wide Neural Networks of Any Depth Evolve as Linear Models Under Gradient
   Descent", NeurIPS 2019, arXiv:1902.06720, their relative-change plots).
2. **Kernel distance** ``d(t) = 1 − ⟨K_t, K_0⟩_F / (‖K_t‖_F ‖K_0‖_F)``, blind to scale, which sees
   the kernel turning (e.g. towards the labels); Fort et al., NeurIPS 2020, arXiv:2010.15110, track
   it and its rate ("kernel velocity") over training.
3. **Forecast gap on outputs** ``g(t) = ‖f_obs(t) − f_lin(t)‖_F / ‖f_0 − y‖_F``: how far the
   trained network's training outputs are from those of the linearized model, relative to the
   initial residual. Unlike a relative gap of losses it stays meaningful as the loss goes to
   zero: a run whose outputs track the forecast to 1% of the distance they travelled is lazy
   however small the final loss is.

Thresholds (`KERNEL_THRESHOLD` = 5% on ``c`` and ``d``, `GAP_THRESHOLD` = 10% on ``g``) are our
choice, not a published standard: 5% of the kernel is where, in this package's tests, forecasts
of train and test curves start to miss visibly; 10% of the initial residual is a gap a plot of the
curves shows.

**The init-spread yardstick.** The same two kernel quantities between the kernels of a few
independent initializations of the same architecture at the same inputs (`init_spread`, the mean
over pairs) tell how much the kernel changes by the random initialization alone. "The kernel
moved" (its criterion fails) when its change exceeds both the threshold and this spread
(``beyond_spread``). A change above the threshold but within the spread is no larger than what
choosing another seed does to the kernel — the fluctuation of the empirical kernel at
initialization and its change in training both shrink as ``1/√width`` (Lee et al. 2019) — so the
kernel criteria alone cannot decide: the forecast gap on outputs, the direct measure of whether
the linearization describes the run, decides; without it the run is not called lazy and the
sentence says what to measure. Using the spread this way is our choice.

**Estimates with error bars.** A kernel criterion may be an estimate rather than a computed value
(sketched NTK features give the kernel distance with a jackknife standard error σ, Efron & Stein,
Ann. Statist. 1981). It then decides only when it is clear of the threshold by `RESOLVE_BARS` (2)
error bars: below ``threshold − 2σ`` at every step it passes, above ``threshold + 2σ`` at some step
it fails, and otherwise the verdict is *not resolved* (`Laziness.outcome`), never lazy or not
lazy: the estimates cannot tell, and smaller error bars (more sketched features, or the exact
kernel) decide. An estimate within 2σ of 0 at every step is a change not resolved from none, and
the sentence says so; the verdict is still lazy when the whole interval lies below the threshold.
The estimate is printed as it is, with its error bar, even below 0 (an unbiased estimate of a
small non-negative quantity can be). Two error bars (about 95% for a normal estimate; with the
jackknife's 8 groups, a t distribution with 7 degrees of freedom, about 92%) is our choice.

The run is lazy when no measured criterion fails and none is unresolved. `Laziness.sentence`
says so in one line with the numbers; the same object feeds every place that states a verdict.
"""

from __future__ import annotations

import dataclasses
import itertools
import warnings
from collections.abc import Sequence
from typing import get_args

import numpy as np

from .._engine.options import check_choice
from .._kind import Kind
from .._words import counted
from . import _checks
from ._result import Result
from .alignment import kernel_distance
from .rank import precision_of

#: Threshold on the kernel's relative change and distance to the initial kernel (our choice).
KERNEL_THRESHOLD = 0.05
#: Threshold on the forecast gap on outputs, relative to the initial residual (our choice).
GAP_THRESHOLD = 0.10
#: An estimate decides the verdict only this many standard errors clear of the threshold.
RESOLVE_BARS = 2.0

DIVERGED = (
    "The {what} diverged (non-finite values from step {step}): the forecast gap is inf. "
    "{hint}"
)


def relative_change(k, k0) -> float:
    """``‖K − K_0‖_F / ‖K_0‖_F`` for two kernels of the same shape."""
    a, b = np.asarray(k, dtype=np.float64), np.asarray(k0, dtype=np.float64)
    if a.shape != b.shape:
        raise ValueError(
            f"The kernels are {a.shape} and {b.shape}: both must be over the same examples."
        )
    norm = float(np.linalg.norm(b))
    if norm == 0:
        raise ValueError("The reference kernel has zero Frobenius norm: the change is undefined.")
    return float(np.linalg.norm(a - b)) / norm


@dataclasses.dataclass(frozen=True, repr=False)
class InitSpread(Result):
    """How much the kernel differs between independent initializations (the yardstick).

    Fields:
        relative_change: mean over pairs (a, b) of ``‖K_a − K_b‖_F / √(‖K_a‖_F ‖K_b‖_F)``.
        distance: mean over pairs of ``1 − cos(K_a, K_b)`` (`kernel_distance`).
        count: the number of initializations.
    """

    relative_change: float
    distance: float
    count: int


def init_spread(kernels: Sequence) -> InitSpread:
    """The spread between kernels of independent initializations at the same inputs.

    Args:
        kernels: at least two (N, N) kernels (or (N·O, N·O) matrices) of the same architecture,
            each at a different random initialization, over the same inputs in the same order.

    Returns:
        `InitSpread`, the mean over all pairs; symmetric in each pair.
    """
    if isinstance(kernels, np.ndarray) and kernels.ndim == 3:
        kernels = list(kernels)
    if not isinstance(kernels, Sequence) or len(kernels) < 2:
        raise ValueError(
            "`kernels` must be a sequence of at least 2 kernels of independent "
            f"initializations, got {type(kernels).__name__}"
            f"{f' of length {len(kernels)}' if isinstance(kernels, Sequence) else ''}."
        )
    mats = [_checks.square_kernel(f"kernels[{i}]", k) for i, k in enumerate(kernels)]
    changes, distances = [], []
    for a, b in itertools.combinations(mats, 2):
        scale = np.sqrt(np.linalg.norm(a) * np.linalg.norm(b))
        changes.append(float(np.linalg.norm(a - b) / scale))
        distances.append(kernel_distance(a, b))
    return InitSpread(relative_change=float(np.mean(changes)), distance=float(np.mean(distances)),
                      count=len(mats))


@dataclasses.dataclass(frozen=True, repr=False)
class Laziness(Result):
    """The laziness verdict with its criteria, thresholds and numbers.

    Fields:
        lazy: no measured criterion failed and none is unresolved.
        sentence: one line saying so, with the numbers (and their error bars, where given).
        relative_change: the largest kernel relative change to the initial kernel, or None.
        distance: the largest kernel distance to the initial kernel, or None.
        forecast_gap: the largest forecast gap on training outputs relative to the initial
            residual, or None when not measured.
        spread: the init-spread yardstick, or None when not measured.
        kernel_threshold, gap_threshold: the thresholds used.
        failed: names of the failed criteria ("relative_change", "distance", "forecast_gap").
        first_step: the first step at which a criterion failed, or None (or when the criteria
            were given as single numbers).
        beyond_spread: whether the kernel's change exceeded the threshold and the init spread
            (None without a spread).
        within_spread: the kernel criteria whose change was above the threshold but within the
            init spread (left to the forecast gap to decide).
        kind: the kind of the kernels compared (``"trace"``, ``"full"``, ... as `ntk`'s
            ``outputs``), or None when not given or no kernel was compared.
        precision: the dtype the kernels were computed in (``"float32"``, ``"float64"``), whose
            rounding limits how small a change can be told from zero; None when not given or no
            kernel was compared.
        unresolved: the criteria given with error bars whose estimate lies within
            ``bars`` error bars of the threshold (neither passed nor failed).
        relative_change_error, distance_error: the standard error of the printed
            ``relative_change`` and ``distance`` (the step that decides), or None when the
            criterion was given without error bars.
        bars: how many standard errors an estimate must clear the threshold by to decide.
    """

    lazy: bool
    sentence: str
    relative_change: float | None
    distance: float | None
    forecast_gap: float | None
    spread: InitSpread | None
    kernel_threshold: float
    gap_threshold: float
    failed: tuple[str, ...]
    first_step: int | None
    beyond_spread: bool | None
    within_spread: tuple[str, ...] = ()
    kind: str | None = None
    precision: str | None = None
    unresolved: tuple[str, ...] = ()
    relative_change_error: float | None = None
    distance_error: float | None = None
    bars: float = RESOLVE_BARS

    @property
    def outcome(self) -> str:
        """``"lazy"``, ``"not lazy"`` (a criterion failed) or ``"not resolved"`` (none failed,
        an estimate lies within its error bars of the threshold): the verdict in words."""
        if self.lazy:
            return "lazy"
        return "not resolved" if self.unresolved and not self.failed else "not lazy"

    def to_dict(self) -> dict:
        """Every number and the sentence as plain Python values (for JSON), with ``outcome``."""
        out = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}
        out["outcome"] = self.outcome
        out["failed"] = list(self.failed)
        out["unresolved"] = list(self.unresolved)
        out["within_spread"] = list(self.within_spread)
        out["spread"] = None if self.spread is None else dataclasses.asdict(self.spread)
        return out


def _curve(name: str, values, steps, errors=None):
    """(values, steps or None, standard errors) of one criterion; an estimate given with its
    error bars may be below 0 (noise), a computed value may not."""
    if values is None:
        if errors is not None:
            raise ValueError(f"`{name}_error` was given without `{name}`: pass both.")
        return None
    arr = np.atleast_1d(np.asarray(values, dtype=np.float64))
    if arr.ndim != 1 or arr.size == 0 or np.any(np.isnan(arr)) or (
            errors is None and np.any(arr < 0)):
        raise ValueError(
            f"`{name}` must be a non-negative number or 1-D array without NaN, got {values!r}."
        )
    err = np.zeros_like(arr)
    if errors is not None:
        err = np.atleast_1d(np.asarray(errors, dtype=np.float64))
        if err.shape != arr.shape or not np.all(np.isfinite(err)) or np.any(err < 0):
            raise ValueError(
                f"`{name}_error` must be finite standard errors >= 0, one per value of "
                f"`{name}` ({counted(arr.size, 'value')}), got {errors!r}.")
    if steps is None:  # a single number has no step; a curve counts 0, 1, ...
        return arr, None if np.ndim(values) == 0 else np.arange(arr.size), err
    at = np.asarray(steps)
    if at.shape != arr.shape:
        raise ValueError(f"`{name}` has {counted(arr.size, 'value')} but its steps have "
                         f"{at.size}.")
    return arr, at, err


def _threshold(name: str, value) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float | np.floating) or not (
            0 < value < np.inf):
        raise ValueError(f"`{name}` must be a finite number > 0, got {value!r}.")
    return float(value)


def laziness(
    *,
    relative_change=None,
    distance=None,
    forecast_gap=None,
    steps=None,
    gap_steps=None,
    spread: InitSpread | None = None,
    kernel_threshold: float = KERNEL_THRESHOLD,
    gap_threshold: float = GAP_THRESHOLD,
    kind: Kind | None = None,
    precision=None,
    relative_change_error=None,
    distance_error=None,
) -> Laziness:
    """The laziness verdict from whichever criteria were measured (see the module docstring).

    Args:
        relative_change: (T,) ``‖K_t − K_0‖_F / ‖K_0‖_F`` per step, or its largest value.
        distance: (T,) ``1 − cos(K_t, K_0)`` per step, or its largest value.
        forecast_gap: (T',) ``‖f_obs(t) − f_lin(t)‖ / ‖f_0 − y‖`` per step (`output_gap`); inf
            for a diverged run or forecast.
        steps, gap_steps: the training steps of the kernel curves and of the gap curve (default
            0, 1, ...), to name the first failing step.
        spread: the init-spread yardstick (`init_spread`), or None.
        kernel_threshold: threshold > 0 on relative change and distance.
        gap_threshold: threshold > 0 on the forecast gap.
        kind: the kind of the kernels behind ``relative_change`` and ``distance`` (`KernelArray`'s
            ``kind``), recorded in the result.
        precision: the dtype those kernels were computed in (a dtype or its name), recorded.
        relative_change_error, distance_error: when that criterion is an estimate (sketched
            features), its standard error at each step, same shape (0 where exact); the
            estimate may then be below 0, and it decides only `RESOLVE_BARS` standard errors
            clear of the threshold (else the verdict is "not resolved").

    Returns:
        `Laziness`. At least one criterion must be given.
    """
    kt = _threshold("kernel_threshold", kernel_threshold)
    if kind is not None:
        check_choice("kind", kind, get_args(Kind))
    precision = None if precision is None else precision_of(None, precision).name
    gt = _threshold("gap_threshold", gap_threshold)
    curves = {
        "relative_change": _curve("relative_change", relative_change, steps,
                                  relative_change_error),
        "distance": _curve("distance", distance, steps, distance_error),
        "forecast_gap": _curve("forecast_gap", forecast_gap, gap_steps),
    }
    if all(c is None for c in curves.values()):
        raise ValueError(
            "Pass at least one criterion: `relative_change`, `distance` or `forecast_gap`."
        )
    if spread is not None and not isinstance(spread, InitSpread):
        raise TypeError(f"`spread` must be an InitSpread (init_spread), got {type(spread)}.")
    own = {"relative_change": spread.relative_change if spread else 0.0,
           "distance": spread.distance if spread else 0.0, "forecast_gap": 0.0}
    limits = {"relative_change": kt, "distance": kt, "forecast_gap": gt}
    gap_measured = curves["forecast_gap"] is not None
    failed, within, unresolved, first = [], [], [], None
    at_peak = {}  # the step whose numbers the sentence prints: the one that decides
    for name, curve in curves.items():
        if curve is None:
            continue
        values, at, err = curve
        low, high = values - RESOLVE_BARS * err, values + RESOLVE_BARS * err
        at_peak[name] = int(np.argmax(high))
        if np.all(high <= limits[name]):
            continue
        over = low > max(limits[name], own[name])
        if not np.any(over):
            over = low > limits[name]
            if not np.any(over & (high <= own[name])):  # within its error bars of the threshold
                unresolved.append(name)
                continue
            within.append(name)  # above the threshold, within the init spread: the gap decides
            if gap_measured:
                continue
        failed.append(name)
        at_peak[name] = int(np.argmax(low))
        if at is not None:
            s = int(at[int(np.argmax(over))])
            first = s if first is None else min(first, s)
    peak = {name: None if c is None else float(c[0][at_peak[name]]) for name, c in curves.items()}
    error = {name: None if c is None or not np.any(c[2]) else float(c[2][at_peak[name]])
             for name, c in curves.items()}
    kernel = [n for n in ("relative_change", "distance") if peak[n] is not None]
    beyond = None if spread is None or not kernel else any(
        peak[n] > max(kt, own[n]) for n in kernel)
    zero = [n for n in kernel if error[n] is not None
            and np.all(curves[n][0] - RESOLVE_BARS * curves[n][2] <= 0)]
    parts = []
    if kernel:
        parts.append(_kernel_phrase(peak, error, kernel, kt, spread, zero))
    if gap_measured:
        parts.append(_gap_phrase(peak["forecast_gap"], gt))
    lazy = not failed and not unresolved
    head = ("lazy" if lazy else "not resolved" if not failed
            else "not lazy" + ("" if first is None else f" (from step {first})"))
    sentence = f"{head}: " + "; ".join(parts)
    if any(n in failed and n not in within for n in kernel):
        sentence += " — the kernel moved" + (
            " beyond what the initialization alone changes" if beyond else "")
    elif unresolved and not failed:
        sentence += (f" — within {RESOLVE_BARS:g} standard errors of the threshold: these "
                     "estimates cannot tell; smaller error bars (more sketched features k, or "
                     "the exact kernel) decide")
    elif within and lazy:
        sentence += (" — the kernel changed by more than the threshold but no more than between "
                     "independent initializations, and the outputs follow the forecast")
    elif within and gap_measured:
        sentence += (" — the outputs left the forecast, while the kernel changed by more than the "
                     "threshold but no more than between independent initializations")
    elif within:
        sentence += (" — the kernel changed by more than the threshold but no more than between "
                     "independent initializations: the kernel alone cannot tell; measure the "
                     "forecast gap on outputs to decide")
    return Laziness(
        lazy=lazy, sentence=sentence, relative_change=peak["relative_change"],
        distance=peak["distance"], forecast_gap=peak["forecast_gap"], spread=spread,
        kernel_threshold=kt, gap_threshold=gt, failed=tuple(failed), first_step=first,
        beyond_spread=beyond, within_spread=tuple(within), kind=kind, precision=precision,
        unresolved=tuple(unresolved), relative_change_error=error["relative_change"],
        distance_error=error["distance"],
    )


def _kernel_phrase(peak: dict, error: dict, names: list[str], threshold: float, spread,
                   zero: list[str]) -> str:
    label = {"relative_change": "relative change ‖K_t − K_0‖/‖K_0‖",
             "distance": "distance 1 − cos(K_t, K_0)"}
    text = "kernel " + ", ".join(f"{label[n]} up to {_percent(peak[n], error[n])}"
                                 for n in names)
    text += f" (threshold {threshold * 100:.3g}%"
    if any(error[n] is not None for n in names):
        text += "; ± one standard error"
    if zero:
        text += (f"; {' and '.join(label[n].split(' ')[0] for n in zero)} within "
                 f"{RESOLVE_BARS:g} standard errors of 0 at every step: no change resolved")
    if spread is not None:
        own = {"relative_change": spread.relative_change, "distance": spread.distance}
        text += (f"; between {spread.count} independent initializations "
                 + ", ".join(f"{own[n]:.2%}" for n in names))
    return text + ")"


def _percent(value: float, error: float | None) -> str:
    """``value`` as a percentage; with a standard error, ``value ± error`` to the error's second
    significant digit (at least two decimals)."""
    if error is None:
        return f"{value:.2%}"
    digits = 2 if error == 0 else max(2, 1 - int(np.floor(np.log10(error * 100))))
    return f"{value * 100:.{digits}f}% ± {error * 100:.{digits}f}%"


def _gap_phrase(gap: float, threshold: float) -> str:
    value = "inf (diverged)" if not np.isfinite(gap) else f"{gap:.2%}"
    return (f"training outputs off the linearized forecast by up to {value} of the initial "
            f"residual ‖f_0 − y‖ (threshold {threshold:.0%})")


def output_gap(observed, forecast, *, scale: float, steps=None,
               observed_name: str = "observed") -> np.ndarray:
    """``‖f_obs(t) − f_lin(t)‖_F / scale`` per step (T,); inf, with a RuntimeWarning, at steps
    where either side is not finite (a diverged run or forecast). Never NaN.

    Args:
        observed: (T, ...) outputs of the trained network at the forecast's steps.
        forecast: (T, ...) outputs of the linearized model at the same steps.
        scale: the initial residual ``‖f_0 − y‖_F``; 0 makes every nonzero gap inf.
        steps: (T,) step numbers, for messages (default 0, 1, ...).
        observed_name: the argument name, for messages.
    """
    obs = np.asarray(observed, dtype=np.float64)
    fc = np.asarray(forecast, dtype=np.float64)
    if obs.shape != fc.shape:
        raise ValueError(
            f"`{observed_name}` has shape {obs.shape} but the forecast's are {fc.shape}: pass "
            "the network's values at each of the forecast's steps."
        )
    at = np.arange(len(obs)) if steps is None else np.asarray(steps)
    with np.errstate(invalid="ignore", over="ignore"):
        diff = np.sqrt(np.sum((obs - fc).reshape(len(obs), -1) ** 2, axis=1))
    for what, arr, hint in (
        ("linearized forecast", fc, "The learning rate is above the stability limit 2N/λ_max; "
         "the forecast, like gradient descent, blows up."),
        (f"observed run (`{observed_name}`)", obs, "The training run itself diverged."),
    ):
        rows = ~np.all(np.isfinite(arr.reshape(len(arr), -1)), axis=1)
        if np.any(rows):
            warnings.warn(DIVERGED.format(what=what, step=at[int(np.argmax(rows))], hint=hint),
                          RuntimeWarning, stacklevel=3)
    finite = np.isfinite(diff)
    gap = np.full(diff.shape, np.inf)
    gap[finite & (diff == 0)] = 0.0
    moved = finite & (diff > 0)
    if scale > 0:
        gap[moved] = diff[moved] / scale
    return gap
