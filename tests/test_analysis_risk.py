"""Risk estimators against brute-force refits, their algebraic identity and held-out data."""

import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.kernel_ridge import KernelRidge
from sklearn.metrics.pairwise import rbf_kernel

from ntkcalc._analysis.ridge import ridge_fit
from ntkcalc._analysis.risk import RiskEstimates, risk


@pytest.fixture(scope="module")
def digits():
    x, y = load_digits(return_X_y=True)
    perm = np.random.default_rng(0).permutation(len(y))
    return x[perm] / 16.0, np.eye(10)[y[perm]]


def _held_out_mse(k, k_test, y, ridge):
    fit = ridge_fit(k, y[:600], ridge=ridge, k_test_train=k_test)
    return np.mean((fit.test_predictions - y[600:]) ** 2)


def test_loo_matches_brute_force_refits(digits):
    # Reference: N refits of scikit-learn KernelRidge, each leaving one example out.
    x, y = digits
    x, y = x[:40], y[:40, :3]
    k = rbf_kernel(x, gamma=0.02)
    ridges = np.array([1e-2, 0.3, 3.0])
    with pytest.warns(RuntimeWarning, match="minimum lies at"):
        est = risk(k, y, ridges=ridges)
    for j, r in enumerate(ridges):
        errs = []
        for i in range(40):
            keep = np.arange(40) != i
            model = KernelRidge(alpha=r, kernel="precomputed").fit(k[np.ix_(keep, keep)], y[keep])
            errs.append((model.predict(k[i:i + 1, keep])[0] - y[i]) ** 2)
        assert est.loo[j] == pytest.approx(np.mean(errs), rel=1e-8)


def test_kare_equals_gcv_with_converted_ridge(digits):
    # Identity: with A = K (K + NλI)⁻¹, I − A = Nλ (K + NλI)⁻¹ and GCV reduces to KARE's formula
    # (Jacot et al., NeurIPS 2020, arXiv:2006.09796). The code evaluates the two formulas
    # separately; here GCV is also recomputed from the dense hat matrix.
    x, y = digits
    k = x[:80] @ x[:80].T
    ridges = np.logspace(-2, 2, 9)
    est = risk(k, y[:80], ridges=ridges)
    np.testing.assert_allclose(est.kare, est.gcv, rtol=1e-10)
    n = 80
    for j, r in enumerate(ridges):
        hat = k @ np.linalg.inv(k + r * np.eye(n))
        resid = (np.eye(n) - hat) @ y[:80]
        gcv = np.mean(resid**2) / (np.trace(np.eye(n) - hat) / n) ** 2
        assert est.gcv[j] == pytest.approx(gcv, rel=1e-9)
    assert est.best["gcv"] == est.best["kare"]


def test_gcv_choice_predicts_held_out_error_on_digits(digits):
    # Shipped data: sklearn load_digits, 600 random train / 1197 held out, linear kernel,
    # one-hot targets. GCV at its chosen ridge lies within 10% of the held-out MSE (measured:
    # ~1-2%). Note: with an RBF kernel near interpolation GCV underestimates the held-out error
    # by 15-45% on this data, while LOO stays within ~12%; that case is checked for LOO below.
    x, y = digits
    k, k_test = x[:600] @ x[:600].T, x[600:] @ x[:600].T
    ridges = np.logspace(-2, 3, 21)
    est = risk(k, y[:600], ridges=ridges)
    i = int(np.argmin(est.gcv))
    held = _held_out_mse(k, k_test, y, est.best["gcv"])
    assert est.gcv[i] == pytest.approx(held, rel=0.10)
    assert est.loo[i] == pytest.approx(held, rel=0.10)
    assert isinstance(est, RiskEstimates) and "best={'loo'" in repr(est)


def test_loo_predicts_held_out_error_rbf(digits):
    # Shipped data as above, RBF kernel (gamma 0.02 on pixels / 16); LOO within 20% of held-out.
    x, y = digits
    k, k_test = rbf_kernel(x[:600], gamma=0.02), rbf_kernel(x[600:], x[:600], gamma=0.02)
    ridges = np.logspace(-5, 1, 13)
    est = risk(k, y[:600], ridges=ridges)
    i = int(np.argmin(est.loo))
    held = _held_out_mse(k, k_test, y, est.best["loo"])
    assert est.loo[i] == pytest.approx(held, rel=0.20)


def test_bad_input():
    with pytest.raises(ValueError, match="`ridges` must be > 0"):
        risk(np.eye(3), np.ones(3), ridges=[0.0, 1.0])
    with pytest.raises(ValueError, match="`ridges` must be >= 0"):
        risk(np.eye(3), np.ones(3), ridges=[-1.0])
    with pytest.raises(ValueError, match="has 2 rows"):
        risk(np.eye(3), np.ones(2), ridges=1.0)
    with pytest.raises(ValueError, match="not symmetric"):
        risk(np.triu(np.ones((3, 3))), np.ones(3), ridges=1.0)
