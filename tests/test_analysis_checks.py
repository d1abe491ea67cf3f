"""The shared input checks: each names the argument, what came, and what to do."""

import numpy as np
import pytest
import scipy.sparse.linalg as spla

from ntkcalc._analysis import _checks


def test_square_kernel():
    with pytest.raises(ValueError, match=r"`k` must be a square \(n, n\) kernel.*\(2, 3\)"):
        _checks.square_kernel("k", np.ones((2, 3)))
    with pytest.raises(ValueError, match=r"`k` is not symmetric: .*symmetrize"):
        _checks.square_kernel("k", np.array([[1.0, 2.0], [0.0, 1.0]]))
    with pytest.raises(ValueError, match=r"`k` contains 1 non-finite"):
        _checks.square_kernel("k", np.array([[1.0, 0.0], [0.0, np.inf]]))
    with pytest.raises(TypeError, match="`k` is a LinearOperator"):
        _checks.square_kernel("k", spla.aslinearoperator(np.eye(2)))
    # Rounding-level asymmetry (below SYMMETRY_RTOL) is accepted and removed exactly.
    k = np.array([[1.0, 0.5 + 1e-9], [0.5, 1.0]])
    out = _checks.square_kernel("k", k)
    assert np.array_equal(out, out.T)


def test_targets_and_cross_kernel():
    with pytest.raises(ValueError, match=r"`y` has 3 rows but `k` is \(4, 4\): both need one row"):
        _checks.targets("y", np.ones(3), n=4, kname="k", kshape=(4, 4))
    assert _checks.targets("y", np.ones(4), n=4, kname="k", kshape=(4, 4)).shape == (4, 1)
    with pytest.raises(ValueError, match=r"`kx` is \(2, 3\) but .* needs shape \(M, 4\)"):
        _checks.cross_kernel("kx", np.ones((2, 3)), n=4, kname="k")
    with pytest.raises(ValueError, match=r"`f` has 3 output\(s\) per example but `g` has 2"):
        _checks.same_outputs("f", np.ones((4, 3)), want=2, ref="`g`")


def test_scalars_and_steps():
    with pytest.raises(ValueError, match="`ridge` must be >= 0, got -1"):
        _checks.nonnegative("ridge", -1.0)
    with pytest.raises(ValueError, match="`lr` must be > 0, got 0"):
        _checks.positive("lr", 0)
    with pytest.raises(ValueError, match="`batch` must be an integer >= 1"):
        _checks.positive_int("batch", 2.5)
    with pytest.raises(ValueError, match="`steps` must be sorted .* np.sort"):
        _checks.sorted_times("steps", [3, 1], integer=True)
    with pytest.raises(ValueError, match="`steps` must be a whole number S >= 0"):
        _checks.sorted_times("steps", -2, integer=True)
    assert _checks.sorted_times("steps", 3, integer=True).tolist() == [0, 1, 2, 3]
    assert _checks.sorted_times("steps", [0.5, 2.0], integer=False).tolist() == [0.5, 2.0]


def test_labels_accept_integer_and_one_hot():
    kw = dict(n=3, num_classes=3, kname="k", kshape=(3, 3))
    onehot, fmt = _checks.labels("y", np.array([0, 2, 1]), **kw)
    assert fmt == "integer" and np.array_equal(onehot, np.eye(3)[[0, 2, 1]])
    same, fmt2 = _checks.labels("y", np.eye(3)[[0, 2, 1]], **kw)
    assert fmt2 == "one-hot" and np.array_equal(same, onehot)
    assert _checks.labels("y", np.full((3, 3), 0.5), **kw) == (None, None)
    with pytest.raises(ValueError, match=r"integer labels in \[0, 3\] .* 3 outputs:"):
        _checks.labels("y", np.array([0, 3, 1]), **kw)


def test_kernel_to_flat_layout():
    # Row index i·O + a of the flattened (N·O, N·O) kernel is Θ[i, :, a, :] (from the layout).
    k = np.random.default_rng(0).standard_normal((3, 3, 2, 2))
    k = k + k.transpose(1, 0, 3, 2)
    flat, block = _checks.kernel_to_flat("k", k, num_outputs=2)
    assert not block and flat[1 * 2 + 0, 2 * 2 + 1] == k[1, 2, 0, 1]
    with pytest.raises(ValueError, match="a kernel over 2 outputs, but the outputs have 3"):
        _checks.kernel_to_flat("k", k, num_outputs=3)


def test_ill_conditioned_warning():
    with pytest.warns(RuntimeWarning, match="ill-conditioned .* 1e\\+14"):
        _checks.warn_if_ill_conditioned(1e14, what="`k`")
