"""Spectrum statistics against closed forms, NumPy's matrix_rank and dense LAPACK."""

import numpy as np
import pytest
import scipy.linalg
import scipy.sparse.linalg as spla
from sklearn.datasets import load_digits
from sklearn.metrics.pairwise import rbf_kernel

from ntkcalc._analysis.spectrum import effective_rank, participation_ratio, spectrum


def test_effective_rank_closed_forms():
    # Roy & Vetterli, EUSIPCO 2007: erank(I_n) = n, erank(rank one) = 1, and from the formula
    # erank(diag(3, 1)) = exp(-(0.75 ln 0.75 + 0.25 ln 0.25)) = 1.7547654...
    assert spectrum(np.eye(5)).effective_rank == pytest.approx(5.0, rel=1e-12)
    v = np.arange(1.0, 5.0)
    assert spectrum(np.outer(v, v)).effective_rank == pytest.approx(1.0, rel=1e-10)
    assert spectrum(np.diag([3.0, 1.0])).effective_rank == pytest.approx(1.7547654, rel=1e-7)
    assert effective_rank(np.array([3.0, 1.0])) == pytest.approx(
        np.exp(-(0.75 * np.log(0.75) + 0.25 * np.log(0.25))), rel=1e-14
    )


def test_participation_ratio_closed_forms():
    # (Σλ)²/Σλ²: n for the identity, 1 for rank one, 16/10 for diag(3, 1) (from the formula).
    assert participation_ratio(np.ones(7)) == pytest.approx(7.0)
    assert spectrum(np.diag([3.0, 1.0])).participation_ratio == pytest.approx(1.6)


@pytest.mark.parametrize("rank", [1, 3, 8])
def test_numerical_rank_matches_numpy_matrix_rank(rank):
    # Reference: numpy.linalg.matrix_rank (tolerance σ_max·n·eps) on the same matrix.
    rng = np.random.default_rng(rank)
    a = rng.standard_normal((12, rank))
    k = a @ a.T
    s = spectrum(k)
    assert s.numerical_rank == np.linalg.matrix_rank(k) == rank
    np.testing.assert_allclose(s.eigenvalues, np.sort(np.linalg.eigvalsh(k))[::-1], atol=1e-12)
    assert s.tol == pytest.approx(np.max(np.abs(s.eigenvalues)) * 12 * np.finfo(float).eps)
    assert spectrum(k, tol=1e30).numerical_rank == 0


def test_power_law_exponent_of_exact_power_law():
    # λ_i = i^-2 exactly: the log-log least-squares slope is -2 (from the definition).
    w = np.arange(1.0, 41.0) ** -2.0
    q, _ = np.linalg.qr(np.random.default_rng(0).standard_normal((40, 40)))
    s = spectrum(q @ np.diag(w) @ q.T)
    assert s.decay_exponent == pytest.approx(2.0, rel=1e-8)
    assert s.decay_fit_range == (1, 20)
    assert spectrum(np.diag(w), fit_range=(5, 30)).decay_exponent == pytest.approx(2.0, rel=1e-10)


def test_convergence_rate_is_tight_on_slowest_mode():
    # With the kernel fixed, gradient flow on (1/N)Σ½‖f−y‖² gives r_t = expm(−tK/N) r_0
    # (Jacot, Gabriel & Hongler 2018, NeurIPS, arXiv:1806.07572); reference: scipy.linalg.expm.
    x, _ = load_digits(return_X_y=True)
    k = rbf_kernel(x[:40] / 16.0, gamma=0.05)
    s = spectrum(k)
    t = 50.0
    r0 = s.eigenvectors[:, -1]
    rt = scipy.linalg.expm(-t * k / 40) @ r0
    assert np.sum(rt**2) == pytest.approx(np.exp(-s.convergence_rate * t), rel=1e-8)
    r_any = np.random.default_rng(1).standard_normal(40)
    bound = np.exp(-s.convergence_rate * t) * np.sum(r_any**2)
    assert np.sum((scipy.linalg.expm(-t * k / 40) @ r_any) ** 2) <= bound
    assert s.condition_number == pytest.approx(s.eigenvalues[0] / s.eigenvalues[-1])


def test_lanczos_on_operator_matches_dense():
    # Reference: dense LAPACK eigh of the same kernel; Lanczos top-5 agrees to 1e-9.
    x, _ = load_digits(return_X_y=True)
    k = rbf_kernel(x[:300] / 16.0, gamma=0.02)
    dense = spectrum(k, top=5)
    lan = spectrum(spla.aslinearoperator(k), top=5)
    np.testing.assert_allclose(lan.eigenvalues, dense.eigenvalues, rtol=1e-9)
    overlap = np.abs(np.sum(lan.eigenvectors * dense.eigenvectors, axis=0))
    np.testing.assert_allclose(overlap, 1.0, atol=1e-6)
    assert lan.matvecs > 5 and not lan.complete and lan.lambda_min is None
    assert "matvecs=" in repr(lan) and "eigenvectors=array(300, 5)" in repr(lan)


def test_bad_input():
    with pytest.raises(ValueError, match="square"):
        spectrum(np.ones((2, 3)))
    with pytest.raises(ValueError, match="`top` must be an integer"):
        spectrum(spla.aslinearoperator(np.eye(4)))
    with pytest.raises(ValueError, match="non-finite"):
        spectrum(np.array([[1.0, np.inf], [np.inf, 1.0]]))
    with pytest.raises(ValueError, match="`fit_range`"):
        spectrum(np.diag([3.0, 2.0, 1.0]), fit_range=(3, 2))
