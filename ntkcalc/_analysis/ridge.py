"""Kernel ridge regression on a precomputed kernel.

Solves ``(K + ridge·I) α = y`` and predicts ``f(x) = K(x, train) α``: the convention of
scikit-learn's ``KernelRidge(alpha=ridge, kernel="precomputed")`` (ridge on the unnormalized Gram
matrix, no intercept). Three solvers:

- one ridge: Cholesky (``scipy.linalg.cho_factor``), with jitter escalation when the factorization
  fails and a warning with the jitter used;
- many ridges: one eigendecomposition ``K = V Λ Vᵀ``, then ``α_r = V (Λ + r)⁻¹ Vᵀ y`` per ridge;
- a matrix-free kernel (``scipy.sparse.linalg.LinearOperator``): conjugate gradients
  (``scipy.sparse.linalg.cg``, Hestenes & Stiefel 1952), warning when it does not converge.
"""

from __future__ import annotations

import dataclasses
import warnings
from typing import Literal

import numpy as np
import scipy.linalg
import scipy.sparse.linalg as spla

from . import _checks
from ._eig import eigh_descending
from ._result import Result

#: Jitter escalation for the Cholesky solve: multiples of ``mean(diag K)`` tried in turn.
JITTER_STEPS = tuple(10.0**p for p in range(-14, -5))

Solver = Literal["cholesky", "eigh", "cg"]


@dataclasses.dataclass(frozen=True, repr=False)
class RidgeFit(Result):
    """A kernel ridge fit. With R ridges every array field gains a leading ridge axis.

    Fields:
        ridge: the ridge (scalar) or ridges (R,).
        dual_coef: α, (N, O) or (R, N, O).
        train_predictions: ``K α``, (N, O) or (R, N, O).
        test_predictions: ``K(test, train) α``, (M, O) or (R, M, O); None without a test kernel.
        solver: "cholesky", "eigh" or "cg".
        jitter: extra diagonal added to make the Cholesky factorization succeed (0.0 if none).
    """

    ridge: float | np.ndarray
    dual_coef: np.ndarray
    train_predictions: np.ndarray
    test_predictions: np.ndarray | None
    solver: Solver
    jitter: float = 0.0

    def predict(self, k_new_train) -> np.ndarray:
        """Predictions ``K(new, train) α``: (M, O), or (R, M, O) for several ridges.

        ``k_new_train`` is (M, N) as an array, or a LinearOperator of that shape.
        """
        return self._predict(_test_kernel("k_new_train", k_new_train, n=self.dual_coef.shape[-2]))

    def _predict(self, k) -> np.ndarray:
        if isinstance(k, spla.LinearOperator):
            n = self.dual_coef.shape[-2]
            coef = np.moveaxis(self.dual_coef, -2, 0).reshape(n, -1)  # (N, [R·]O)
            out = np.asarray(k.matmat(coef)).reshape(-1, *self.dual_coef.shape[:-2],
                                                     self.dual_coef.shape[-1])
            return np.moveaxis(out, 0, -2)
        return k @ self.dual_coef


def _test_kernel(name: str, k, *, n: int):
    """A validated (M, n) test-train kernel: an array or a LinearOperator."""
    if isinstance(k, spla.LinearOperator):
        if len(k.shape) != 2 or k.shape[1] != n:
            raise ValueError(
                _checks.CROSS_MISMATCH.format(name=name, shape=k.shape, kname="k_train", n=n,
                                              tail="")
            )
        return k
    return _checks.cross_kernel(name, k, n=n, kname="k_train")


def _cholesky_solve(k: np.ndarray, y: np.ndarray, ridge: float) -> tuple[np.ndarray, float]:
    n = k.shape[0]
    scale = float(np.mean(np.diag(k))) if n else 1.0
    scale = scale if scale > 0 else 1.0
    for jitter in (0.0, *(scale * s for s in JITTER_STEPS)):
        a = k + (ridge + jitter) * np.eye(n)
        try:
            factor = scipy.linalg.cho_factor(a, check_finite=False)
        except np.linalg.LinAlgError:
            continue
        break
    else:
        w_min = float(scipy.linalg.eigh(k, eigvals_only=True, subset_by_index=(0, 0))[0])
        raise np.linalg.LinAlgError(
            f"`k_train` + ridge·I is not positive definite even with jitter "
            f"{scale * JITTER_STEPS[-1]:.3g}·I (smallest eigenvalue of `k_train` ≈ {w_min:.3g}). "
            "A kernel must be positive semi-definite: check how it was computed, or increase "
            "`ridge`."
        )
    if jitter:
        warnings.warn(
            f"Cholesky of `k_train` + {ridge:g}·I failed; added jitter {jitter:.3g}·I "
            f"({jitter / scale:.1e} of the mean diagonal). The fit is that of ridge "
            f"{ridge + jitter:.6g}.",
            RuntimeWarning,
            stacklevel=3,
        )
    anorm = float(np.max(np.sum(np.abs(a), axis=0)))
    rcond, _ = scipy.linalg.lapack.dpocon(factor[0], anorm, uplo="L" if factor[1] else "U")
    _checks.warn_if_ill_conditioned(
        1.0 / rcond if rcond > 0 else np.inf, what="`k_train` + ridge·I", stacklevel=4
    )
    return scipy.linalg.cho_solve(factor, y, check_finite=False), jitter


INDEFINITE = (
    "`{name}` + ridge·I is singular or indefinite for ridge(s) {ridges} (smallest eigenvalue of "
    "`{name}` ≈ {w_min:.3g}). Use ridges > {floor:.3g}."
)


def indefinite_ridges(w_min: float, ridges: np.ndarray, *, name: str = "k_train"):
    """The ridges at which ``K + r·I`` is singular or indefinite (``λ_min(K) + r <= 0``).

    The one rule by which `ridge_fit` (several ridges) refuses a ridge and `risk` warns about it.

    Returns:
        ``(mask, message)``: a boolean mask over ``ridges``, and the message naming the bad
        ridges and the smallest admissible ridge (None when no ridge is bad).
    """
    bad = w_min + ridges <= 0
    if not np.any(bad):
        return bad, None
    return bad, INDEFINITE.format(name=name, ridges=ridges[bad].tolist(), w_min=w_min,
                                  floor=max(-w_min, 0.0))


def _eigh_solve(k: np.ndarray, y: np.ndarray, ridges: np.ndarray) -> np.ndarray:
    w, v = eigh_descending(k)
    denom = w[None, :] + ridges[:, None]  # (R, N)
    top = denom[:, 0]
    low = denom[:, -1]
    _, message = indefinite_ridges(float(w[-1]), ridges)
    if message:
        raise np.linalg.LinAlgError(message)
    _checks.warn_if_ill_conditioned(
        float(np.max(top / low)), what="`k_train` + ridge·I (worst ridge)", stacklevel=4
    )
    vty = v.T @ y  # (N, O)
    return np.einsum("nk,rk,ko->rno", v, 1.0 / denom, vty)


def _cg_solve(op: spla.LinearOperator, y: np.ndarray, ridge: float, *, rtol: float,
              maxiter: int | None) -> np.ndarray:
    n = op.shape[0]
    shifted = spla.LinearOperator(
        (n, n), matvec=lambda v: np.asarray(op.matvec(v)).ravel() + ridge * np.ravel(v),
        dtype=np.float64,
    )
    cols = []
    for j in range(y.shape[1]):
        x, info = spla.cg(shifted, y[:, j], rtol=rtol, atol=0.0, maxiter=maxiter)
        if info != 0:
            res = np.linalg.norm(shifted.matvec(x) - y[:, j]) / max(np.linalg.norm(y[:, j]), 1e-300)
            warnings.warn(
                f"Conjugate gradients did not converge for output {j} (ridge {ridge:g}) within "
                f"{info if info > 0 else 'the allowed'} iterations: relative residual {res:.2g} "
                f"> rtol {rtol:g}. The dual coefficients are approximate; raise `cg_maxiter` or "
                "`ridge`.",
                RuntimeWarning,
                stacklevel=3,
            )
        cols.append(x)
    return np.stack(cols, axis=1)


def ridge_fit(
    k_train,
    y_train,
    *,
    ridge,
    k_test_train=None,
    cg_rtol: float = 1e-10,
    cg_maxiter: int | None = None,
) -> RidgeFit:
    """Kernel ridge regression: ``α = (K + ridge·I)⁻¹ y``, predictions ``K(·, train) α``.

    The same convention as scikit-learn's ``KernelRidge(alpha=ridge, kernel="precomputed")``: the
    ridge is added to the unnormalized Gram matrix. (A ridge λ on ``K/N``, as in KARE, is
    ``ridge = N·λ`` here.)

    Args:
        k_train: (N, N) symmetric kernel, or a square ``LinearOperator`` (solved by conjugate
            gradients).
        y_train: (N,) or (N, O) targets; a 1-D target is one output column.
        ridge: scalar >= 0, or (R,) ridges solved together through one eigendecomposition.
        k_test_train: optional (M, N) test-train kernel (array, or LinearOperator with an
            operator ``k_train``).
        cg_rtol, cg_maxiter: conjugate-gradient tolerance (relative residual) and iteration cap.

    Returns:
        `RidgeFit`; with R ridges, arrays have a leading (R,) axis.

    Warns:
        RuntimeWarning when jitter was needed, the system is ill-conditioned (condition number
        > 1e12), or conjugate gradients did not converge: in these cases the coefficients are
        not accurate to float64.
    """
    ridges = _checks.nonnegative("ridge", ridge)
    if isinstance(k_train, spla.LinearOperator):
        op = _checks.square_operator("k_train", k_train)
        n = op.shape[0]
        y = _checks.targets("y_train", y_train, n=n, kname="k_train", kshape=op.shape)
        k_test = None if k_test_train is None else _test_kernel("k_test_train", k_test_train, n=n)
        alphas = np.stack(
            [_cg_solve(op, y, float(r), rtol=cg_rtol, maxiter=cg_maxiter) for r in ridges.ravel()]
        )
        train = np.stack([np.asarray(op.matmat(a)) for a in alphas])
        solver, jitter = "cg", 0.0
    else:
        k = _checks.square_kernel("k_train", k_train)
        n = k.shape[0]
        y = _checks.targets("y_train", y_train, n=n, kname="k_train", kshape=k.shape)
        k_test = None if k_test_train is None else _test_kernel("k_test_train", k_test_train, n=n)
        if ridges.ndim == 0:
            alpha, jitter = _cholesky_solve(k, y, float(ridges))
            alphas, solver = alpha[None], "cholesky"
        else:
            alphas, solver, jitter = _eigh_solve(k, y, ridges), "eigh", 0.0
        train = k @ alphas
    squeeze = ridges.ndim == 0
    fit = RidgeFit(
        ridge=float(ridges) if squeeze else ridges,
        dual_coef=alphas[0] if squeeze else alphas,
        train_predictions=train[0] if squeeze else train,
        test_predictions=None,
        solver=solver,
        jitter=float(jitter),
    )
    if k_test is not None:
        fit = dataclasses.replace(fit, test_predictions=fit._predict(k_test))
    return fit
