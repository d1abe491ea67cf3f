"""Alignment, CKA, kernel distance and task spectrum against their definitions and closed forms."""

import numpy as np
import pytest
import scipy.stats
from sklearn.datasets import load_digits
from sklearn.metrics.pairwise import rbf_kernel

from ntkcalc._analysis.alignment import alignment, cka, kernel_distance, task_spectrum


@pytest.fixture(scope="module")
def features():
    x, y = load_digits(return_X_y=True)
    return x[:60] / 16.0, y[:60]


def test_alignment_closed_forms():
    # From the definition (Cristianini et al., NIPS 2002): A(yyᵀ, y) = 1; for ±1 labels
    # ⟨I, yyᵀ⟩ = n, ‖I‖ = √n, ‖yyᵀ‖ = n, so the uncentered A(I, y) = 1/√n.
    y = np.array([1.0, -1.0, 1.0, 1.0, -1.0, -1.0, 1.0])
    assert alignment(np.outer(y, y), y) == pytest.approx(1.0, rel=1e-14)
    assert alignment(np.outer(y, y), y, centered=False) == pytest.approx(1.0, rel=1e-14)
    assert alignment(np.eye(7), y, centered=False) == pytest.approx(1 / np.sqrt(7), rel=1e-14)


def test_centered_alignment_matches_explicit_centering(features):
    # Cortes, Mohri & Rostamizadeh, JMLR 13, 2012: A_c = ⟨HKH, HYYᵀH⟩ / (‖HKH‖ ‖HYYᵀH‖).
    x, labels = features
    k = rbf_kernel(x, gamma=0.02)
    y = np.eye(10)[labels]
    h = np.eye(60) - np.ones((60, 60)) / 60
    kc, yc = h @ k @ h, h @ y @ y.T @ h
    ref = np.sum(kc * yc) / (np.linalg.norm(kc) * np.linalg.norm(yc))
    assert alignment(k, y) == pytest.approx(ref, rel=1e-12)


def test_cka_matches_linear_cka_on_features_and_invariances(features):
    # Kornblith et al., ICML 2019: linear CKA = ‖YᵀX‖² / (‖XᵀX‖ ‖YᵀY‖) on centered features;
    # invariant to orthogonal maps and isotropic scaling, not to general invertible maps.
    x, _ = features
    rng = np.random.default_rng(0)
    feats = x[:, :20] @ rng.standard_normal((20, 8)) + 0.3 * rng.standard_normal((60, 8))
    xc, yc = x - x.mean(0), feats - feats.mean(0)
    ref = np.linalg.norm(yc.T @ xc) ** 2 / (np.linalg.norm(xc.T @ xc) * np.linalg.norm(yc.T @ yc))
    base = cka(x @ x.T, feats @ feats.T)
    assert base == pytest.approx(ref, rel=1e-12)
    q = scipy.stats.ortho_group.rvs(8, random_state=1)
    rotated = 3.7 * feats @ q
    assert cka(x @ x.T, rotated @ rotated.T) == pytest.approx(base, rel=1e-12)
    a = np.diag(np.linspace(0.1, 10.0, 8)) @ q
    warped = feats @ a
    assert abs(cka(x @ x.T, warped @ warped.T) - base) > 1e-3


def test_kernel_distance(features):
    # From the definition (Fort et al., NeurIPS 2020, arXiv:2010.15110): 0 for K with itself
    # and for any positive multiple; 1 for kernels with orthogonal supports.
    x, _ = features
    k = rbf_kernel(x, gamma=0.02)
    assert kernel_distance(k, k) == pytest.approx(0.0, abs=1e-15)
    assert kernel_distance(k, 5.0 * k) == pytest.approx(0.0, abs=1e-15)
    assert kernel_distance(np.diag([1.0, 0.0]), np.diag([0.0, 1.0])) == pytest.approx(1.0)


def test_task_spectrum_on_eigenvector_target(features):
    # Identity: a target equal to the 3rd eigenvector puts all power on mode 3; cumulative power
    # of any target ends at 1 (Parseval).
    x, labels = features
    k = rbf_kernel(x, gamma=0.02)
    w, v = np.linalg.eigh(k)
    ts = task_spectrum(k, v[:, -3])
    np.testing.assert_allclose(ts.eigenvalues, w[::-1], rtol=1e-10, atol=1e-13)
    np.testing.assert_allclose(ts.cumulative[:2], 0.0, atol=1e-20 + 1e-12)
    np.testing.assert_allclose(ts.cumulative[2:], 1.0, atol=1e-12)
    full = task_spectrum(k, np.eye(10)[labels])
    assert full.cumulative[-1] == pytest.approx(1.0, rel=1e-12)
    assert np.all(np.diff(full.cumulative) >= -1e-15)
    assert "power=array(60,)" in repr(full)


def test_bad_input():
    with pytest.raises(ValueError, match="`k1` is \\(2, 2\\) but `k2` is \\(3, 3\\)"):
        cka(np.eye(2), np.eye(3))
    with pytest.raises(ValueError, match="`y` has 3 rows but `k` is \\(4, 4\\)"):
        alignment(np.eye(4), np.ones(3))
    with pytest.raises(ValueError, match="zero Frobenius norm after centering"):
        alignment(np.eye(4), np.ones(4))
    with pytest.raises(ValueError, match="not symmetric"):
        kernel_distance(np.triu(np.ones((3, 3))), np.eye(3))


def test_integer_labels_mean_one_hot_targets_everywhere():
    # One label convention (ours): a 1-D integer array is class labels and becomes one-hot rows.
    # Kernel-target alignment with one-hot targets (Cristianini et al., NeurIPS 2001;
    # Cortes, Mohri & Rostamizadeh, JMLR 2012 for the centered form) must then be the same
    # number for both spellings of the labels, to rounding.
    from sklearn.datasets import load_digits

    import ntkcalc

    digits = load_digits()
    x = digits.data[:150] / 16.0
    labels = digits.target[:150]
    k = x @ x.T + 1.0
    one_hot = np.eye(10)[labels]
    assert ntkcalc.alignment(k, labels) == pytest.approx(ntkcalc.alignment(k, one_hot),
                                                         rel=1e-12, abs=1e-12)
    ts_int, ts_hot = ntkcalc.task_spectrum(k, labels), ntkcalc.task_spectrum(k, one_hot)
    np.testing.assert_allclose(ts_int.cumulative, ts_hot.cumulative, rtol=1e-12)
    r_int = ntkcalc.risk(k, labels, ridges=np.logspace(-2, 2, 5))
    r_hot = ntkcalc.risk(k, one_hot, ridges=np.logspace(-2, 2, 5))
    np.testing.assert_allclose(r_int.loo, r_hot.loo, rtol=1e-12)
    with pytest.raises(ValueError, match=r"class labels.*astype\(float\)"):
        ntkcalc.alignment(k, labels - 1)  # -1 is no class: say how to pass regression targets
    # Integer-valued regression targets have an explicit way in: floats.
    as_float = ntkcalc.alignment(k, labels.astype(float))
    assert as_float != pytest.approx(ntkcalc.alignment(k, one_hot))


def test_kernel_distance_of_a_kernel_to_itself_is_zero_not_negative():
    # 1 − cos(K, K) can round to −eps; a distance is never negative (definition).
    import ntkcalc

    rng = np.random.default_rng(3)
    a = rng.standard_normal((30, 7))
    for scale in (1.0, 3.0, 1e-3):
        assert 0.0 <= ntkcalc.kernel_distance(a @ a.T, scale * a @ a.T) < 1e-14
