"""The report of a run: one self-contained HTML page and a JSON file with every number it shows.

A run directory holds what `run_demo` saved: ``results.json`` (numbers, curves, settings, the
laziness verdict, and the RuntimeWarnings the analysis raised) and ``arrays.npz`` (the initial and
final train kernels and the training labels). The report computes the spectrum of the initial
kernel itself, derives the cautions from the numbers (a non-lazy run, an ill-conditioned kernel,
float32) and writes:

- ``report.html``: sections, in order, with these ids: ``summary``, ``cautions``, ``spectrum``,
  ``heatmap``, ``drift``, ``forecast``, ``risk``, ``feature-rank``, ``setup``; every figure an
  embedded base64 PNG;
- ``report.json``: ``{"summary": [5 lines], "verdict": {...}, "cautions": [...], "sections":
  {id: numbers}}``.

The report says one thing: a single laziness verdict (`ntkcalc.laziness`, saved by the run) is
quoted in the summary, the cautions and the sections; every number shown is in report.json; and
every error is one convention, MSE = mean over examples and outputs of (f − y)², named in each
label (`plots.MSE_LABEL`).

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

from .. import __version__
from .._analysis import spectrum
from .._analysis._checks import COND_WARN
from . import plots

SECTIONS = ("summary", "cautions", "spectrum", "heatmap", "drift", "forecast", "risk",
            "feature-rank", "setup")

RESULTS = "results.json"
ARRAYS = "arrays.npz"

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
            f"`source`={path!r} is an incomplete kernel store ({int(np.isnan(k).sum())} entries "
            "not computed): run the same `ntk(..., store=...)` call again to finish it."
        )
    return np.einsum("ijaa->ij", k) if k.ndim == 4 else k


def _store_sections(path: str, k: np.ndarray) -> list[_Section]:
    spec = spectrum(k)
    cautions = _numeric_cautions(spec, str(k.dtype))
    summary = [
        f"Kernel store {path}: K(X, X) over {k.shape[0]} examples, {k.dtype}.",
        f"Spectrum: decay exponent {spec.decay_exponent:.2f}, effective rank "
        f"{spec.effective_rank:.1f}, condition number {_fmt(spec.condition_number)}.",
        f"Cautions: {len(cautions) or 'none'}.",
    ]
    return [
        _Section("summary", "Summary", "", {"lines": summary}, items=tuple(summary)),
        _Section("cautions", "Cautions", "" if cautions else "None.", {"items": cautions},
                 items=tuple(cautions)),
        _spectrum_section(spec, ""),
        _heatmap_section({"kernel": k}, np.zeros(k.shape[0], np.int64), ["all examples"],
                         "The stored kernel, in the stored order of examples."),
    ]


def _load(source) -> tuple[str, str, list[_Section]]:
    """Path, title and report sections of a demo run directory or a kernel store."""
    if not isinstance(source, str | os.PathLike):
        raise TypeError(
            f"`source` must be a run directory or kernel store path (str or os.PathLike), got "
            f"{type(source).__name__}."
        )
    path = os.path.abspath(os.fspath(source))
    results_path = os.path.join(path, RESULTS)
    if not os.path.isfile(results_path):
        k = _load_store(path) if os.path.isdir(path) else None
        if k is not None:
            return path, "kernel store", _store_sections(path, k)
        raise FileNotFoundError(
            f"`source`={path!r} holds no {RESULTS} and is no ntkcalc kernel store: pass the "
            "directory `run_demo` wrote, or the `store` of `ntk(..., store=...)`."
        )
    with open(results_path, encoding="utf-8") as fh:
        results = json.load(fh)
    if results.get("kind") != "demo":
        raise ValueError(
            f"`source`={path!r}: {RESULTS} has kind {results.get('kind')!r}; only runs written "
            "by `run_demo` (kind 'demo') are reported."
        )
    with np.load(os.path.join(path, ARRAYS)) as arrays:
        return path, "pump condition demo", _sections(results, {k: arrays[k] for k in arrays.files})


def _power_law(spec) -> float:
    """The intercept c of ``log λ_i ≈ c − α log i`` over the fit range, given α."""
    first, last = spec.decay_fit_range
    if not math.isfinite(spec.decay_exponent) or last <= first:
        return float("nan")
    i = np.arange(first, last + 1)
    logs = np.log(spec.eigenvalues[first - 1:last])
    return float(np.mean(logs + spec.decay_exponent * np.log(i)))


def _cautions(results: dict, spec) -> list[str]:
    out = list(results["cautions"])
    verdict = results["laziness"]
    if not verdict["lazy"]:
        out.append(
            f"Not lazy — the verdict: {verdict['sentence']}. The initial kernel's forecasts and "
            "kernel ridge estimates describe the network linearized at initialization, not the "
            "trained one."
        )
    return list(dict.fromkeys(out + _numeric_cautions(spec, results["dtype"])))


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


def _summary(results: dict, spec, cautions: list[str]) -> list[str]:
    d, mdl, tr, fc = results["data"], results["model"], results["training"], results["forecast"]
    dr, rk, verdict = results["drift"], results["risk"], results["laziness"]
    fr = list(results["feature_rank"]["checkpoints"].values())[-1]
    chooser = "GCV" if rk["chosen_by"] == "gcv" else (
        f"LOO (GCV disagrees with it {rk['loo_over_gcv']:.3g}×, so its ridge is not used)")
    return [
        f"Data and run: {d['n_train']} train / {d['n_test']} test simulated pump readings in "
        f"{len(d['class_names'])} conditions; {mdl['architecture']} ({mdl['parameters']:,} "
        f"parameters, {results['dtype']}); {tr['steps']} full-batch GD steps at lr={tr['lr']:.3g} "
        f"(stability limit {tr['max_stable_lr']:.3g}).",
        f"Laziness verdict: {verdict['sentence']}.",
        f"Forecast from the initial kernel vs the run, in {plots.MSE_LABEL}: final train "
        f"{fc['observed_train_mse'][-1]:.4f} observed vs {fc['forecast_train_mse'][-1]:.4f} "
        f"forecast, test {fc['observed_test_mse'][-1]:.4f} vs {fc['forecast_test_mse'][-1]:.4f} "
        f"(test outputs off by up to {fc['largest_test_gap']:.1%} of their initial residual); "
        f"parameters moved {tr['parameter_change']:.2%}, label alignment "
        f"{dr['alignment'][0]:.3f} → {dr['alignment'][-1]:.3f}.",
        f"Test error without a test set ({plots.MSE_LABEL}): the ridge is chosen by {chooser}: "
        f"{rk['chosen_ridge']:.3g}, where GCV estimates {rk['gcv_at_chosen']:.4f} and LOO "
        f"{rk['loo_at_chosen']:.4f}; kernel ridge on held-out data gives "
        f"{rk['heldout_at_chosen']:.4f} (accuracy {rk['heldout_accuracy_at_chosen']:.1%}).",
        f"Spectrum: decay exponent {spec.decay_exponent:.2f}, effective rank "
        f"{spec.effective_rank:.1f} of {spec.eigenvalues.size}; last hidden features [H, 1] "
        f"have rank {fr['rank']} of N={fr['num_examples']} ("
        f"{'full' if fr['full_rank'] else 'not full: a readout alone cannot interpolate'}, "
        f"margin {fr['margin']:.3g}); cautions: {len(cautions) or 'none'}.",
    ]


def _block_means(k: np.ndarray, labels: np.ndarray, classes: int) -> list[list[float]]:
    onehot = np.eye(classes)[labels]
    counts = onehot.sum(axis=0)
    return ((onehot.T @ k @ onehot) / np.outer(counts, counts)).tolist()


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


def _sections(results: dict, arrays: dict) -> list[_Section]:
    k0, k1, labels = arrays["k_init"], arrays["k_final"], arrays["labels"]
    spec = spectrum(k0)
    cautions = _cautions(results, spec)
    summary = _summary(results, spec, cautions)
    d, tr, fc, dr, rk, fr, verdict = (results[k] for k in (
        "data", "training", "forecast", "drift", "risk", "feature_rank", "laziness"))
    names = d["class_names"]
    last = tr["steps"]
    idx = int(np.argmin(np.abs(np.asarray(rk["ridges"]) - rk["chosen_ridge"])))
    spread = dr.get("init_spread")
    return [
        _Section("summary", "Summary", "", {"lines": summary, "verdict": verdict},
                 items=tuple(summary)),
        _Section("cautions", "Cautions",
                 "Where the numbers below can mislead." if cautions else
                 "None: the run is lazy, the kernel well-conditioned, and the computation in "
                 "float64.", {"items": cautions}, items=tuple(cautions)),
        _spectrum_section(spec, "at initialization"),
        _heatmap_section(
            {"initialization": k0, f"step {last}": k1}, labels, names,
            f"Train-train kernel at initialization and after {last} steps, examples grouped by "
            "condition. The table gives the mean kernel value of each pair of classes, at "
            "initialization → at the last step."),
        _Section(
            "drift", "Kernel drift and alignment over training",
            "The laziness criteria on the kernel: relative change ‖Θ_t − Θ₀‖/‖Θ₀‖ and distance "
            "1 − ⟨Θ₀, Θ_t⟩/(‖Θ₀‖‖Θ_t‖) to the initial kernel at each saved checkpoint, against "
            "the threshold and against the same quantities between kernels of independent "
            "initializations (what the random initialization alone changes); and the centered "
            "alignment of Θ_t with the one-hot labels.",
            {"steps": dr["steps"], "relative_change": dr["relative_change"],
             "kernel_distance": dr["kernel_distance"], "alignment": dr["alignment"],
             "threshold": dr["threshold"], "init_spread": spread,
             "parameter_change": tr["parameter_change"], "verdict": verdict["sentence"]},
            rows=(*((f"step {s}", f"relative change {c:.4g}, distance {a:.4g}, alignment {b:.4f}")
                    for s, c, a, b in zip(dr["steps"], dr["relative_change"],
                                          dr["kernel_distance"], dr["alignment"], strict=True)),
                  ("threshold", _fmt(dr["threshold"])),
                  *(() if spread is None else ((
                      f"between {spread['count']} independent initializations",
                      f"relative change {spread['relative_change']:.4g}, distance "
                      f"{spread['distance']:.4g}"),)),
                  ("‖θ_T − θ₀‖ / ‖θ₀‖", _fmt(tr["parameter_change"])),
                  ("verdict", verdict["sentence"])),
            figures=(plots.png(plots.drift_figure(
                dr["steps"], relative_change=dr["relative_change"],
                distance=dr["kernel_distance"], alignment=dr["alignment"],
                threshold=dr["threshold"], spread=None if spread is None else (
                    spread["relative_change"], spread["distance"]))),),
        ),
        _Section(
            "forecast", "Forecast vs actual training",
            "Gradient descent on the network linearized at initialization, forecast from the "
            "initial kernel (all output pairs) with the same learning rate and steps, against "
            "the outputs measured while training. The gap ‖f_obs − f_lin‖/‖f_0 − y‖ on the "
            f"training outputs is the verdict's forecast criterion. Errors: {plots.MSE_LABEL}.",
            {k: fc[k] for k in fc} | {"lr": tr["lr"], "max_stable_lr": tr["max_stable_lr"],
                                      "verdict": verdict["sentence"]},
            rows=(("largest gap, train outputs (relative to ‖f_0 − y‖)",
                   f"{fc['largest_train_gap']:.2%}"),
                  ("largest gap, test outputs (relative to ‖f_0 − y‖)",
                   f"{fc['largest_test_gap']:.2%}"),
                  ("threshold on the train gap", _fmt(fc["tolerance"])),
                  ("verdict", verdict["sentence"]),
                  ("final train MSE: observed / forecast",
                   f"{fc['observed_train_mse'][-1]:.4g} / {fc['forecast_train_mse'][-1]:.4g}"),
                  ("final test MSE: observed / forecast",
                   f"{fc['observed_test_mse'][-1]:.4g} / {fc['forecast_test_mse'][-1]:.4g}"),
                  ("final test accuracy: observed / forecast",
                   f"{fc['observed_test_accuracy'][-1]:.1%} / "
                   f"{fc['forecast_test_accuracy'][-1]:.1%}"),
                  ("learning rate / stability limit 2N/λ_max",
                   f"{tr['lr']:.4g} / {tr['max_stable_lr']:.4g}")),
            figures=(plots.png(plots.forecast_figure(
                fc["steps"], observed_train=fc["observed_train_mse"],
                forecast_train=fc["forecast_train_mse"], observed_test=fc["observed_test_mse"],
                forecast_test=fc["forecast_test_mse"], train_gap=fc["train_gap"],
                test_gap=fc["test_gap"], threshold=fc["tolerance"])),),
        ),
        _Section(
            "risk", "Test error without a test set",
            "Kernel ridge regression on the initial kernel with one-hot targets. GCV, KARE and "
            "leave-one-out estimate its test error from the training set alone; the held-out "
            "curve is its error on the test set. The ridge is GCV's, or LOO's when LOO and GCV "
            f"differ by more than a factor 2 at GCV's ridge. Errors: {plots.MSE_LABEL}.",
            dict(rk),
            rows=(("chosen ridge", f"{_fmt(rk['chosen_ridge'])} (by {rk['chosen_by'].upper()})"),
                  ("LOO / GCV at GCV's ridge (agree within 2×)",
                   f"{rk['loo_over_gcv']:.4g} ({_fmt(rk['estimators_agree'])})"),
                  ("GCV / KARE / LOO MSE at the chosen ridge",
                   f"{rk['gcv_at_chosen']:.4g} / {rk['kare'][idx]:.4g} / "
                   f"{rk['loo_at_chosen']:.4g}"),
                  ("held-out MSE at the chosen ridge", _fmt(rk["heldout_at_chosen"])),
                  ("held-out accuracy at the chosen ridge",
                   f"{rk['heldout_accuracy_at_chosen']:.1%}"),
                  ("best ridges: GCV / KARE / LOO", " / ".join(
                      _fmt(rk["best"][k]) for k in ("gcv", "kare", "loo"))),
                  (f"held-out MSE / accuracy with the step-{last} kernel",
                   f"{rk['final_kernel_heldout']:.4g} / "
                   f"{rk['final_kernel_heldout_accuracy']:.1%}")),
            figures=(plots.png(plots.risk_figure(
                rk["ridges"], gcv=rk["gcv"], kare=rk["kare"], loo=rk["loo"],
                heldout=rk["heldout"], chosen=rk["chosen_ridge"])),),
        ),
        _Section(
            "feature-rank", "Feature rank of the last hidden layer",
            "Numerical rank of [H, 1], the last hidden layer's features over the training set "
            "plus a bias column: full rank (= N) means a linear readout can fit any targets. The "
            "margin is the N-th singular value over the rank tolerance; near 1 the verdict hangs "
            "on the tolerance.", dict(fr),
            rows=tuple(
                (f"{name}: rank / N / columns", f"{r['rank']} / {r['num_examples']} / "
                 f"{r['num_features']}  (full rank: {_fmt(r['full_rank'])}, margin "
                 f"{_fmt(r['margin'])}, σ_N {_fmt(r['sigma_min'])}, tolerance {_fmt(r['tol'])})")
                for name, r in fr["checkpoints"].items()),
        ),
        _Section(
            "setup", "Setup", "", {k: results[k] for k in ("data", "model", "training")}
            | {"dtype": results["dtype"], "scale": results["scale"]},
            rows=(("scenario", d["scenario"]), ("features", ", ".join(
                f"{f} [{u}]" for f, u in zip(d["features"], d["units"], strict=True))),
                  ("classes", ", ".join(f"{c} ({k})" for c, k in zip(names, d["train_counts"],
                                                                     strict=True))),
                  ("model", results["model"]["architecture"]),
                  ("parameters", _fmt(results["model"]["parameters"])),
                  ("training loss", tr["loss"]), ("optimizer", tr["optimizer"]),
                  ("checkpoint steps", ", ".join(map(str, tr["checkpoint_steps"]))),
                  ("precision", results["dtype"]), ("scale", results["scale"])),
        ),
    ]


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


def _finite_or_none(value):
    """JSON has no inf/NaN: they become None (and are listed by name in the caution text)."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _finite_or_none(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_finite_or_none(v) for v in value]
    return value


def write_report(source, *, out=None) -> tuple[str, str]:
    """Write ``report.html`` and ``report.json`` for a run directory.

    Args:
        source: the directory `run_demo` wrote (with ``results.json`` and ``arrays.npz``), or a
            kernel store of K(X, X) written by ``ntk(..., store=...)``.
        out: directory for the two files (created); default ``source``.

    Returns:
        ``(html_path, json_path)``, absolute paths.
    """
    path, what, sections = _load(source)
    if out is not None and not isinstance(out, str | os.PathLike):
        raise TypeError(f"`out` must be a directory path or None, got {type(out).__name__}.")
    target = path if out is None else os.path.abspath(os.fspath(out))
    os.makedirs(target, exist_ok=True)
    title = f"ntkcalc report: {what}"
    page = "\n".join([
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        f"<title>{html.escape(title)}</title><style>{_CSS}</style></head><body>",
        f"<h1>{html.escape(title)}</h1>",
        f'<p class="meta">ntkcalc {__version__} · run directory {html.escape(path)}</p>',
        *(_render(s) for s in sections), "</body></html>",
    ])
    by_id = {s.id: s.numbers for s in sections}
    document = {
        "title": title, "ntkcalc_version": __version__, "source": path,
        "summary": by_id["summary"]["lines"], "verdict": by_id["summary"].get("verdict"),
        "cautions": by_id["cautions"]["items"],
        "sections": {s.id: s.numbers for s in sections if s.id not in ("summary", "cautions")},
    }
    html_path = os.path.join(target, "report.html")
    json_path = os.path.join(target, "report.json")
    with open(html_path, "w", encoding="utf-8") as fh:
        fh.write(page)
    with open(json_path, "w", encoding="utf-8") as fh:
        json.dump(_finite_or_none(document), fh, indent=1, ensure_ascii=False, allow_nan=False)
    return html_path, json_path
