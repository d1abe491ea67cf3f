"""Refined top eigenvalues (block Krylov Rayleigh–Ritz from a sketch) against LAPACK, exact kernel.

References: the exact trace kernel of a small MLP on scikit-learn's digits (`ntkcalc.ntk`,
itself tested against jax.jacrev) and its eigenvalues by ``scipy.linalg.eigh``; the two bounds a
Rayleigh–Ritz value obeys on any subspace (B. N. Parlett, *The Symmetric Eigenvalue Problem*,
SIAM 1998 — from memory): Cauchy interlacing, θ_i ≤ λ_i, and the residual bound, some
eigenvalue within ‖Θu − θu‖ of θ.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

import ntkcalc
from tests.test_sketch_analysis import digits, exact, feats, small_net

TOP = 5


def _eigenvalues():
    return scipy.linalg.eigh(exact(), eigvals_only=True)[::-1]


def test_refined_values_equal_the_exact_kernels_top_eigenvalues():
    x, _ = digits()
    op = ntkcalc.ntk_operator(small_net(), x, outputs="trace", dtype="float64")
    r = ntkcalc.refine_spectrum(feats(0), op, top=TOP, extra=5, tol=1e-9, max_blocks=16)
    lam = _eigenvalues()
    np.testing.assert_allclose(r.values, lam[:TOP], rtol=1e-8)
    assert r.converged and r.products == op.matvecs
    assert (r.outputs, r.dtype, r.method) == ("trace", "float64", op.method)
    # Every block's values are lower bounds (interlacing) and never fall.
    assert np.all(r.history <= lam[:TOP] * (1 + 1e-10))
    assert np.all(np.diff(r.history, axis=0) >= -1e-9 * lam[0])


def test_unsettled_refinement_warns_and_its_bounds_hold():
    lam = _eigenvalues()
    phi = np.asarray(feats(0).features)[:, :16]  # a poor start: 16 features of 1024
    with pytest.warns(UserWarning, match="have not settled"):
        r = ntkcalc.refine_spectrum(phi, exact(), top=TOP, extra=3, max_blocks=1, vectors=True)
    assert not r.converged and r.blocks == 1 and r.products == TOP + 3
    assert np.all(r.values <= lam[:TOP] * (1 + 1e-10))
    # Residual bound: each Ritz value has an eigenvalue within its residual.
    dist = np.min(np.abs(r.values[:, None] - lam[None, :]), axis=1)
    assert np.all(dist <= r.residuals * (1 + 1e-8) + 1e-10 * lam[0])
    # The Ritz vectors are orthonormal and give the values as Rayleigh quotients.
    u = r.vectors
    np.testing.assert_allclose(u.T @ u, np.eye(TOP), atol=1e-10)
    np.testing.assert_allclose(np.einsum("ni,nm,mi->i", u, exact(), u), r.values, rtol=1e-10)


def test_refinement_checks_its_arguments():
    phi = np.asarray(feats(0).features)
    with pytest.raises(ValueError, match="`operator` has shape"):
        ntkcalc.refine_spectrum(phi, np.eye(5))
    with pytest.raises(ValueError, match="`top` \\+ `extra` = 40 exceeds"):
        ntkcalc.refine_spectrum(phi[:, :32], exact(), top=30)
    with pytest.raises(ValueError, match="`tol`"):
        ntkcalc.refine_spectrum(phi, exact(), tol=2.0)
    with pytest.raises(TypeError, match="`operator` must be"):
        ntkcalc.refine_spectrum(phi, "kernel")
    x, _ = digits()
    full = ntkcalc.ntk_operator(small_net(), x[:8], outputs="logit-sum", dtype="float64")
    few = ntkcalc.ntk_features(small_net(), x[:8], k=32, seed=0, progress=False)
    with pytest.raises(ValueError, match="'trace' kernel but `operator` is 'logit-sum'"):
        ntkcalc.refine_spectrum(few, full, top=2, extra=1)
