"""Risk estimators against brute-force refits, their algebraic identity and held-out data."""

import numpy as np
import pytest
from sklearn.datasets import load_digits, load_iris
from sklearn.kernel_ridge import KernelRidge
from sklearn.metrics.pairwise import rbf_kernel

import ntkcalc
from ntkcalc._analysis.ridge import ridge_fit
from ntkcalc._analysis.risk import DISAGREEMENT_FACTOR, RiskEstimates, risk


@pytest.fixture(scope="module")
def digits():
    x, y = load_digits(return_X_y=True)
    perm = np.random.default_rng(0).permutation(len(y))
    return x[perm] / 16.0, np.eye(10)[y[perm]]


def _held_out_mse(k, k_test, y, ridge):
    fit = ridge_fit(k, y[:600], ridge=ridge, k_test_train=k_test)
    return np.mean((fit.test_predictions - y[600:]) ** 2)


def _loo_by_refits(k, y, ridge):
    """Mean squared leave-one-out error from N scikit-learn KernelRidge refits."""
    n = len(y)
    errs = []
    for i in range(n):
        keep = np.arange(n) != i
        model = KernelRidge(alpha=ridge, kernel="precomputed").fit(k[np.ix_(keep, keep)], y[keep])
        errs.append((model.predict(k[i:i + 1, keep])[0] - y[i]) ** 2)
    return np.mean(errs)


def test_loo_matches_brute_force_refits(digits):
    # Reference: N refits of scikit-learn KernelRidge, each leaving one example out.
    x, y = digits
    x, y = x[:40], y[:40, :3]
    k = rbf_kernel(x, gamma=0.02)
    ridges = np.array([1e-2, 0.3, 3.0])
    with pytest.warns(RuntimeWarning, match="minimum lies at"):
        est = risk(k, y, ridges=ridges)
    for j, r in enumerate(ridges):
        assert est.loo[j] == pytest.approx(_loo_by_refits(k, y, r), rel=1e-8)


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


@pytest.fixture(scope="module")
def iris():
    # Shipped data: sklearn load_iris (ordered by class, 50 each). Split: even rows train (75,
    # 25 per class), odd rows held out; one-hot targets; RBF kernel γ = 0.25 by
    # sklearn.metrics.pairwise.rbf_kernel. The issue's own split is unknown; with this one GCV
    # fails the same way (measured: GCV picks 1e-7 and estimates 0.019, LOO there 1.12, held-out
    # 2.07; LOO's own choice 0.1 gives held-out 0.019).
    x, labels = load_iris(return_X_y=True)
    y = np.eye(3)[labels]
    tr, te = np.arange(0, 150, 2), np.arange(1, 150, 2)
    return (rbf_kernel(x[tr], gamma=0.25), rbf_kernel(x[te], x[tr], gamma=0.25), y[tr], y[te])


def test_gcv_failure_on_iris_is_flagged_and_loo_ridge_recommended(iris):
    k, k_test, y, y_test = iris
    ridges = np.logspace(-7, 2, 19)
    with pytest.warns(RuntimeWarning) as log:
        est = risk(k, y, ridges=ridges)
    messages = " | ".join(str(w.message) for w in log)
    assert "disagree with leave-one-out" in messages and "GCV minimum lies at the first" in messages
    g = int(np.argmin(est.gcv))
    assert est.best["gcv"] == ridges[g] == 1e-7
    assert not est.agree and est.ratio > 10 * DISAGREEMENT_FACTOR
    assert est.ratio == pytest.approx(est.loo[g] / est.gcv[g], rel=1e-12)
    assert est.recommended_by == "loo" and est.recommended == est.best["loo"]
    held = ridge_fit(k, y, ridge=ridges, k_test_train=k_test).test_predictions
    held = np.mean((held - y_test[None]) ** 2, axis=(1, 2))
    # the flagged GCV value is far below the held-out error at its ridge; LOO is not
    assert est.gcv[g] < held[g] / 20 and est.loo[g] > held[g] / 2
    # the recommended ridge holds up on the held-out rows (within 30% of the best of the grid)
    i = int(np.flatnonzero(ridges == est.recommended)[0])
    assert held[i] <= 1.3 * held.min()
    assert held[i] < held[g] / 20


def test_loo_matches_sklearn_refits_on_iris(iris):
    # Reference: 75 scikit-learn KernelRidge refits per ridge, each leaving one example out.
    k, _, y, _ = iris
    ridges = np.array([1e-7, 1e-3, 0.1])
    with pytest.warns(RuntimeWarning):
        est = risk(k, y, ridges=ridges)
    for j, r in enumerate(ridges):
        # the tiny ridge is ill-conditioned (cond ≈ 3e7): fewer digits agree there
        assert est.loo[j] == pytest.approx(_loo_by_refits(k, y, r), rel=1e-6 if r < 1e-5 else 1e-9)


def test_agreeing_estimates_keep_the_gcv_ridge(digits):
    x, y = digits
    k = x[:200] @ x[:200].T
    est = risk(k, y[:200], ridges=np.logspace(-2, 3, 11))
    assert est.agree and est.recommended_by == "gcv" and est.recommended == est.best["gcv"]
    assert 1 / DISAGREEMENT_FACTOR <= est.ratio <= DISAGREEMENT_FACTOR
    assert not est.indefinite.any()
    assert est.kernel == "a plain array of unknown kind" and est.kernel_dtype == "float64"
    # integer labels are class labels (one-hot rows), the package's label convention
    labels = np.argmax(y[:200], axis=1)
    np.testing.assert_allclose(risk(k, labels, ridges=np.logspace(-2, 3, 11)).loo, est.loo,
                               rtol=1e-12)
    tagged = risk(ntkcalc.KernelArray(k, kind="trace", num_outputs=10), y[:200], ridges=1.0)
    assert "'trace' kernel over 10 outputs" in tagged.kernel


def test_indefinite_ridges_warn_like_ridge_fit_refuses():
    # A symmetric matrix with eigenvalues 2, 1, -0.5 (numpy QR basis): K + r·I is indefinite
    # for r <= 0.5, the rule of ridge_fit, which refuses those ridges.
    q, _ = np.linalg.qr(np.random.default_rng(1).normal(size=(3, 3)))
    k = (q * [2.0, 1.0, -0.5]) @ q.T
    y = np.array([1.0, -1.0, 0.5])
    ridges = np.array([0.1, 0.4, 1.0, 2.0, 4.0])
    with pytest.raises(np.linalg.LinAlgError, match="singular or indefinite"):
        ridge_fit(k, y, ridge=ridges)
    with pytest.warns(RuntimeWarning) as log:
        est = risk(k, y, ridges=ridges)
    assert any("singular or indefinite for ridge(s) [0.1, 0.4]" in str(w.message) for w in log)
    np.testing.assert_array_equal(est.indefinite, [True, True, False, False, False])
    assert np.all(np.isnan(est.loo[:2])) and np.all(np.isfinite(est.loo[2:]))
    assert est.best["loo"] in ridges[2:]
    with pytest.raises(np.linalg.LinAlgError, match="Use ridges > 0.5"):
        risk(k, y, ridges=[0.1, 0.2])


def test_bad_input():
    with pytest.raises(ValueError, match="`ridges` must be > 0"):
        risk(np.eye(3), np.ones(3), ridges=[0.0, 1.0])
    with pytest.raises(ValueError, match="`ridges` must be >= 0"):
        risk(np.eye(3), np.ones(3), ridges=[-1.0])
    with pytest.raises(ValueError, match="has 2 rows"):
        risk(np.eye(3), np.ones(2), ridges=1.0)
    with pytest.raises(ValueError, match="not symmetric"):
        risk(np.triu(np.ones((3, 3))), np.ones(3), ridges=1.0)
