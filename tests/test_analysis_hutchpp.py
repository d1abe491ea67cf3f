"""Hutch++ estimates against exact dense values (numpy) and Hutch++'s exactness on low rank."""

import numpy as np
import pytest
import scipy.sparse.linalg as spla
from sklearn.datasets import load_digits
from sklearn.metrics.pairwise import rbf_kernel

from ntkcalc._analysis.alignment import alignment
from ntkcalc._analysis.hutchpp import (
    Estimate,
    estimate_alignment,
    estimate_frobenius,
    estimate_participation_ratio,
    estimate_trace,
)
from ntkcalc._analysis.spectrum import participation_ratio


@pytest.fixture(scope="module")
def digits():
    x, labels = load_digits(return_X_y=True)
    return rbf_kernel(x[:400] / 16.0, gamma=0.02), np.eye(10)[labels[:400]]


def test_exact_on_low_rank():
    # Meyer, Musco, Musco & Woodruff, SOSA 2021: when rank A <= m/3, Q spans range(A) and the
    # estimate is exact (up to rounding).
    b = np.random.default_rng(0).standard_normal((150, 6))
    a = b @ b.T
    est = estimate_trace(spla.aslinearoperator(a), num_queries=21, seed=1)
    assert est.value == pytest.approx(np.trace(a), rel=1e-10)
    assert est.matvecs == 21 and isinstance(est, Estimate) and float(est) == est.value
    fro = estimate_frobenius(a, num_queries=21, seed=2)
    assert fro.value == pytest.approx(np.linalg.norm(a), rel=1e-10)
    assert fro.matvecs == 42


def test_trace_of_rbf_kernel(digits):
    # Closed form: an RBF kernel has unit diagonal, so tr K = n = 400. Tolerance 3% at 60
    # queries (Hutch++ error ~ tail trace / m for PSD A).
    k, _ = digits
    errs = [abs(estimate_trace(k, num_queries=60, seed=s).value - 400) / 400 for s in range(5)]
    assert max(errs) < 0.03


def test_norm_participation_and_alignment_match_dense(digits):
    # References: numpy Frobenius norm, participation ratio of the LAPACK spectrum, dense
    # centered alignment (itself checked against its definition). Tolerances: 3%, 6%, 3%.
    k, y = digits
    assert estimate_frobenius(k, num_queries=60, seed=0).value == pytest.approx(
        np.linalg.norm(k), rel=0.03)
    pr = estimate_participation_ratio(k, num_queries=60, seed=0)
    assert pr.value == pytest.approx(participation_ratio(np.linalg.eigvalsh(k)), rel=0.06)
    assert pr.matvecs == 180
    for centered in (True, False):
        est = estimate_alignment(k, y, num_queries=60, seed=0, centered=centered)
        assert est.value == pytest.approx(alignment(k, y, centered=centered), rel=0.03)


def test_unbiased_over_seeds(digits):
    # Hutch++ is unbiased: the mean over 40 seeds of a small-query estimate is within 3 standard
    # errors of the exact trace (common practice for Monte Carlo checks).
    k, _ = digits
    values = np.array([estimate_trace(k, num_queries=9, seed=s).value for s in range(40)])
    assert abs(values.mean() - 400) < 3 * values.std(ddof=1) / np.sqrt(40) + 1e-9


def test_bad_input(digits):
    k, _ = digits
    with pytest.raises(ValueError, match="`num_queries` must be >= 3"):
        estimate_trace(k, num_queries=2, seed=0)
    with pytest.raises(ValueError, match="square"):
        estimate_trace(spla.aslinearoperator(np.ones((3, 4))), num_queries=3, seed=0)
    with pytest.raises(ValueError, match="`y` has 3 rows"):
        estimate_alignment(k, np.ones(3), num_queries=3, seed=0)
