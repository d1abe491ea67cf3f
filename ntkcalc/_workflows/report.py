"""The report of a run: one self-contained HTML page and a JSON file with every number it shows.

It renders a `RunAnalysis` (what `analyse_run` found, typed), with a `RunDescription` of what the
numbers cannot say (the data, the model, the training, the class names), and derives the cautions
from the numbers (a non-lazy run, an ill-conditioned kernel, reduced precision) beside the
analysis's own. It writes:

- ``report.html``: sections, in order, with these ids: ``summary``, ``cautions``, ``spectrum``,
  ``heatmap``, ``drift``, ``groups``, ``forecast``, ``risk``, ``feature-rank``, ``setup``; every
  figure an embedded base64 PNG;
- ``report.json``: ``{"summary": [5 lines], "verdict": {...}, "cautions": [...], "sections":
  {id: numbers}}``.

The report says one thing: a single laziness verdict (`RunAnalysis.laziness`) is quoted in the
summary, the cautions and the sections; every number shown is in report.json; and every error is
one convention, MSE = mean over examples and outputs of (f − y)², named in each label
(`plots.MSE_LABEL`).

A kernel store (the ``store`` of ``ntk(net, x, store=...)``, a zarr group) gets a short report:
summary, cautions, spectrum and heat map (in the stored order, no labels).
"""

from __future__ import annotations

import base64
import dataclasses
import html
import json
import math
import os

import numpy as np

from .._analysis import _checks, spectrum
from .._analysis._checks import COND_WARN
from .._analysis._result import OtherVersionError, Result, read_record
from .._version import __version__
from .._words import counted
from . import plots
from .study import RunAnalysis, _plain

SECTIONS = ("summary", "cautions", "spectrum", "heatmap", "drift", "groups", "forecast", "risk",
            "feature-rank", "setup")
#: The sections of a run analysed on sketched features (`analyse_run(kernel="sketch")`).
SKETCH_SECTIONS = ("summary", "cautions", "sketch", "feature-rank", "setup")

#: The complete result `RunAnalysis.write` puts beside the report.
RESULT = "result.json"
#: The same result and its `RunDescription` as they are, arrays included (`RunAnalysis.read`).
RECORD = "result.npz"

_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; color: #222;
       max-width: 60rem; margin: 2rem auto; padding: 0 1rem; line-height: 1.45; }
h1 { font-size: 1.5rem; margin-bottom: 0.2rem; }
h2 { font-size: 1.15rem; border-bottom: 1px solid #ccc; padding-bottom: 0.2rem; margin-top: 2rem; }
p.meta { color: #666; margin-top: 0; }
table { border-collapse: collapse; margin: 0.6rem 0; font-size: 0.92rem; }
td, th { padding: 0.15rem 0.8rem 0.15rem 0; text-align: left; vertical-align: top; }
td.num { font-variant-numeric: tabular-nums; }
img { max-width: 100%; height: auto; display: block; margin: 0.5rem 0; }
ul.cautions li { color: #8a3b00; margin-bottom: 0.3rem; }
ol.summary li { margin-bottom: 0.3rem; }
"""


@dataclasses.dataclass(frozen=True)
class _Section:
    id: str
    title: str
    text: str
    numbers: dict
    rows: tuple[tuple[str, str], ...] = ()
    figures: tuple[bytes, ...] = ()
    items: tuple[str, ...] = ()


def _fmt(value) -> str:
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        return f"{value:.4g}" if math.isfinite(value) else str(value)
    return str(value)


def _load_store(path: str) -> np.ndarray | None:
    """The (N, N) kernel of an ntkcalc kernel store (traced over outputs), or None if not one."""
    from .._tiles.store import read_verified

    if not os.path.isfile(os.path.join(path, "zarr.json")):
        return None
    k = read_verified(path, what="source")  # every tile's checksum verified; groups summed
    if k is None:
        return None
    if k.ndim not in (2, 4) or k.shape[0] != k.shape[1]:
        raise ValueError(
            f"`source`={path!r} holds a kernel of shape {k.shape}: the report needs K(X, X), "
            "square, in 'trace' or 'full' outputs."
        )
    if np.isnan(k).any():
        raise ValueError(
            f"`source`={path!r} is an incomplete kernel store "
            f"({counted(int(np.isnan(k).sum()), 'entry', 'entries')} not computed): run the "
            "same `ntk(..., store=...)` call again to finish it."
        )
    return np.einsum("ijaa->ij", k) if k.ndim == 4 else k


def source_phrase(made: dict | None) -> str:
    """Where a stored kernel came from, in words, from what the store records (`read_source`)."""
    if made is None:
        return ("not recorded (`ntkcalc kernel` records the checkpoint and model; "
                "`ntk(..., store=...)` does not)")
    step = made.get("step")
    parts = [f"checkpoint {made.get('checkpoint')}" + ("" if step is None else f" step {step}")]
    parts += [f"{key} {made[key]}" for key in ("item", "subtree") if made.get(key) is not None]
    return ", ".join([*parts, f"model {made.get('model')}"])


def _store_sections(path: str, k: np.ndarray, labels, made: dict | None) -> list[_Section]:
    spec = spectrum(k)
    cautions = _numeric_cautions(spec, str(k.dtype))
    summary = [
        f"Kernel store {path}: K(X, X) over {k.shape[0]} examples, {k.dtype}. Source: "
        f"{source_phrase(made)}.",
        f"Spectrum: decay exponent {spec.decay_exponent:.2f}, effective rank "
        f"{spec.effective_rank:.1f}, condition number {_fmt(spec.condition_number)}.",
        f"Cautions: {len(cautions) or 'none'}.",
    ]
    return [
        _Section("summary", "Summary", "", {"lines": summary, "kernel_source": made},
                 items=tuple(summary)),
        _Section("cautions", "Cautions", "" if cautions else "None.", {"items": cautions},
                 items=tuple(cautions)),
        _spectrum_section(spec, ""),
        _heatmap_section({"kernel": k}, np.zeros(k.shape[0], np.int64), ["all examples"],
                         "The stored kernel, in the stored order of examples.")
        if labels is None else _heatmap_section(
            {"kernel": k}, labels, [str(c) for c in range(int(labels.max()) + 1)],
            "The stored kernel, examples grouped by the given class labels. The table gives the "
            "mean kernel value of each pair of classes."),
    ]


def _store_labels(labels, n: int) -> np.ndarray | None:
    """``labels`` validated as (n,) non-negative integer classes of the store's examples."""
    if labels is None:
        return None
    arr = np.asarray(labels)
    if not _checks.is_label_array(arr) or arr.shape != (n,) or np.any(arr < 0):
        raise ValueError(
            f"`labels` must be ({n},) non-negative integer classes, one per example of the "
            f"store, got {arr.dtype} of shape {arr.shape}.")
    return arr.astype(np.int64)


@dataclasses.dataclass(frozen=True, repr=False)
class RunDescription(Result):
    """What the numbers of a run cannot say, for its report: the data, the model, the training.

    Fields:
        title: the report's title (e.g. ``"pump condition demo"``).
        data: what the examples are, a phrase (``"simulated pump readings (seed 0)"``).
        model: the architecture, a phrase (``"MLP 11→512→512→4, tanh"``).
        training: how the run was trained (optimizer, loss), a phrase; may be empty.
        class_names: the names of the O classes (heat map, setup), or None for ``0, 1, ...``.
        details: further ``(label, value)`` rows of the setup section (features, units, ...).
    """

    title: str = "training run"
    data: str = "examples"
    model: str = "model"
    training: str = ""
    class_names: tuple[str, ...] | None = None
    details: tuple[tuple[str, str], ...] = ()

    def __post_init__(self):
        for name in ("title", "data", "model", "training"):
            value = getattr(self, name)
            if not isinstance(value, str):
                raise TypeError(f"`{name}` must be a str, got {type(value).__name__}.")
        names = self.class_names
        if names is not None and not (isinstance(names, tuple)
                                      and all(isinstance(c, str) for c in names)):
            raise TypeError(
                f"`class_names` must be a tuple of str (one per output) or None, got {names!r}.")
        rows = self.details
        if not (isinstance(rows, tuple) and all(
                isinstance(r, tuple) and len(r) == 2 and all(isinstance(v, str) for v in r)
                for r in rows)):
            raise TypeError(
                f"`details` must be a tuple of (label, value) pairs of str, got {rows!r}.")


def _load(source, labels) -> tuple[str, str, list[_Section]]:
    """Path, title and report sections of a kernel store (examples grouped by ``labels``)."""
    if not isinstance(source, str | os.PathLike):
        raise TypeError(
            "`source` must be a `RunAnalysis` (from `analyse_run`) or a kernel store path (str "
            f"or os.PathLike), got {type(source).__name__}."
        )
    path = os.path.abspath(os.fspath(source))
    k = _load_store(path) if os.path.isdir(path) else None
    if k is not None:
        from .._tiles.store import read_source

        return path, "kernel store", _store_sections(path, k, _store_labels(labels, k.shape[0]),
                                                     read_source(path))
    raise FileNotFoundError(
        f"`source`={path!r} is no ntkcalc kernel store: pass the `store` of "
        "`ntk(..., store=...)`, or a `RunAnalysis`."
    )


def _is_run_directory(source) -> bool:
    return isinstance(source, str | os.PathLike) and any(
        os.path.isfile(os.path.join(os.fspath(source), name)) for name in (RESULT, RECORD))


def read_run(directory, *, name: str = "directory") -> tuple[RunAnalysis, RunDescription | None]:
    """The `RunAnalysis` and `RunDescription` (or None) `RunAnalysis.write` saved in
    ``directory``, every field as it was; ``name`` is the argument's, for errors."""
    if not isinstance(directory, str | os.PathLike):
        raise TypeError(f"`{name}` must be a directory path, got {type(directory).__name__}.")
    path = os.path.abspath(os.fspath(directory))
    record = os.path.join(path, RECORD)
    if not os.path.isfile(record) and not os.path.isfile(os.path.join(path, RESULT)):
        raise FileNotFoundError(f"`{name}`={path!r} holds no {RECORD}: pass a directory "
                                "written by `RunAnalysis.write`.")
    if not os.path.isfile(record):
        raise ValueError(
            f"`{name}`={path!r} is a run directory written before results were saved whole: it "
            f"has {RESULT} (the numbers) but no {RECORD}. Call `write` on the `RunAnalysis` "
            "again (`analyse_run`, or `DemoResult.analysis`) to write a directory that reloads."
        )
    try:
        saved = read_record(record)
    except OtherVersionError as err:
        numbers = os.path.join(path, RESULT)
        raise ValueError(
            f"`{name}`={path!r} holds a {RECORD} saved by another version of ntkcalc, which "
            f"this one cannot read ({err}). Re-run the analysis (`analyse_run`, then `write`) "
            "to save it anew"
            + (f"; its numbers are still in {numbers!r}." if os.path.isfile(numbers) else ".")
        ) from None
    except (OSError, ValueError, KeyError, TypeError) as err:
        raise ValueError(f"{record!r} is damaged ({err}): call `write` on the `RunAnalysis` "
                         "again.") from None
    if not (isinstance(saved, dict) and isinstance(saved.get("analysis"), RunAnalysis)
            and isinstance(saved.get("description"), RunDescription | None)):
        raise ValueError(f"{record!r} holds no saved RunAnalysis: call `write` on the "
                         "`RunAnalysis` again.")
    return saved["analysis"], saved["description"]


def _power_law(spec) -> float:
    """The intercept c of ``log λ_i ≈ c − α log i`` over the fit range, given α."""
    first, last = spec.decay_fit_range
    if not math.isfinite(spec.decay_exponent) or last <= first:
        return float("nan")
    i = np.arange(first, last + 1)
    logs = np.log(spec.eigenvalues[first - 1:last])
    return float(np.mean(logs + spec.decay_exponent * np.log(i)))


def _numeric_cautions(spec, dtype: str) -> list[str]:
    """Cautions on conditioning and precision, for any kernel (and the spectrum's own)."""
    out = [] if getattr(spec, "caution", None) is None else [spec.caution]
    cond = spec.condition_number
    if cond is None or not math.isfinite(cond) or cond > COND_WARN:
        out.append(
            f"The kernel is ill-conditioned (condition number {_fmt(cond)}): kernel solves at "
            "small ridges keep few significant digits, and the smallest eigenvalues are at "
            "rounding level."
        )
    if dtype != "float64":
        out.append(
            f"Computed in {dtype}: about 7 significant digits. Small eigenvalues, kernel "
            "distances near 0 and solves at small ridges are unreliable; enable JAX x64 for "
            "float64."
        )
    return out


def _block_means(k: np.ndarray, labels: np.ndarray, classes: int) -> list[list[float]]:
    onehot = np.eye(classes)[labels]
    counts = onehot.sum(axis=0)
    with np.errstate(invalid="ignore"):  # a class with no examples: NaN, null in report.json
        return ((onehot.T @ np.asarray(k) @ onehot) / np.outer(counts, counts)).tolist()


def _spectrum_section(spec, when: str) -> _Section:
    intercept = _power_law(spec)
    numbers = {
        "eigenvalues": spec.eigenvalues.tolist(), "decay_exponent": spec.decay_exponent,
        "decay_fit_range": list(spec.decay_fit_range), "decay_intercept": intercept,
        "effective_rank": spec.effective_rank, "participation_ratio": spec.participation_ratio,
        "condition_number": spec.condition_number, "lambda_min": spec.lambda_min,
        "lambda_max": float(spec.eigenvalues[0]), "numerical_rank": spec.numerical_rank,
        "convergence_rate": spec.convergence_rate,
    }
    return _Section(
        "spectrum", f"Kernel spectrum {when}".strip(),
        "Eigenvalues of the kernel (trace over outputs) against their rank; the line is the "
        "least-squares power law over the listed ranks.", numbers,
        rows=(("decay exponent α", _fmt(spec.decay_exponent)),
              ("fit ranks", f"{spec.decay_fit_range[0]}–{spec.decay_fit_range[1]}"),
              ("largest eigenvalue", _fmt(numbers["lambda_max"])),
              ("smallest eigenvalue", _fmt(spec.lambda_min)),
              ("condition number", _fmt(spec.condition_number)),
              ("effective rank", _fmt(spec.effective_rank)),
              ("participation ratio", _fmt(spec.participation_ratio)),
              ("numerical rank", _fmt(spec.numerical_rank))),
        figures=(plots.png(plots.spectrum_figure(
            spec.eigenvalues, exponent=spec.decay_exponent, fit_range=spec.decay_fit_range,
            intercept=intercept)),),
    )


def _heatmap_section(kernels: dict, labels, names, text: str) -> _Section:
    means = {title: _block_means(k, labels, len(names)) for title, k in kernels.items()}
    pairs = [(a, b) for a in range(len(names)) for b in range(a, len(names))]
    return _Section(
        "heatmap", "The kernel, sorted by class", text,
        {"class_names": list(names), "class_counts": np.bincount(labels).tolist(),
         "block_means": means},
        rows=tuple((f"{names[a]} × {names[b]}", " → ".join(
            f"{m[a][b]:.4g}" for m in means.values())) for a, b in pairs),
        figures=(plots.png(plots.heatmap_figure(kernels, labels, names)),),
    )


def _class_names(a, desc: RunDescription) -> list[str]:
    if desc.class_names is not None:
        if len(desc.class_names) != a.num_outputs:
            raise ValueError(
                f"`description.class_names` has {counted(len(desc.class_names), 'name')}; "
                f"the run has {counted(a.num_outputs, 'output')}. Pass one name per output.")
        return list(desc.class_names)
    return [str(c) for c in range(a.num_outputs)]


def _verdict_head(a) -> str:
    """The caution's first words for a run not called lazy: "Not lazy" or "Laziness not
    resolved" (`Laziness.outcome`)."""
    return "Not lazy" if a.laziness.outcome == "not lazy" else "Laziness not resolved"


def _analysis_cautions(a, spec) -> list[str]:
    out = list(a.cautions)
    if not a.lazy:
        out.append(
            f"{_verdict_head(a)} — the verdict: {a.verdict}. The kernels' forecasts and kernel "
            "ridge estimates describe the network linearized at a checkpoint, not the trained "
            "one."
        )
    # the analysis words the float32 caution itself: the precision caution only for others
    dtype = "float64" if a.dtype == "float32" else a.dtype
    return list(dict.fromkeys(out + _numeric_cautions(spec, dtype)))


def _forecast_numbers(a) -> dict | None:
    """The forecast of the first checkpoint compared with the run (else the first forecast),
    and the end of every forecast; None without forecasts."""
    with_fc = [c for c in a.checkpoints if c.forecast is not None]
    if not with_fc:
        return None
    c = next((c for c in with_fc if c.gap is not None), with_fc[0])
    f = c.forecast
    out = {"from_step": c.step, "kernel": c.kernel, "loss": f.loss, "lr": f.lr,
           "max_stable_lr": f.max_stable_lr, "stable": f.stable,
           "tolerance": a.laziness.gap_threshold, "compared": c.gap is not None}
    if c.gap is None:
        out |= {"steps": c.step + f.steps, "forecast_train_mse": c.train_mse,
                "forecast_test_mse": c.test_mse, "forecast_train_accuracy": f.train_accuracy,
                "forecast_test_accuracy": f.test_accuracy}
    else:
        at = np.searchsorted(f.steps, c.gap_steps - c.step)
        out |= {"steps": c.gap_steps, "train_gap": c.gap, "largest_train_gap": float(np.max(c.gap)),
                "observed_train_mse": c.observed_train_mse, "forecast_train_mse": c.train_mse[at],
                "observed_train_accuracy": c.observed_train_accuracy,
                "forecast_train_accuracy": None if f.train_accuracy is None
                else f.train_accuracy[at]}
        if c.test_gap is not None:
            out |= {"test_gap": c.test_gap, "largest_test_gap": float(np.max(c.test_gap)),
                    "observed_test_mse": c.observed_test_mse, "forecast_test_mse": c.test_mse[at],
                    "observed_test_accuracy": c.observed_test_accuracy,
                    "forecast_test_accuracy": None if f.test_accuracy is None
                    else f.test_accuracy[at]}
    out["from_each_checkpoint"] = [
        {"step": c.step, "kernel": c.kernel, "end_step": c.step + int(c.forecast.steps[-1]),
         "final_train_mse": c.train_mse[-1],
         "final_test_mse": None if c.test_mse is None else c.test_mse[-1]} for c in with_fc]
    return _plain(out)


def _risk_numbers(c) -> dict:
    est = c.risk
    i = int(np.flatnonzero(est.ridges == c.ridge)[0])
    return _plain({
        "step": c.step, "ridges": est.ridges, "gcv": est.gcv, "kare": est.kare, "loo": est.loo,
        "heldout": c.test_mse_by_ridge, "heldout_accuracy": c.test_accuracy_by_ridge,
        "best": dict(est.best), "chosen_ridge": c.ridge, "chosen_by": est.recommended_by,
        "estimators_agree": est.agree, "loo_over_gcv": est.ratio, "gcv_at_chosen": c.gcv,
        "kare_at_chosen": est.kare[i], "loo_at_chosen": c.loo,
        "heldout_at_chosen": c.test_mse_ridge, "heldout_accuracy_at_chosen": c.test_accuracy_ridge,
    })


def _analysis_summary(a, desc, spec, fc, rk, ranks, cautions) -> list[str]:
    d = a.drift
    run = (f"Data and run: {a.num_train} train / {a.num_test} test {desc.data}, "
           f"{counted(a.num_outputs, 'output')}; {desc.model} ({a.num_params:,} parameters, "
           f"{a.dtype}); checkpoints at steps "
           f"{', '.join(map(str, a.steps.tolist()))}")
    run += ("; no forecasts (no learning rate given)." if fc is None else
            f"; forecasts at lr={fc['lr']:.3g} (stability limit {fc['max_stable_lr']:.3g}).")
    if fc is None:
        forecast = "Forecast: none (pass `lr` to `analyse_run`)"
    elif not fc["compared"]:
        forecast = (f"Forecast from the kernel at step {fc['from_step']} (not compared with the "
                    f"run), in {plots.MSE_LABEL}: final train {fc['forecast_train_mse'][-1]:.4f}")
        if fc["forecast_test_mse"] is not None:
            forecast += f", test {fc['forecast_test_mse'][-1]:.4f}"
    else:
        forecast = (f"Forecast from the kernel at step {fc['from_step']} vs the run, in "
                    f"{plots.MSE_LABEL}: final train {fc['observed_train_mse'][-1]:.4f} observed "
                    f"vs {fc['forecast_train_mse'][-1]:.4f} forecast")
        if "observed_test_mse" in fc:
            forecast += (f", test {fc['observed_test_mse'][-1]:.4f} vs "
                         f"{fc['forecast_test_mse'][-1]:.4f}")
        forecast += (f" (train outputs off by up to {fc['largest_train_gap']:.1%} of their "
                     "initial residual")
        forecast += (f", test outputs {fc['largest_test_gap']:.1%})" if "largest_test_gap" in fc
                     else ")")
    forecast += (f"; parameters moved {a.parameter_change:.2%}, label alignment "
                 f"{d.alignment[0]:.3f} → {d.alignment[-1]:.3f}.")
    chooser = "GCV" if rk["chosen_by"] == "gcv" else (
        f"LOO (GCV disagrees with it {rk['loo_over_gcv']:.3g}×, so its ridge is not used)")
    risk_line = (f"Test error without a test set ({plots.MSE_LABEL}), kernel ridge on the kernel "
                 f"at step {rk['step']}: the ridge is chosen by {chooser}: "
                 f"{rk['chosen_ridge']:.3g}, where GCV estimates {rk['gcv_at_chosen']:.4f} and "
                 f"LOO {rk['loo_at_chosen']:.4f}")
    if rk["heldout_at_chosen"] is not None:
        risk_line += f"; kernel ridge on held-out data gives {rk['heldout_at_chosen']:.4f}"
        if rk["heldout_accuracy_at_chosen"] is not None:
            risk_line += f" (accuracy {rk['heldout_accuracy_at_chosen']:.1%})"
    if ranks:
        name, r = list(ranks.items())[-1]
        where = "the readout's input" if r["layer"] in (None, "readout") else r["layer"]
        rank = (f"; features [H, 1] of {where} at {name}: rank {r['rank']} of "
                f"N={r['num_examples']} ("
                f"{'full' if r['full_rank'] else 'not full: a readout alone cannot interpolate'}"
                f", margin {r['margin']:.3g})")
    else:
        rank = "; feature rank not computed"
    return [
        run,
        f"Laziness verdict: {a.verdict}.",
        forecast,
        risk_line + ".",
        f"Spectrum at step {rk['step']}: decay exponent {spec.decay_exponent:.2f}, effective rank "
        f"{spec.effective_rank:.1f} of {spec.eigenvalues.size}{rank}; cautions: "
        f"{len(cautions) or 'none'}.",
    ]


def _rank_section(a) -> tuple[dict, _Section]:
    """(numbers per checkpoint, the section) of the interpolation check."""
    from .study import _rank_numbers  # the one list of a FeatureRank's numbers

    ranks = {f"step {s}": _plain(_rank_numbers(r))
             for s, r in zip(a.steps.tolist(), a.feature_ranks, strict=True) if r is not None}
    return ranks, _Section(
        "feature-rank", "Feature rank: the interpolation check",
        "Numerical rank of [H, 1], the features of a layer over the training set plus a bias "
        "column: full rank (= N) means a linear readout can fit any targets. The margin is "
        "the N-th singular value over the rank tolerance; near 1 the verdict hangs on the "
        "tolerance.", {"checkpoints": ranks},
        rows=tuple(
            (f"{name}: rank / N / columns", f"{r['rank']} / {r['num_examples']} / "
             f"{r['num_features']}  (full rank: {_fmt(r['full_rank'])}, margin "
             f"{_fmt(r['margin'])}, σ_N {_fmt(r['sigma_min'])}, tolerance {_fmt(r['tol'])})")
            for name, r in ranks.items()) or (("not computed", "see the cautions"),),
    )


def _sig(x: float, digits: int) -> str:
    """``x`` to ``digits`` significant digits, without an exponent below 10⁶ ("960", not
    "9.6e+02")."""
    text = f"{x:.{digits}g}"
    return f"{float(text):.0f}" if "e+" in text and abs(x) < 1e6 else text


def _pm(u) -> str:
    """``value ± error`` of a scalar `Uncertain`; where the jackknife's bias estimate exceeds the
    error bar, the bias-corrected value ``value − bias``, saying so (a distance near 0 estimated
    from a ratio of sketched norms is biased by more than its error bar: docs/sketch.md)."""
    v, e, b = float(u.value), float(u.error), float(u.bias)
    if abs(b) > e:
        return f"{_sig(v - b, 4)} ± {_sig(e, 2)} (bias-corrected from {_sig(v, 4)})"
    return f"{_sig(v, 4)} ± {_sig(e, 2)}"


def _top_eigenvalues(c, shown: int = 5) -> str:
    """The top ``shown`` bias-corrected eigenvalues with their error bars, and the runs of them
    the sketch does not tell apart (`clusters`): their sum is estimated, single values are not."""
    from .._analysis.laziness import RESOLVE_BARS
    from .._sketch.analysis import clusters

    u = c.eigenvalues
    text = ", ".join(f"{_sig(float(v), 4)} ± {_sig(float(e), 2)}" for v, e in zip(
        np.asarray(u.corrected)[:shown], np.asarray(u.error)[:shown], strict=True))
    runs = [(a, b) for a, b in clusters(u) if a <= shown]
    if runs:
        one = len(runs) == 1
        text += ("; ranks " + " and ".join(f"{a}–{b}" for a, b in runs)
                 + f" lie within {RESOLVE_BARS:g} error bars of their neighbours: "
                 + ("a cluster" if one else "clusters") + " the sketch does not resolve (read "
                 + ("its" if one else "each one's") + " sum; single values may be off by several "
                 "error bars and out of order; refine_spectrum refines them with exact products)")
    return text


def _sketched_sections(a, desc: RunDescription) -> list[_Section]:
    """The report of a run analysed on sketched features: which kernel and why first, every
    number with its error bar, the answers not computed named."""
    sk = a.sketched
    names = _class_names(a, desc)
    cautions = list(a.cautions)
    if not a.lazy:
        cautions.append(f"{_verdict_head(a)} — the verdict: {a.verdict}.")
    last = sk.checkpoints[-1]
    fit = last.fit
    steps = a.steps.tolist()
    test = ("" if fit.test_mse is None else
            f"; on held-out data {_pm(fit.test_mse)}")
    summary = [
        f"Data and run: {a.num_train} train / {a.num_test} test {desc.data}, "
        f"{counted(a.num_outputs, 'output')}; {desc.model} ({a.num_params:,} parameters, "
        f"{a.dtype}); checkpoints at steps "
        f"{', '.join(map(str, steps))}.",
        f"Kernel: sketched NTK features, k = {sk.k} per example (not the exact kernel): "
        f"{a.choice.reason}. Its numbers are estimates ± one jackknife standard error.",
        f"Laziness verdict (on the bias-corrected sketched relative change and distance): "
        f"{a.verdict}.",
        f"Label alignment {_pm(sk.alignment[0])} → {_pm(sk.alignment[-1])}; kernel relative "
        f"change and distance to step {steps[0]} at step {steps[-1]}: "
        f"{_pm(sk.relative_change[-1])} and {_pm(sk.distance[-1])}.",
        f"Kernel ridge at step {last.step}, ridge {last.ridge:.3g} chosen by GCV: GCV "
        f"{_pm(fit.gcv)}{test} ({plots.MSE_LABEL}).",
        f"Not computed, for want of the exact kernel: {counted(len(sk.refused), 'answer')} "
        f"(see the cautions); cautions: {len(cautions)}.",
    ]
    rows = [("kernel", f"sketched features, k = {sk.k}, seed {sk.seed}"),
            ("why", a.choice.reason)]
    if sk.store is not None:
        rows.append(("features stores", f"{sk.store} ({counted(sk.computed, 'block')} computed "
                                        f"in this call, {sk.reused} reused)"))
    for s, c, d, al in zip(steps, sk.relative_change, sk.distance, sk.alignment, strict=True):
        rows.append((f"step {s}: relative change / distance to step {steps[0]} / alignment",
                     " / ".join("—" if u is None else _pm(u) for u in (c, d, al))))
    for c in sk.checkpoints:
        rows.append((f"step {c.step}: top eigenvalues of the trace kernel (bias-corrected)",
                     _top_eigenvalues(c)))
        rows.append((f"step {c.step}: kernel ridge MSE at ridge {c.ridge:.3g}",
                     f"train {_pm(c.fit.train_mse)}, GCV {_pm(c.fit.gcv)}"
                     + ("" if c.fit.test_mse is None else f", test {_pm(c.fit.test_mse)}")))
    ranks, rank_section = _rank_section(a)
    return [
        _Section("summary", "Summary", "", {"lines": summary, "verdict": a.laziness.to_dict()},
                 items=tuple(summary)),
        _Section("cautions", "Cautions", "Where the numbers below can mislead.",
                 {"items": cautions}, items=tuple(cautions)),
        _Section("sketch", "Answers from sketched features",
                 "Each kernel is estimated by φ φᵀ with φ the sketched NTK features "
                 "(ntk_features); the same seed at every checkpoint, so distances measure the "
                 "kernels' change, not the sketches'. Each ± is one jackknife standard error: "
                 "how much the number varies between independent sketches of this size; a "
                 "held-out MSE also varies with the test examples drawn, which it does not "
                 f"include. Errors: {plots.MSE_LABEL}.",
                 {**sk.to_dict(), "choice": a.choice.to_dict()}, rows=tuple(rows)),
        rank_section,
        _setup_section(a, desc, names),
    ]


def _analysis_sections(a, desc: RunDescription) -> list[_Section]:
    if a.sketched is not None:
        return _sketched_sections(a, desc)
    names = _class_names(a, desc)
    first, last = a.checkpoints[0], a.checkpoints[-1]
    spec = first.spectrum
    cautions = _analysis_cautions(a, spec)
    fc, rk = _forecast_numbers(a), _risk_numbers(first)
    ranks, rank_section = _rank_section(a)
    summary = _analysis_summary(a, desc, spec, fc, rk, ranks, cautions)
    d = a.drift
    spread = d.laziness.spread
    steps0, steps1 = int(a.steps[0]), int(a.steps[-1])
    labels = np.zeros(a.num_train, np.int64) if a.labels is None else a.labels
    verdict = a.laziness.to_dict()
    return [
        _Section("summary", "Summary", "", {"lines": summary, "verdict": verdict},
                 items=tuple(summary)),
        _Section("cautions", "Cautions",
                 "Where the numbers below can mislead." if cautions else
                 "None: the run is lazy, the kernel well-conditioned, and the computation in "
                 "float64.", {"items": cautions}, items=tuple(cautions)),
        _spectrum_section(spec, f"at step {first.step}"),
        _heatmap_section(
            {f"step {steps0}": d.kernels[0], f"step {steps1}": d.kernels[-1]}, labels,
            ["all examples"] if a.labels is None else names,
            f"Train-train trace kernel at steps {steps0} and {steps1}, examples grouped by class. "
            f"The table gives the mean kernel value of each pair of classes, at step {steps0} → "
            f"at step {steps1}."),
        _drift_section(a, spread),
        _groups_section(a),
        _forecast_section(a, fc),
        _risk_section(rk, last),
        rank_section,
        _setup_section(a, desc, names),
    ]


def _drift_section(a, spread) -> _Section:
    d = a.drift
    numbers = _plain({
        "steps": d.steps, "relative_change": d.relative_change,
        "kernel_distance": d.distance_to_initial, "alignment": d.alignment,
        "threshold": d.threshold,
        "init_spread": None if spread is None else dataclasses.asdict(spread),
        "parameter_change": a.parameter_change, "verdict": a.verdict})
    return _Section(
        "drift", "Kernel drift and alignment over training",
        "The laziness criteria on the kernel: relative change ‖Θ_t − Θ₀‖/‖Θ₀‖ and distance "
        "1 − ⟨Θ₀, Θ_t⟩/(‖Θ₀‖‖Θ_t‖) to the first checkpoint's kernel at each checkpoint, against "
        "the threshold and against the same quantities between kernels of independent "
        "initializations (what the random initialization alone changes); and the centered "
        "alignment of Θ_t with the one-hot labels.", numbers,
        rows=(*((f"step {s}", f"relative change {c:.4g}, distance {x:.4g}, alignment {b:.4f}")
                for s, c, x, b in zip(numbers["steps"], numbers["relative_change"],
                                      numbers["kernel_distance"], numbers["alignment"],
                                      strict=True)),
              ("threshold", _fmt(d.threshold)),
              *(() if spread is None else ((
                  f"between {spread.count} independent initializations",
                  f"relative change {spread.relative_change:.4g}, distance "
                  f"{spread.distance:.4g}"),)),
              ("‖θ_T − θ₀‖ / ‖θ₀‖", _fmt(a.parameter_change)),
              ("verdict", a.verdict)),
        figures=(plots.png(plots.drift_figure(
            d.steps, relative_change=d.relative_change, distance=d.distance_to_initial,
            alignment=d.alignment, threshold=d.threshold, spread=None if spread is None else (
                spread.relative_change, spread.distance))),),
    )


def _groups_section(a) -> _Section:
    groups = [_plain(dataclasses.asdict(g)) for g in a.groups]
    return _Section(
        "groups", "Which parameter groups moved",
        "The trace kernel of each top-level parameter group at the first and the last "
        "checkpoint: its relative change, and its share of the whole kernel's trace.",
        {"groups": groups, "threshold": a.drift.threshold},
        rows=tuple((g["group"], f"relative change {_fmt(g['relative_change'])}, share of the "
                    f"trace {g['share_first']:.4g} → {g['share_last']:.4g}, moved: "
                    f"{_fmt(g['moved'])}") for g in groups),
    )


def _forecast_section(a, fc: dict | None) -> _Section:
    title = "Forecast vs actual training"
    if fc is None:
        return _Section("forecast", title, "No forecast: `analyse_run` was given no learning "
                        "rate.", {"verdict": a.verdict})
    s = fc["from_step"]
    rows = []
    if fc["compared"]:
        rows += [("largest gap, train outputs (relative to ‖f_t − y‖)",
                  f"{fc['largest_train_gap']:.2%}")]
        if "largest_test_gap" in fc:
            rows += [("largest gap, test outputs (relative to ‖f_t − y‖)",
                      f"{fc['largest_test_gap']:.2%}")]
        rows += [("threshold on the train gap", _fmt(fc["tolerance"])), ("verdict", a.verdict),
                 ("final train MSE: observed / forecast",
                  f"{fc['observed_train_mse'][-1]:.4g} / {fc['forecast_train_mse'][-1]:.4g}")]
        if "observed_test_mse" in fc:
            rows += [("final test MSE: observed / forecast",
                      f"{fc['observed_test_mse'][-1]:.4g} / {fc['forecast_test_mse'][-1]:.4g}")]
        if fc.get("observed_test_accuracy") is not None:
            rows += [("final test accuracy: observed / forecast",
                      f"{fc['observed_test_accuracy'][-1]:.1%} / "
                      f"{fc['forecast_test_accuracy'][-1]:.1%}")]
    rows += [(f"forecast from step {e['step']} to step {e['end_step']}: final train / test MSE",
              f"{e['final_train_mse']:.4g} / {_fmt(e['final_test_mse'])}")
             for e in fc["from_each_checkpoint"]]
    rows += [("learning rate / stability limit 2N/λ_max",
              f"{fc['lr']:.4g} / {fc['max_stable_lr']:.4g}")]
    figures = () if not fc["compared"] else (plots.png(plots.forecast_figure(
        fc["steps"], observed_train=fc["observed_train_mse"],
        forecast_train=fc["forecast_train_mse"], observed_test=fc.get("observed_test_mse"),
        forecast_test=fc.get("forecast_test_mse"), train_gap=fc["train_gap"],
        test_gap=fc.get("test_gap"), threshold=fc["tolerance"], start=s)),)
    return _Section(
        "forecast", title,
        f"Gradient descent on the network linearized at step {s}, forecast from that "
        f"checkpoint's kernel ({fc['kernel']}) with the run's learning rate, against the outputs "
        "recorded while training. The gap ‖f_obs − f_lin‖/‖f_t − y‖ on the training outputs is "
        f"the verdict's forecast criterion. Errors: {plots.MSE_LABEL}.",
        fc | {"verdict": a.verdict}, rows=tuple(rows), figures=figures)


def _risk_section(rk: dict, last) -> _Section:
    rows = [("chosen ridge", f"{_fmt(rk['chosen_ridge'])} (by {rk['chosen_by'].upper()})"),
            ("LOO / GCV at GCV's ridge (agree within 2×)",
             f"{rk['loo_over_gcv']:.4g} ({_fmt(rk['estimators_agree'])})"),
            ("GCV / KARE / LOO MSE at the chosen ridge",
             f"{rk['gcv_at_chosen']:.4g} / {rk['kare_at_chosen']:.4g} / "
             f"{rk['loo_at_chosen']:.4g}"),
            ("best ridges: GCV / KARE / LOO",
             " / ".join(_fmt(rk["best"][k]) for k in ("gcv", "kare", "loo")))]
    if rk["heldout_at_chosen"] is not None:
        rows.insert(3, ("held-out MSE at the chosen ridge", _fmt(rk["heldout_at_chosen"])))
    if rk["heldout_accuracy_at_chosen"] is not None:
        rows.insert(4, ("held-out accuracy at the chosen ridge",
                        f"{rk['heldout_accuracy_at_chosen']:.1%}"))
    at_last = None
    if last.step != rk["step"]:
        at_last = _risk_numbers(last)
        held = at_last["heldout_at_chosen"]
        rows.append((f"with the step-{last.step} kernel: ridge, GCV / LOO MSE, held-out MSE",
                     f"{at_last['chosen_ridge']:.4g} (by {at_last['chosen_by'].upper()}), "
                     f"{at_last['gcv_at_chosen']:.4g} / {at_last['loo_at_chosen']:.4g}, "
                     f"{_fmt(held)}"))
    return _Section(
        "risk", "Test error without a test set",
        f"Kernel ridge regression on the trace kernel at step {rk['step']} with one-hot targets. "
        "GCV, KARE and leave-one-out estimate its test error from the training set alone; the "
        "held-out curve is its error on the test set. The ridge is GCV's, or LOO's when LOO and "
        f"GCV differ by more than a factor 2 at GCV's ridge. Errors: {plots.MSE_LABEL}.",
        rk | {"last_checkpoint": at_last}, rows=tuple(rows),
        figures=(plots.png(plots.risk_figure(
            rk["ridges"], gcv=rk["gcv"], kare=rk["kare"], loo=rk["loo"], heldout=rk["heldout"],
            chosen=rk["chosen_ridge"])),),
    )


def _setup_section(a, desc: RunDescription, names: list[str]) -> _Section:
    counts = None if a.labels is None else np.bincount(a.labels, minlength=a.num_outputs).tolist()
    numbers = _plain({
        "title": desc.title, "data": desc.data, "model": desc.model, "training": desc.training,
        "class_names": names, "class_counts": counts, "num_train": a.num_train,
        "num_test": a.num_test, "num_outputs": a.num_outputs, "num_params": a.num_params,
        "checkpoint_steps": a.steps, "kinds": a.kinds, "dtype": a.dtype,
        "kernel_choice": None if a.choice is None else a.choice.to_dict(),
        "details": [list(r) for r in desc.details]})
    classes = ", ".join(names if counts is None else
                        (f"{c} ({k})" for c, k in zip(names, counts, strict=True)))
    return _Section(
        "setup", "Setup", "", numbers,
        rows=(("data", f"{a.num_train} train / {a.num_test} test {desc.data}"),
              ("model", desc.model), ("parameters", _fmt(a.num_params)),
              *((("training", desc.training),) if desc.training else ()),
              ("outputs (classes, train counts)", classes),
              ("checkpoint steps", ", ".join(map(str, a.steps.tolist()))),
              ("the kernel behind each answer", "; ".join(f"{k}: {v}"
                                                          for k, v in a.kinds.items())),
              ("precision", a.dtype), *desc.details),
    )


def _render(section: _Section) -> str:
    parts = [f'<section id="{section.id}">', f"<h2>{html.escape(section.title)}</h2>"]
    if section.text:
        parts.append(f"<p>{html.escape(section.text)}</p>")
    if section.items:
        tag, cls = ("ol", "summary") if section.id == "summary" else ("ul", "cautions")
        parts.append(f'<{tag} class="{cls}">' + "".join(
            f"<li>{html.escape(t)}</li>" for t in section.items) + f"</{tag}>")
    for fig in section.figures:
        data = base64.b64encode(fig).decode("ascii")
        parts.append(f'<img alt="{html.escape(section.title)}" src="data:image/png;base64,{data}">')
    if section.rows:
        parts.append("<table>" + "".join(
            f'<tr><th>{html.escape(a)}</th><td class="num">{html.escape(b)}</td></tr>'
            for a, b in section.rows) + "</table>")
    parts.append("</section>")
    return "\n".join(parts)


def write_report(source, *, out=None, description: RunDescription | None = None,
                 labels=None) -> tuple[str, str]:
    """Write ``report.html`` and ``report.json`` for a run or a kernel store.

    Args:
        source: a `RunAnalysis` (from `analyse_run`); a directory `RunAnalysis.write` wrote (the
            result read back with `RunAnalysis.read`, the report written again); or a kernel
            store of K(X, X) written by ``ntk(..., store=...)``.
        out: directory for the two files (created); required for a `RunAnalysis`, default the
            run directory's or the store's own directory.
        description: for a `RunAnalysis`, a `RunDescription` of the data, model and training
            (default: the one saved in a run directory, else a generic one).
        labels: for a kernel store, (N,) integer classes of its examples: the heat map is then
            sorted by class with the mean kernel of each pair of classes (a `RunAnalysis` knows
            its labels).

    Returns:
        ``(html_path, json_path)``, absolute paths.
    """
    if out is not None and not isinstance(out, str | os.PathLike):
        raise TypeError(f"`out` must be a directory path or None, got {type(out).__name__}.")
    if description is not None and not isinstance(description, RunDescription):
        raise TypeError(
            f"`description` must be a RunDescription or None, got {type(description).__name__}.")
    if _is_run_directory(source):
        out = source if out is None else out
        source, saved = read_run(source, name="source")
        description = saved if description is None else description
    if isinstance(source, RunAnalysis):
        if out is None:
            raise ValueError("`out` is required for a RunAnalysis: the directory to write into.")
        if labels is not None:
            raise ValueError("`labels` are for a kernel store; a RunAnalysis has its own.")
        desc = RunDescription() if description is None else description
        path, what, sections = "RunAnalysis", desc.title, _analysis_sections(source, desc)
    else:
        if description is not None:
            raise ValueError("`description` describes a RunAnalysis; a kernel store has none.")
        path, what, sections = _load(source, labels)
    target = path if out is None else os.path.abspath(os.fspath(out))
    if os.path.exists(target) and not os.path.isdir(target):
        raise ValueError(
            f"`out`={target!r} exists and is not a directory; pass a new or writable directory.")
    os.makedirs(target, exist_ok=True)
    title = f"ntkcalc report: {what}"
    page = "\n".join([
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        f"<title>{html.escape(title)}</title><style>{_CSS}</style></head><body>",
        f"<h1>{html.escape(title)}</h1>",
        f'<p class="meta">ntkcalc {__version__} · source {html.escape(path)}</p>',
        *(_render(s) for s in sections), "</body></html>",
    ])
    by_id = {s.id: s.numbers for s in sections}
    document = {
        "title": title, "ntkcalc_version": __version__, "source": path,
        "summary": by_id["summary"]["lines"], "verdict": by_id["summary"].get("verdict"),
        "kernel_source": by_id["summary"].get("kernel_source"),
        "cautions": by_id["cautions"]["items"],
        "sections": {s.id: s.numbers for s in sections if s.id not in ("summary", "cautions")},
    }
    html_path = os.path.join(target, "report.html")
    json_path = os.path.join(target, "report.json")
    with open(html_path, "w", encoding="utf-8") as fh:
        fh.write(page)
    with open(json_path, "w", encoding="utf-8") as fh:
        json.dump(_plain(document), fh, indent=1, ensure_ascii=False, allow_nan=False)
    return html_path, json_path
