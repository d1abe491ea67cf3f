"""The report's figures show their labels whole: every axis label and title lies inside the
figure (a label longer than the axes is broken into lines, not clipped at the figure's edge)."""

from __future__ import annotations

import numpy as np
import pytest

from ntkcalc._workflows import plots

STEPS = np.arange(0, 101)
RIDGES = np.logspace(-6, 2, 20)

FIGURES = {
    "forecast": lambda: plots.forecast_figure(
        STEPS, observed_train=np.exp(-STEPS / 30) + 0.01, forecast_train=np.exp(-STEPS / 31),
        train_gap=STEPS / 1000, threshold=0.1, observed_test=np.exp(-STEPS / 40) + 0.05,
        forecast_test=np.exp(-STEPS / 41) + 0.05, test_gap=STEPS / 900),
    "risk": lambda: plots.risk_figure(RIDGES, gcv=RIDGES + 0.1, kare=RIDGES + 0.2,
                                      loo=RIDGES + 0.15, heldout=RIDGES + 0.3, chosen=1e-2),
    "spectrum": lambda: plots.spectrum_figure(1.0 / np.arange(1, 50) ** 2, exponent=2.0,
                                              fit_range=(2, 40), intercept=0.0),
}


def clipped_labels(fig) -> list[str]:
    """The axis labels and titles of ``fig`` that reach past its edges."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    renderer, box = canvas.get_renderer(), fig.bbox
    out = []
    for ax in fig.axes:
        for text in (ax.xaxis.label, ax.yaxis.label, ax.title):
            e = text.get_window_extent(renderer)
            if text.get_text() and not (e.x0 >= box.x0 and e.y0 >= box.y0 and e.x1 <= box.x1
                                        and e.y1 <= box.y1):
                out.append(text.get_text())
    return out


@pytest.mark.parametrize("name", sorted(FIGURES))
def test_labels_lie_inside_the_figure(name):
    assert clipped_labels(FIGURES[name]()) == []


def test_axis_label_breaks_at_spaces():
    assert plots.axis_label(plots.MSE_LABEL) == ("MSE: mean over examples and\n"
                                                  "outputs of (f − y)²")
    assert plots.axis_label("eigenvalue λ_i") == "eigenvalue λ_i"
    assert all(len(line) <= plots.AXIS_LINE
               for line in plots.axis_label(plots.MSE_LABEL).splitlines())
