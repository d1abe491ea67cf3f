"""The one rank rule: tolerance against numpy.linalg.matrix_rank (σ_max·max(m, n)·eps of the
array's dtype), and the reliability flag and warning on matrices with known singular values."""

import warnings

import numpy as np
import pytest

from ntkcalc._analysis.rank import MARGIN, precision_of, rank_verdict, rounding_tolerance


def _verdict(a, **kw):
    return rank_verdict(np.linalg.svd(np.asarray(a, dtype=np.float64), compute_uv=False),
                        size=a.shape[0], shape=a.shape, precision=precision_of(a), **kw)


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_rank_and_tolerance_match_numpy_matrix_rank(dtype):
    # numpy.linalg.matrix_rank: tol = S.max() * max(M, N) * eps(S.dtype); a float32 array keeps
    # float32's eps there, as here.
    rng = np.random.default_rng(0)
    for rank in (1, 4, 9):
        a = (rng.standard_normal((9, rank)) @ rng.standard_normal((rank, 12))).astype(dtype)
        v = _verdict(a)
        s = np.linalg.svd(a.astype(np.float64), compute_uv=False)
        assert v.rank == np.linalg.matrix_rank(a) == rank
        assert v.tol == pytest.approx(s[0] * 12 * np.finfo(dtype).eps, rel=1e-12)
        assert v.tol == rounding_tolerance(s[0], a.shape, dtype)
        assert v.precision == np.dtype(dtype).name and v.full_rank == (rank == 9)


def test_reliability_rule_on_known_singular_values():
    # diag(1, 1e-2, c·tol) in float32 (tol = 3·eps32): counted within MARGIN × tol is unreliable
    # and warns; 100 × tol is not. From the definition of the rule (ntkcalc/_analysis/rank.py).
    f32 = np.dtype(np.float32)
    tol = 3 * np.finfo(np.float32).eps
    with pytest.warns(RuntimeWarning, match="within 10× the rounding tolerance .* float32"):
        near = rank_verdict([1.0, 1e-2, 5 * tol], size=3, shape=(3, 3), precision=f32)
    assert near.rank == 3 and not near.reliable and near.margin == pytest.approx(5.0)
    assert "dtype='float64'" in near.caution
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        far = rank_verdict([1.0, 1e-2, 100 * tol], size=3, shape=(3, 3), precision=f32)
        below = rank_verdict([1.0, 1e-2, tol / 2], size=3, shape=(3, 3), precision=f32)
    assert far.reliable and far.caution is None and far.full_rank
    assert below.rank == 2 and below.reliable  # under the tolerance: not counted, not in doubt
    assert MARGIN == 10.0


def test_float64_warns_only_for_a_stated_full_rank():
    f64 = np.dtype(np.float64)
    tol = 3 * np.finfo(np.float64).eps
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        spec = rank_verdict([1.0, 2 * tol], size=2, shape=(2, 2), precision=f64,
                            states_full_rank=False)
        decay = rank_verdict([1.0, 1e-3, 4 * tol, tol / 3], size=4, shape=(4, 4), precision=f64)
    assert not spec.reliable and "borderline" in spec.caution
    assert not decay.reliable and decay.rank == 3 and "count depends" in decay.caution
    with pytest.warns(RuntimeWarning, match="full rank is not settled"):
        rank_verdict([1.0, 2 * tol], size=2, shape=(2, 2), precision=f64)


def test_precision_of():
    assert precision_of(np.ones(3, dtype=np.int64)) == np.float64  # integers are exact
    assert precision_of(np.ones(3), "float32") == np.float32
    assert precision_of(None, "bfloat16").name == "bfloat16"
    with pytest.raises(ValueError, match="`precision` must name a floating dtype"):
        precision_of(np.ones(3), "int8")
