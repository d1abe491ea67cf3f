"""Learning-curve theory against measured kernel-ridge test error on a shipped dataset."""

import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.kernel_ridge import KernelRidge
from sklearn.metrics.pairwise import rbf_kernel

from ntkcalc._analysis.learning_curve import LearningCurve, learning_curve


@pytest.mark.parametrize("ridge", [1e-2, 1.0])
def test_theory_matches_measured_error_on_digits(ridge):
    # Canatar, Bordelon & Pehlevan, Nat. Commun. 12, 2914 (2021), Fig. 2-style check: the
    # population is a 600-image pool of sklearn's load_digits (RBF kernel, gamma 0.02 on
    # pixels / 16, one-hot targets); its Gram eigenvalues / 600 and squared projections / 600 are
    # the population spectrum and target power. Measured: scikit-learn KernelRidge on n examples
    # drawn i.i.d. from the pool, error over the whole pool, mean of 8 draws. Tolerance: 15% at
    # every n (measured agreement: 0-10%).
    x, labels = load_digits(return_X_y=True)
    x, y = x[:600] / 16.0, np.eye(10)[labels[:600]]
    k = rbf_kernel(x, gamma=0.02)
    w, v = np.linalg.eigh(k)
    eta, power = np.clip(w, 0, None) / 600, np.sum((v.T @ y) ** 2, axis=1) / 600
    sizes = np.array([20, 60, 180])
    curve = learning_curve(eta, power, n=sizes, ridge=ridge)
    rng = np.random.default_rng(0)
    measured = []
    for n in sizes:
        errs = []
        for _ in range(8):
            idx = rng.integers(0, 600, n)
            model = KernelRidge(alpha=ridge, kernel="precomputed").fit(k[np.ix_(idx, idx)], y[idx])
            errs.append(np.mean(np.sum((model.predict(k[:, idx]) - y) ** 2, axis=1)))
        measured.append(np.mean(errs))
    np.testing.assert_allclose(curve.test_error, measured, rtol=0.15)
    assert np.all(np.diff(curve.test_error) < 0)


def test_white_spectrum_closed_form():
    # P equal eigenvalues η = 1/P, ridge 0, n < P (the equations solved by hand): P·η/(κ + nη) = 1
    # gives κ = η (P − n), γ = P·n·η²/(Pη)² = n/P, and for unit target power spread evenly the
    # error is (1 − n/P)² / (1 − n/P) = 1 − n/P; pure noise σ² adds σ²·γ/(1 − γ).
    p = 50
    eta = np.full(p, 1.0 / p)
    curve = learning_curve(eta, np.full(p, 1.0 / p), n=np.array([5, 25, 40]), ridge=0.0)
    np.testing.assert_allclose(curve.kappa, eta[0] * (p - curve.n), rtol=1e-10)
    np.testing.assert_allclose(curve.gamma, curve.n / p, rtol=1e-10)
    np.testing.assert_allclose(curve.test_error, 1 - curve.n / p, rtol=1e-10)
    noisy = learning_curve(eta, np.zeros(p), n=25, ridge=0.0, noise=0.3)
    assert noisy.test_error[0] == pytest.approx(0.3 * 0.5 / 0.5, rel=1e-10)
    assert isinstance(curve, LearningCurve) and "mode_errors=array(3, 50)" in repr(curve)


def test_interpolation_peak_warns():
    # Ridgeless with n = number of modes: γ = 1 and the error diverges (double-descent peak).
    with pytest.warns(RuntimeWarning, match="γ >= 1"):
        curve = learning_curve(np.full(10, 0.1), np.full(10, 0.1), n=10, ridge=0.0)
    assert np.isinf(curve.test_error[0])


def test_bad_input():
    with pytest.raises(ValueError, match="`target_power` has shape \\(3,\\)"):
        learning_curve(np.ones(4), np.ones(3), n=10, ridge=1.0)
    with pytest.raises(ValueError, match="`eigenvalues` has negative"):
        learning_curve(-np.ones(4), np.ones(4), n=10, ridge=1.0)
    with pytest.raises(ValueError, match="`ridge` must be >= 0"):
        learning_curve(np.ones(4), np.ones(4), n=10, ridge=-1.0)
    with pytest.raises(ValueError, match="`n` must be > 0"):
        learning_curve(np.ones(4), np.ones(4), n=[0, 10], ridge=1.0)
