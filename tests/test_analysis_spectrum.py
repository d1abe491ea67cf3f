"""Spectrum statistics against closed forms, NumPy's matrix_rank and dense LAPACK."""

import numpy as np
import pytest
import scipy.linalg
import scipy.sparse.linalg as spla
from sklearn.datasets import load_digits
from sklearn.metrics.pairwise import rbf_kernel

from ntkcalc._analysis.spectrum import effective_rank, participation_ratio, spectrum
from ntkcalc._kind import KernelArray, per_output_kernel


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
    s = spectrum(per_output_kernel(k, num_outputs=1))
    assert s.kind == "per-output" and s.num_outputs == 1
    t = 50.0
    r0 = s.eigenvectors[:, -1]
    rt = scipy.linalg.expm(-t * k / 40) @ r0
    assert np.sum(rt**2) == pytest.approx(np.exp(-s.convergence_rate * t), rel=1e-8)
    r_any = np.random.default_rng(1).standard_normal(40)
    bound = np.exp(-s.convergence_rate * t) * np.sum(r_any**2)
    assert np.sum((scipy.linalg.expm(-t * k / 40) @ r_any) ** 2) <= bound
    assert s.condition_number == pytest.approx(s.eigenvalues[0] / s.eigenvalues[-1])
    # A plain array's kind is unknown (a trace over O outputs would be O·K): no rate.
    assert spectrum(k).convergence_rate is None and spectrum(k).kind is None


def test_convergence_rate_only_for_per_output_kernels():
    # Θ = K ⊗ I_O: the flattened (N·O, N·O) full kernel has K's eigenvalues, each O times
    # (common practice: eigenvalues of a Kronecker product are the products of eigenvalues), so
    # its rate equals K's; a trace kernel over O > 1 outputs (= O·K) gives no rate.
    x, _ = load_digits(return_X_y=True)
    k = rbf_kernel(x[:12] / 16.0, gamma=0.05)
    full = KernelArray(np.einsum("ij,ab->ijab", k, np.eye(3)), kind="full", num_outputs=3)
    s_full = spectrum(full)
    s_k = spectrum(per_output_kernel(k, num_outputs=3))
    np.testing.assert_allclose(s_full.eigenvalues, np.repeat(s_k.eigenvalues, 3), rtol=1e-12)
    assert s_full.kind == "full" and s_full.eigenvectors.shape == (36, 36)
    assert s_full.convergence_rate == pytest.approx(s_k.convergence_rate, rel=1e-12)
    assert s_full.convergence_rate == pytest.approx(2 * s_k.lambda_min / 12, rel=1e-12)
    trace = KernelArray(3 * k, kind="trace", num_outputs=3)
    assert spectrum(trace).convergence_rate is None and spectrum(trace).kind == "trace"
    one = KernelArray(k, kind="trace", num_outputs=1)
    assert spectrum(one).convergence_rate == pytest.approx(s_k.convergence_rate, rel=1e-12)
    for kind in ("logit-sum",):
        assert spectrum(KernelArray(k, kind=kind, num_outputs=2)).convergence_rate is None
    diag = KernelArray(np.stack([k, k], axis=2), kind="diagonal", num_outputs=2)
    with pytest.raises(ValueError, match="square"):
        spectrum(diag)  # (N, N, O): one kernel per output, not a single matrix


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


def _digits_net_397():
    # 64 inputs → 6 tanh units → 1 output: P = 64·6 + 6 + 6 + 1 = 397 parameters, so the NTK Gram
    # J Jᵀ over 500 examples has rank at most 397 (rank of a product, common practice).
    import flax.linen as nn
    import jax

    import ntkcalc

    class Narrow(nn.Module):
        @nn.compact
        def __call__(self, x):
            return nn.Dense(1)(nn.tanh(nn.Dense(6)(x)))

    x = (load_digits(return_X_y=True)[0][:500] / 16.0).astype(np.float32)
    with jax.enable_x64(False):
        model = Narrow()
        net = ntkcalc.Net.from_linen(model, model.init(jax.random.PRNGKey(0), x[:1]))
        k32 = ntkcalc.ntk(net, x, progress=False)
    k64 = ntkcalc.ntk(net, x, progress=False, dtype="float64")
    assert net.num_params == 397 and k32.dtype == np.float32 and k64.dtype == np.float64
    return k32, k64


def test_rank_of_a_float32_gram_uses_its_precision():
    # The issue's case: float64's eps on a float32 Gram (P = 397, n = 500) counts rounding as rank
    # (numpy.linalg.matrix_rank of the upcast array says > 397). With float32's eps the rank stays
    # ≤ P, or the verdict says it is unreliable (and warns exactly then); in float64 (computed
    # with dtype="float64") it agrees with numpy.linalg.matrix_rank and stays ≤ P.
    import warnings

    k32, k64 = _digits_net_397()
    assert np.linalg.matrix_rank(np.asarray(k32, dtype=np.float64)) > 397
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        s32 = spectrum(k32)
        upcast = spectrum(np.asarray(k32, dtype=np.float64), precision="float32")
    assert s32.precision == "float32" and s32.kind == "trace" and s32.num_outputs == 1
    assert s32.tol == pytest.approx(s32.eigenvalues[0] * 500 * np.finfo(np.float32).eps)
    assert s32.numerical_rank <= 397 and s32.condition_number == np.inf
    assert s32.reliable == (not caught) == upcast.reliable == (s32.caution is None)
    assert all("float32" in str(w.message) and w.category is RuntimeWarning for w in caught)
    assert upcast.numerical_rank == s32.numerical_rank and upcast.precision == "float32"
    s64 = spectrum(k64)
    assert s64.precision == "float64"
    assert s64.numerical_rank == np.linalg.matrix_rank(np.asarray(k64)) <= 397
    assert s64.condition_number == np.inf and s64.convergence_rate == pytest.approx(
        2 * max(s64.lambda_min, 0) / 500)
