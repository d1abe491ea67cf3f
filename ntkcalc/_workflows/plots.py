"""The figures of the report, drawn with matplotlib's Agg canvas (no display, no pyplot state).

Each function takes plain arrays and returns a `matplotlib.figure.Figure`; `png` turns one into
PNG bytes. Colors: one blue for what was observed or computed, one orange for forecasts and
estimates, grey for reference lines.
"""

from __future__ import annotations

import io
import textwrap

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

OBSERVED = "#1f5fa8"
ESTIMATE = "#d9731a"
THIRD = "#3a8f4b"
REFERENCE = "#777777"

#: The report's one error convention, named in every label that shows an error.
MSE_LABEL = "MSE: mean over examples and outputs of (f − y)²"

#: Characters per line of a y-axis label: a longer one runs past a 3.6-inch-high figure (the
#: report's) and is clipped, so it is broken into lines at spaces.
AXIS_LINE = 30


def axis_label(text: str) -> str:
    """``text`` broken at spaces into lines of at most `AXIS_LINE` characters, so a long y-axis
    label (`MSE_LABEL`) fits beside the axes instead of being clipped at the figure's edges."""
    return "\n".join(textwrap.wrap(text, AXIS_LINE, break_long_words=False)) or text


def _figure(width: float = 6.4, height: float = 3.6, *, cols: int = 1) -> tuple[Figure, list]:
    fig = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(fig)
    axes = [fig.add_subplot(1, cols, i + 1) for i in range(cols)]
    for ax in axes:
        ax.grid(True, which="major", color="#dddddd", linewidth=0.6)
        ax.set_axisbelow(True)
    return fig, axes


def _label(ax, x: str, y: str, title: str, *, legend: bool = False) -> None:
    ax.set_xlabel(x)
    ax.set_ylabel(axis_label(y))
    ax.set_title(title)
    if legend:
        ax.legend(frameon=False, fontsize=8)


def png(fig: Figure, *, dpi: int = 110) -> bytes:
    """The figure as PNG bytes."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    return buf.getvalue()


def spectrum_figure(eigenvalues, *, exponent: float, fit_range: tuple[int, int],
                    intercept: float) -> Figure:
    """Eigenvalue against rank on log-log axes, with the fit ``λ_i ≈ e^c · i^(−α)``.

    Args:
        eigenvalues: (n,) descending; non-positive ones are left out of the log plot.
        exponent: α; fit_range: (first, last) 1-based ranks of the fit; intercept: c.
    """
    w = np.asarray(eigenvalues, dtype=np.float64)
    ranks = np.arange(1, w.size + 1)
    keep = w > 0
    fig, (ax,) = _figure()
    ax.loglog(ranks[keep], w[keep], ".", color=OBSERVED, markersize=3, label="eigenvalues")
    if np.isfinite(exponent):
        first, last = fit_range
        r = np.arange(first, last + 1)
        ax.loglog(r, np.exp(intercept) * r ** (-exponent), "-", color=ESTIMATE, linewidth=1.5,
                  label=f"power law i^(−{exponent:.2f}), ranks {first}–{last}")
    _label(ax, "rank i", "eigenvalue λ_i", "Kernel spectrum", legend=True)
    return fig


def heatmap_figure(kernels: dict[str, np.ndarray], labels, class_names) -> Figure:
    """Each kernel as a heat map, examples sorted by class, class boundaries drawn.

    Args:
        kernels: title -> (n, n) kernel over the same examples.
        labels: (n,) integer classes; class_names: (C,) names.
    """
    labels = np.asarray(labels)
    order = np.argsort(labels, kind="stable")
    counts = np.bincount(labels, minlength=len(class_names))
    edges = np.cumsum(counts)[:-1] - 0.5
    centers = np.cumsum(counts) - counts / 2 - 0.5
    fig, axes = _figure(4.0 * len(kernels) + 0.8, 4.2, cols=len(kernels))
    for ax, (title, k) in zip(axes, kernels.items(), strict=True):
        k = np.asarray(k)[np.ix_(order, order)]
        ax.grid(False)
        im = ax.imshow(k, cmap="viridis", interpolation="nearest")
        for e in edges:
            ax.axhline(e, color="white", linewidth=0.8)
            ax.axvline(e, color="white", linewidth=0.8)
        ax.set_xticks(centers, class_names, rotation=30, ha="right", fontsize=8)
        ax.set_yticks(centers, class_names, fontsize=8)
        ax.set_title(title, fontsize=10)
        fig.colorbar(im, ax=ax, shrink=0.8, label="Θ(x_i, x_j)")
    return fig


def drift_figure(steps, *, relative_change, distance, alignment, threshold: float,
                 spread: tuple[float, float] | None = None) -> Figure:
    """The laziness criteria on the kernel against training step, with the threshold and the
    spread between independent initializations; and the kernel-label alignment.

    Args:
        relative_change, distance: (T,) ``‖Θ_t − Θ_0‖/‖Θ_0‖`` and ``1 − cos(Θ_0, Θ_t)``.
        alignment: (T,) centered alignment with the labels.
        threshold: the laziness threshold; spread: (relative change, distance) between
            independent initializations, or None.
    """
    steps = np.asarray(steps)
    fig, (left, right) = _figure(8.0, 3.4, cols=2)
    left.plot(steps, relative_change, "o-", color=OBSERVED,
              label="relative change ‖Θ_t − Θ_0‖/‖Θ_0‖")
    left.plot(steps, distance, "s--", color=ESTIMATE, label="distance 1 − cos(Θ_0, Θ_t)")
    left.axhline(threshold, color=REFERENCE, linewidth=1.0, linestyle=":",
                 label=f"threshold {threshold:.0%}")
    if spread is not None:
        left.axhline(spread[0], color=OBSERVED, linewidth=0.8, linestyle="-.",
                     label="relative change between inits")
        left.axhline(spread[1], color=ESTIMATE, linewidth=0.8, linestyle="-.",
                     label="distance between inits")
    left.set_xscale("symlog", linthresh=1)
    _label(left, "training step", "change of the kernel", "Kernel change since initialization",
           legend=True)
    right.plot(steps, alignment, "o-", color=THIRD)
    right.set_xscale("symlog", linthresh=1)
    _label(right, "training step", "centered alignment A(Θ_t, YYᵀ)", "Kernel-label alignment")
    return fig


def forecast_figure(steps, *, observed_train, forecast_train, train_gap, threshold: float,
                    observed_test=None, forecast_test=None, test_gap=None,
                    start: int = 0) -> Figure:
    """Left: observed MSE (solid) and the lazy-training forecast (dashed), train and (when given)
    test. Right: the gap between observed and forecast outputs relative to the residual at the
    forecast's start, with the laziness threshold.

    Args:
        steps: (S,) training steps; the curves are (S,) arrays at them.
        threshold: the laziness threshold on the train gap; start: the checkpoint step the
            forecast starts from (the title says it).
    """
    steps = np.asarray(steps)
    fig, (ax, gap) = _figure(9.0, 3.6, cols=2)
    ax.plot(steps, observed_train, "-", color=OBSERVED, label="train, observed")
    ax.plot(steps, forecast_train, "--", color=OBSERVED, label="train, forecast")
    if observed_test is not None:
        ax.plot(steps, observed_test, "-", color=ESTIMATE, label="test, observed")
        ax.plot(steps, forecast_test, "--", color=ESTIMATE, label="test, forecast")
    ax.set_xscale("symlog", linthresh=1)
    ax.set_yscale("log")
    _label(ax, "training step", MSE_LABEL, f"Forecast from the kernel at step {start} vs the run",
           legend=True)
    gap.plot(steps, train_gap, "-", color=OBSERVED, label="train outputs")
    if test_gap is not None:
        gap.plot(steps, test_gap, "-", color=ESTIMATE, label="test outputs")
    gap.axhline(threshold, color=REFERENCE, linewidth=1.0, linestyle=":",
                label=f"threshold {threshold:.0%} (train)")
    gap.set_xscale("symlog", linthresh=1)
    gap.set_xlim(left=steps[0])  # no negative steps on the symlog axis
    _label(gap, "training step", f"‖f_obs − f_lin‖ / ‖f_{start} − y‖",
           "Outputs: gap to the forecast", legend=True)
    return fig


def risk_figure(ridges, *, gcv, kare, loo, heldout=None, chosen: float) -> Figure:
    """GCV, KARE and leave-one-out estimates and (with a test set) the held-out error against
    the ridge."""
    fig, (ax,) = _figure()
    ax.loglog(ridges, gcv, "-", color=ESTIMATE, label="GCV")
    ax.loglog(ridges, kare, ":", color="#8a3ea8", linewidth=2.0, label="KARE")
    ax.loglog(ridges, loo, "-.", color=THIRD, label="leave-one-out")
    if heldout is not None:
        ax.loglog(ridges, heldout, "-", color=OBSERVED, linewidth=2.0, label="held-out test")
    ax.axvline(chosen, color=REFERENCE, linewidth=1.0, linestyle="--",
               label=f"chosen ridge {chosen:.3g}")
    _label(ax, "ridge r in (K + r·I) α = y", MSE_LABEL,
           "Kernel ridge: estimated and held-out test error", legend=True)
    return fig
