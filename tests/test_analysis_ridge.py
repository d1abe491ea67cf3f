"""Kernel ridge regression against scikit-learn's KernelRidge on a shipped dataset."""

import numpy as np
import pytest
import scipy.sparse.linalg as spla
from sklearn.datasets import load_digits
from sklearn.kernel_ridge import KernelRidge
from sklearn.metrics.pairwise import rbf_kernel

from ntkcalc._analysis.ridge import RidgeFit, ridge_fit


@pytest.fixture(scope="module")
def digits():
    x, y = load_digits(return_X_y=True)
    x = x[:300] / 16.0
    onehot = np.eye(10)[y[:300]]
    k = rbf_kernel(x[:200], x[:200], gamma=0.02)
    k_test = rbf_kernel(x[200:], x[:200], gamma=0.02)
    return k, onehot[:200], k_test, onehot[200:]


def _sklearn(k, y, k_test, ridge):
    model = KernelRidge(alpha=ridge, kernel="precomputed").fit(k, y)
    return model.dual_coef_, model.predict(k), model.predict(k_test)


def test_cholesky_matches_sklearn_kernel_ridge(digits):
    # Reference: scikit-learn KernelRidge(kernel="precomputed") solves (K + alpha·I) α = y.
    k, y, k_test, _ = digits
    fit = ridge_fit(k, y, ridge=0.1, k_test_train=k_test)
    dual, train, test = _sklearn(k, y, k_test, 0.1)
    assert fit.solver == "cholesky"
    np.testing.assert_allclose(fit.dual_coef, dual, rtol=1e-8, atol=1e-8)
    np.testing.assert_allclose(fit.train_predictions, train, rtol=1e-8, atol=1e-8)
    np.testing.assert_allclose(fit.test_predictions, test, rtol=1e-8, atol=1e-8)
    np.testing.assert_allclose(fit.predict(k_test), test, rtol=1e-8, atol=1e-8)
    assert "dual_coef=array(200, 10)" in repr(fit)


def test_many_ridges_match_sklearn_one_by_one(digits):
    # Reference: scikit-learn KernelRidge refitted for each ridge.
    k, y, k_test, _ = digits
    ridges = np.array([1e-3, 1e-1, 10.0])
    fit = ridge_fit(k, y[:, 3], ridge=ridges, k_test_train=k_test)
    assert fit.solver == "eigh" and fit.dual_coef.shape == (3, 200, 1)
    assert fit.test_predictions.shape == (3, 100, 1)
    for i, r in enumerate(ridges):
        dual, _, test = _sklearn(k, y[:, 3:4], k_test, r)
        np.testing.assert_allclose(fit.dual_coef[i], dual, rtol=1e-8, atol=1e-8)
        np.testing.assert_allclose(fit.test_predictions[i], test, rtol=1e-8, atol=1e-8)


def test_linear_operator_uses_cg_and_matches_dense(digits):
    # Reference: the dense Cholesky solution on the same kernel (checked above against sklearn).
    k, y, k_test, _ = digits
    op = spla.aslinearoperator(k)
    fit = ridge_fit(op, y, ridge=0.1, k_test_train=spla.aslinearoperator(k_test))
    dense = ridge_fit(k, y, ridge=0.1, k_test_train=k_test)
    assert fit.solver == "cg"
    np.testing.assert_allclose(fit.dual_coef, dense.dual_coef, rtol=1e-7, atol=1e-7)
    np.testing.assert_allclose(fit.test_predictions, dense.test_predictions, rtol=1e-7, atol=1e-7)


def test_cg_not_converged_warns(digits):
    k, y, _, _ = digits
    with pytest.warns(RuntimeWarning, match="did not converge"):
        ridge_fit(spla.aslinearoperator(k), y[:, 0], ridge=1e-6, cg_maxiter=2)


def test_jitter_escalation_warns_with_jitter_used():
    # A rank-one PSD kernel with ridge 0 is singular; jitter makes the Cholesky succeed.
    v = np.arange(1.0, 6.0)
    k = np.outer(v, v)
    with pytest.warns(RuntimeWarning) as record:
        fit = ridge_fit(k, np.ones(5), ridge=0.0)
    messages = " ".join(str(w.message) for w in record)
    assert "added jitter" in messages and fit.jitter > 0
    assert "ill-conditioned" in messages


def test_indefinite_kernel_fails_clearly():
    k = np.diag([1.0, -1.0])
    with pytest.raises(np.linalg.LinAlgError, match="not positive definite"):
        ridge_fit(k, np.ones(2), ridge=0.0)
    with pytest.raises(np.linalg.LinAlgError, match="singular or indefinite"):
        ridge_fit(k, np.ones(2), ridge=np.array([0.0, 0.5]))


@pytest.mark.parametrize(
    "kwargs, match",
    [
        (dict(k_train=np.ones((3, 4)), y_train=np.ones(3), ridge=1.0), "square"),
        (dict(k_train=np.array([[1.0, 0.5], [0.0, 1.0]]), y_train=np.ones(2), ridge=1.0),
         "not symmetric"),
        (dict(k_train=np.array([[1.0, np.nan], [np.nan, 1.0]]), y_train=np.ones(2), ridge=1.0),
         "non-finite"),
        (dict(k_train=np.eye(4), y_train=np.ones(3), ridge=1.0), "has 3 rows but `k_train`"),
        (dict(k_train=np.eye(4), y_train=np.ones(4), ridge=-1.0), "`ridge` must be >= 0"),
        (dict(k_train=np.eye(4), y_train=np.ones(4), ridge=1.0, k_test_train=np.ones((2, 3))),
         "`k_test_train` is \\(2, 3\\)"),
    ],
)
def test_bad_input(kwargs, match):
    with pytest.raises(ValueError, match=match):
        ridge_fit(**kwargs)


def test_result_is_frozen(digits):
    k, y, _, _ = digits
    fit = ridge_fit(k, y, ridge=1.0)
    assert isinstance(fit, RidgeFit)
    with pytest.raises(AttributeError):
        fit.ridge = 2.0
