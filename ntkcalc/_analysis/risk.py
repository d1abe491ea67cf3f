"""Estimators of the test error of kernel ridge regression from the training set alone.

Everything is on one ridge axis, the scikit-learn ``KernelRidge`` convention of `ridge_fit`:
``α = (K + r·I)⁻¹ y`` with K the unnormalized (N, N) Gram matrix. Errors are mean squared errors,
averaged over examples and outputs. One eigendecomposition ``K = V Λ Vᵀ`` serves all ridges.

- Leave-one-out (closed form through the hat matrix ``H = K (K + rI)⁻¹``, common practice; e.g.
  Rifkin & Lippert, MIT-CSAIL-TR-2007-025): ``LOO = mean_i ((y_i − f_i) / (1 − H_ii))²``.
- GCV (Craven & Wahba, Numer. Math. 31, 1979; Golub, Heath & Wahba, Technometrics 21, 1979):
  ``GCV = (1/N)‖(I − H) y‖² / ((1/N) tr(I − H))²``.
- KARE (Jacot, Şimşek, Spadaro, Hongler & Gabriel, "Kernel Alignment Risk Estimator", NeurIPS
  2020, arXiv:2006.09796): with the ridge λ on ``K/N``,
  ``KARE = (1/N) yᵀ (K/N + λI)⁻² y / ((1/N) tr (K/N + λI)⁻¹)²``. Its λ is ``r / N`` on our axis;
  with that conversion KARE and GCV are algebraically the same number (``I − H = r (K + rI)⁻¹``),
  computed here by the two formulas independently.

Caveat (measured in this package's tests on scikit-learn's digits, 600 training images): with a
linear kernel GCV at its chosen ridge lies within ~2% of the held-out error, but with an RBF kernel
near interpolation (tiny ridge) GCV and KARE underestimate it by 15-45%, while LOO stays within
~12%. GCV replaces each ``H_ii`` by their mean, which fails when leverages are uneven; prefer LOO
there. On scikit-learn's iris with an RBF kernel (γ = 0.25, 75 training points) GCV picks the
smallest ridge of the grid and estimates an error some 50 times below LOO and the held-out error.

So `risk` compares them: when LOO at GCV's chosen ridge differs from GCV there by more than a
factor `DISAGREEMENT_FACTOR` (2), the estimates are flagged (a field and a RuntimeWarning) and the
recommended ridge is LOO's. The factor is our choice: on well-behaved data GCV lies 5–40% below
the held-out error (a ratio LOO/GCV up to about 1.7) while LOO stays within ~6–12% of it, so a
factor 2 separates the usual GCV bias from a failure. KARE equals GCV on this ridge axis and is
flagged with it. At a ridge where ``K + r·I`` is singular or indefinite (``λ_min(K) + r <= 0``,
the rule by which `ridge_fit` refuses a ridge) the estimates are undefined: they are NaN there,
with a RuntimeWarning.
"""

from __future__ import annotations

import dataclasses
import warnings

import numpy as np

from .._kind import describe, kind_of
from . import _checks
from ._eig import eigh_descending
from ._result import Result
from .rank import precision_of
from .ridge import indefinite_ridges

#: LOO / GCV ratio (either way) at GCV's chosen ridge above which the estimates disagree.
DISAGREEMENT_FACTOR = 2.0

DISAGREE = (
    "GCV and KARE disagree with leave-one-out: at GCV's chosen ridge {ridge:.3g} GCV estimates "
    "{gcv:.4g} but LOO {loo:.4g} ({ratio:.3g}×, more than the factor {factor:g} accepted). GCV "
    "replaces each leverage H_ii by their mean, which fails near interpolation when leverages are "
    "uneven; trust LOO here. Recommended ridge: LOO's {best:.3g} (LOO {loo_best:.4g})."
)


@dataclasses.dataclass(frozen=True, repr=False)
class RiskEstimates(Result):
    """Risk estimates per ridge, all on the `ridge_fit` (KernelRidge) ridge axis.

    Fields:
        ridges: (R,) ridges r in ``(K + r·I) α = y``.
        loo: (R,) leave-one-out mean squared error.
        gcv: (R,) generalized cross-validation estimate.
        kare: (R,) kernel alignment risk estimate (its own λ is ``ridges / N``).
        best: estimator name ("loo", "gcv", "kare") -> the ridge minimising it.
        ratio: LOO / GCV at GCV's chosen ridge (1 when they agree exactly).
        agree: whether ``1/DISAGREEMENT_FACTOR <= ratio <= DISAGREEMENT_FACTOR``.
        recommended: the ridge to use: GCV's when the estimators agree, else LOO's.
        recommended_by: "gcv" or "loo".
        indefinite: (R,) True where ``K + r·I`` is singular or indefinite; the estimates are NaN
            there.
        kernel: which kernel they came from (its kind and outputs, from `ntkcalc.ntk`, or "a
            plain array of unknown kind").
        kernel_dtype: the dtype the kernel was computed in (float32 keeps ~7 digits, which
            small ridges need more of).
    """

    ridges: np.ndarray
    loo: np.ndarray
    gcv: np.ndarray
    kare: np.ndarray
    best: dict
    ratio: float
    agree: bool
    recommended: float
    recommended_by: str
    indefinite: np.ndarray
    kernel: str = "a plain array of unknown kind"
    kernel_dtype: str = "float64"


def risk(k_train, y_train, *, ridges) -> RiskEstimates:
    """Leave-one-out, GCV and KARE risk estimates of kernel ridge regression, per ridge.

    Args:
        k_train: (N, N) symmetric PSD kernel.
        y_train: (N,) or (N, O) targets.
        ridges: scalar or (R,) ridges, all > 0, in the `ridge_fit` convention.

    Returns:
        `RiskEstimates`.

    Warns:
        RuntimeWarning when an estimator's minimum lies at the first or last ridge of a grid of
        several (the true minimiser may lie outside it; extend the grid); when GCV and LOO
        disagree by more than `DISAGREEMENT_FACTOR` at GCV's chosen ridge (then ``recommended``
        is LOO's ridge); and when ``K + r·I`` is singular or indefinite at some ridges (their
        estimates are NaN). All ridges indefinite raises ``numpy.linalg.LinAlgError``.
    """
    r = np.atleast_1d(_checks.nonnegative("ridges", ridges))
    if np.any(r <= 0):
        raise ValueError(
            _checks.NOT_POSITIVE.format(name="ridges", value=ridges)
            + " Leave-one-out and GCV are 0/0 at ridge 0 for an interpolating fit."
        )
    kernel = describe(*kind_of(k_train))
    kernel_dtype = str(precision_of(k_train))
    k = _checks.square_kernel("k_train", k_train)
    n = k.shape[0]
    y = _checks.targets("y_train", y_train, n=n, kname="k_train", kshape=k.shape)
    w, v = eigh_descending(k)
    bad, message = indefinite_ridges(float(w[-1]), r)
    if np.all(bad):
        raise np.linalg.LinAlgError(message)
    if message:
        warnings.warn(message + " Their risk estimates are NaN.", RuntimeWarning, stacklevel=2)
    z = v.T @ y  # (N, O)
    n_out = y.shape[1]

    shrink = r[:, None] / (w[None, :] + r[:, None])  # (R, N): eigenvalues of I − H
    resid = np.einsum("nk,rk,ko->rno", v, shrink, z)  # (I − H) y
    one_minus_hii = (v**2) @ shrink.T  # (N, R): diag(I − H)
    loo = np.mean((resid / one_minus_hii.T[:, :, None]) ** 2, axis=(1, 2))
    gcv = np.mean(resid**2, axis=(1, 2)) / np.mean(shrink, axis=1) ** 2

    lam = r / n
    inv = 1.0 / (w[None, :] / n + lam[:, None])  # (R, N): eigenvalues of (K/N + λI)⁻¹
    kare = (inv**2 @ np.sum(z**2, axis=1)) / (n * n_out) / np.mean(inv, axis=1) ** 2
    for values in (loo, gcv, kare):
        values[bad] = np.nan

    best, at = {}, {}
    ok = np.flatnonzero(~bad)
    for name, values in (("loo", loo), ("gcv", gcv), ("kare", kare)):
        i = int(ok[np.argmin(values[ok])])
        best[name], at[name] = float(r[i]), i
        if ok.size > 1 and i in (ok[0], ok[-1]):
            warnings.warn(
                f"The {name.upper()} minimum lies at the {'first' if i == ok[0] else 'last'} "
                f"ridge of `ridges` ({r[i]:.3g}); the minimiser may lie outside the grid. Extend "
                "`ridges`.",
                RuntimeWarning,
                stacklevel=2,
            )
    g = at["gcv"]
    ratio = float(loo[g] / gcv[g]) if gcv[g] > 0 else float("inf")
    agree = bool(1.0 / DISAGREEMENT_FACTOR <= ratio <= DISAGREEMENT_FACTOR)
    if not agree:
        warnings.warn(
            DISAGREE.format(ridge=r[g], gcv=gcv[g], loo=loo[g], ratio=ratio,
                            factor=DISAGREEMENT_FACTOR, best=best["loo"],
                            loo_best=loo[at["loo"]]),
            RuntimeWarning,
            stacklevel=2,
        )
    by = "gcv" if agree else "loo"
    return RiskEstimates(ridges=r, loo=loo, gcv=gcv, kare=kare, best=best, ratio=ratio,
                         agree=agree, recommended=best[by], recommended_by=by, indefinite=bad,
                         kernel=kernel, kernel_dtype=kernel_dtype)
