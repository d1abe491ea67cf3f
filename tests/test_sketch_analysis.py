"""Analyses on sketched features against dense references and the exact kernel.

Algebra (any features φ, K̂ = φ φᵀ): primal ridge against scikit-learn's
``KernelRidge(kernel="precomputed")`` on K̂ and the project's dense `risk` (itself checked against
brute-force refits); the spectrum against ``scipy.linalg.eigh`` of K̂. Statistics (NTK features of
a small MLP on scikit-learn's digits, float64): each estimate against the exact kernel's value
(`ntkcalc.ntk`, tested against jax.jacrev) within a few of its own jackknife errors, and the
jackknife error against the spread over independent seeds (Efron & Stein 1981: the delete-a-group
jackknife estimates the standard error of smooth statistics of i.i.d. groups).
"""

from __future__ import annotations

import dataclasses
import functools

import flax.linen as nn
import jax
import numpy as np
import pytest
import scipy.linalg
from sklearn.datasets import load_digits
from sklearn.kernel_ridge import KernelRidge

import ntkcalc
from tests.helpers import f64


@functools.cache
def digits(n: int = 160):
    x, labels = load_digits(return_X_y=True)
    perm = np.random.default_rng(0).permutation(len(labels))[:n]
    return x[perm] / 16.0, labels[perm]


class Small(nn.Module):
    @nn.compact
    def __call__(self, x):
        x = nn.relu(nn.Dense(24)(x))
        return nn.Dense(10)(x)


@functools.cache
def small_net(shift: float = 0.0):
    x, _ = digits()
    variables = f64(Small().init(jax.random.key(0), x[:1]))
    variables = jax.tree_util.tree_map(lambda a: a + shift * np.sin(np.arange(a.size)).reshape(
        a.shape), variables)
    return ntkcalc.Net.from_linen(Small(), variables)


@functools.cache
def exact(shift: float = 0.0):
    x, _ = digits()
    return np.asarray(ntkcalc.ntk(small_net(shift), x, progress=False))


@functools.cache
def feats(seed: int, k: int = 1024, shift: float = 0.0):
    x, _ = digits()
    return ntkcalc.ntk_features(small_net(shift), x, k=k, seed=seed, progress=False)


def random_features():
    x, labels = digits()
    phi = np.random.default_rng(1).normal(size=(x.shape[0], 48)) + x[:, :48]
    return phi, np.eye(10)[labels]


# -- algebra ------------------------------------------------------------------------------------


def test_primal_ridge_equals_kernel_ridge_on_sketched_kernel():
    phi, y = random_features()
    tr, te = slice(0, 120), slice(120, None)
    r = 0.7
    with pytest.warns(RuntimeWarning, match="tr K̂ / k"):  # N = 120 > k = 48, small ridge
        fit = ntkcalc.features_ridge(phi[tr], y[tr], ridge=r, test_features=phi[te],
                                     y_test=y[te])
    k = phi @ phi.T
    ref = KernelRidge(alpha=r, kernel="precomputed").fit(k[tr, tr], y[tr])
    np.testing.assert_allclose(fit.train_predictions, ref.predict(k[tr, tr]), atol=1e-9)
    np.testing.assert_allclose(fit.test_predictions, ref.predict(k[te, tr]), atol=1e-9)
    test_mse = np.mean((ref.predict(k[te, tr]) - y[te]) ** 2)
    assert fit.test_mse.value == pytest.approx(test_mse, rel=1e-9)
    assert fit.train_mse.value == pytest.approx(np.mean((ref.predict(k[tr, tr]) - y[tr]) ** 2),
                                                rel=1e-9)
    dense = ntkcalc.risk(k[tr, tr], y[tr], ridges=np.array([r]))
    assert fit.gcv.value == pytest.approx(dense.gcv[0], rel=1e-9)
    assert fit.loo == pytest.approx(dense.loo[0], rel=1e-9)


def test_spectrum_equals_eigh_of_sketched_kernel():
    phi, _ = random_features()
    spec, vecs = ntkcalc.features_spectrum(phi, top=5, vectors=True)
    w, v = scipy.linalg.eigh(phi @ phi.T)
    np.testing.assert_allclose(spec.value, w[::-1][:5], rtol=1e-10)
    overlap = np.abs(np.sum(vecs * v[:, ::-1][:, :5], axis=0))
    np.testing.assert_allclose(overlap, 1.0, atol=1e-8)


def test_alignment_numerator_and_unbiased_norm():
    """With features φ = X/√k of i.i.d. columns the U-statistic ‖K‖²_F has expectation ‖K‖²_F;
    checked here by its algebra: it equals the sum over distinct column pairs (direct loop)."""
    from ntkcalc._sketch.analysis import _frobenius2

    phi, _ = random_features()
    k = phi.shape[1]
    g = phi.T @ phi
    direct = sum((k * g[m, q]) ** 2 for m in range(k) for q in range(k) if m != q) / (k * (k - 1))
    assert _frobenius2(g, k) == pytest.approx(direct, rel=1e-12)


# -- statistics against the exact kernel ------------------------------------------------------


def assert_honest(ests, want: float, *, corrected: bool):
    """Each estimate (its value, or bias-corrected value) within four of its jackknife errors of
    the exact ``want``, and the mean jackknife error against the spread of the values over the
    independent seeds (Efron & Stein 1981)."""
    for e in ests:
        assert abs((e.corrected if corrected else e.value) - want) <= 4 * e.error
    spread = np.std([e.value for e in ests], ddof=1)
    mean_error = np.mean([e.error for e in ests])
    assert 0.33 < mean_error / spread < 3.0  # six seeds: the spread itself is ±30%


def test_alignment_within_error_of_exact_and_error_is_honest():
    x, labels = digits()
    want = ntkcalc.alignment(exact(), labels)
    assert_honest([ntkcalc.features_alignment(feats(s), labels) for s in range(6)], want,
                  corrected=False)


def test_top_eigenvalues_within_error_of_exact():
    want = scipy.linalg.eigh(exact(), eigvals_only=True)[::-1][:5]
    spec, _ = ntkcalc.features_spectrum(feats(0), top=5)
    assert np.all(np.abs(spec.value - want) <= 4 * spec.error + np.abs(spec.bias))


def test_ridge_test_error_within_error_of_exact():
    x, labels = digits()
    y = np.eye(10)[labels]
    k = exact()
    tr, te = slice(0, 120), slice(120, None)
    r = 1e-2 * np.trace(k) / k.shape[0]
    fit = ntkcalc.ridge_fit(k[tr, tr], y[tr], ridge=r, k_test_train=k[te, tr])
    want = np.mean((fit.test_predictions - y[te]) ** 2)
    phi = np.asarray(feats(0).features)
    got = ntkcalc.features_ridge(phi[tr], y[tr], ridge=r, test_features=phi[te], y_test=y[te])
    assert abs(got.test_mse.value - want) <= 4 * got.test_mse.error + abs(got.test_mse.bias)


def test_distance_between_checkpoints_within_error_of_exact():
    want = ntkcalc.kernel_distance(exact(0.0), exact(0.05))
    got = ntkcalc.features_distance(feats(0), feats(0, shift=0.05))
    assert want > 1e-4
    assert abs(got.value - want) <= 4 * got.error + abs(got.bias)
    # the same checkpoint twice: distance 0 up to the U-statistic's noise
    same = ntkcalc.features_distance(feats(0), feats(0))
    assert abs(same.value) <= 4 * same.error + 1e-12


def test_relative_change_within_error_of_exact_and_error_is_honest():
    """The relative change ‖K_t − K_0‖_F/‖K_0‖_F from the U-statistics against the exact
    kernels' (`ntkcalc.ntk`, tested against jax.jacrev) within four of its jackknife errors, and
    the jackknife error against the spread over six independent seeds (Efron & Stein 1981)."""
    from ntkcalc._analysis.laziness import relative_change

    want = relative_change(exact(0.05), exact(0.0))
    assert want > 0.05  # above the laziness threshold: the change the verdict must see
    assert_honest([ntkcalc.features_relative_change(feats(s, shift=0.05), feats(s))
                   for s in range(6)], want, corrected=True)


def test_relative_change_sees_a_kernel_that_only_grows():
    """Features scaled by s: K_t = s² K_0, so ‖K_t − K_0‖/‖K_0‖ = s² − 1 exactly while the
    distance is 0 (closed form); with shared projections the U-statistics give both without
    noise. The same features twice: 0 with a zero error bar."""
    f0 = feats(0)
    grown = dataclasses.replace(f0, features=1.1 * np.asarray(f0.features))
    got = ntkcalc.features_relative_change(grown, f0)
    assert got.value == pytest.approx(1.1**2 - 1, rel=1e-9)
    assert got.error == pytest.approx(0.0, abs=1e-9)
    assert abs(ntkcalc.features_distance(grown, f0).value) < 1e-9
    same = ntkcalc.features_relative_change(f0, f0)
    assert same.value == 0.0 and same.error == 0.0


def test_argument_errors():
    phi, y = random_features()
    with pytest.raises(ValueError, match="`groups`=1"):
        ntkcalc.features_alignment(phi, y, groups=1)
    with pytest.raises(ValueError, match="`ridge`"):
        ntkcalc.features_ridge(phi, y, ridge=0.0)
    assert np.trace(phi.T @ phi) / phi.shape[1] < 1e4  # a ridge above tr K̂ / k: no warning
    ntkcalc.features_ridge(phi, y, ridge=1e4)
    with pytest.raises(ValueError, match="`top`=60"):
        ntkcalc.features_spectrum(phi, top=60)
    with pytest.raises(TypeError, match="`features1`"):
        ntkcalc.features_distance(phi, feats(0))
    with pytest.raises(ValueError, match="seed"):
        ntkcalc.features_distance(feats(0), feats(1))
    with pytest.raises(ValueError, match="seed"):
        ntkcalc.features_relative_change(feats(0), feats(1))
