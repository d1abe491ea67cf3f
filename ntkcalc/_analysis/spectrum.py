"""Spectrum of a kernel and the numbers read from it.

Dense kernels are decomposed by LAPACK in float64 (``scipy.linalg.eigh``); a matrix-free kernel
(``LinearOperator``) gives its top eigenpairs by Lanczos (``scipy.sparse.linalg.eigsh``, ARPACK's
implicitly restarted Lanczos; Lehoucq, Sorensen & Yang 1998). The numerical rank, λ_min, the
condition number and their reliability at the kernel's precision follow the one rule of `rank`.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import scipy.sparse.linalg as spla

from .._kind import describe, kind_of
from . import _checks
from ._counting import CountingOperator
from ._eig import eigh_descending
from ._result import Result
from .rank import precision_of, rank_verdict

#: Kinds whose (N, N) kernel (or flattened (N·O, N·O) full kernel) drives gradient descent on
#: every output: the convergence rate is given for these and for any kernel of one output.
PER_OUTPUT_KINDS = frozenset({"per-output", "full"})


@dataclasses.dataclass(frozen=True, repr=False)
class Spectrum(Result):
    """Eigen-analysis of a kernel.

    Fields:
        eigenvalues: (k,) descending (all n, or the ``top`` k).
        eigenvectors: (n, k) orthonormal columns matching ``eigenvalues``.
        effective_rank: exp of the Shannon entropy of ``p_i = |λ_i| / Σ|λ|`` (Roy & Vetterli,
            EUSIPCO 2007); 1 for rank one, n for a multiple of the identity.
        participation_ratio: ``(Σλ)² / Σλ²``.
        condition_number: ``λ_max / λ_min``; inf when the kernel is singular to working
            precision (numerical rank < n, so λ_min is rounding noise) or λ_min <= 0; None when
            only the top of the spectrum is known.
        numerical_rank: number of ``|λ_i| > tol``; None when only the top is known.
        tol: the rank tolerance used (default ``max|λ|·n·ε`` with ε of ``precision``, the
            LAPACK/NumPy ``matrix_rank`` convention); None when only the top is known.
        lambda_min: smallest eigenvalue; None when only the top is known.
        convergence_rate: ``2·max(λ_min, 0)/N`` for a per-output kernel: a ``"per-output"`` or
            ``"full"`` kernel (flattened to (N·O, N·O)), or any kernel of one output. With the
            kernel held fixed, gradient flow on
            ``L = (1/N) Σ_i ½‖f(x_i) − y_i‖²`` obeys ``‖f_t − y‖² <= exp(−rate·t)·‖f_0 − y‖²``
            at time ``t = lr·steps``. (Du et al., ICLR 2019, arXiv:1810.02054, state
            ``exp(−λ_0 t)`` for the loss ``½Σ(f − y)²`` without the 1/N and a kernel whose
            smallest eigenvalue stays above ``λ_0/2``.) None when only the top is known, and for
            kernels that are not per-output: a ``"trace"``, ``"diagonal"`` or ``"logit-sum"``
            kernel over O > 1 outputs, or a plain array of unknown kind (tag it with
            `ntkcalc.per_output_kernel`).
        decay_exponent: α of a least-squares fit ``log λ_i ≈ c − α log i`` over ranks
            ``decay_fit_range``.
        decay_fit_range: (first, last) ranks used by the fit, 1-based and inclusive.
        complete: True when all n eigenvalues are known; else the rank statistics
            (effective rank, participation ratio) describe the top k only.
        matvecs: operator applications used by Lanczos (None for a dense kernel).
        kind: the kernel's kind (``"full"``, ``"trace"``, ``"per-output"``, ...; see
            `ntkcalc.KernelArray`), or None for a plain array.
        num_outputs: O of the kernel's kind, or None.
        precision: the dtype the kernel was computed in, whose ε sets the tolerance.
        reliable: whether the rank, λ_min and condition number hold at that precision (the rule
            of `ntkcalc._analysis.rank`: no counted eigenvalue within 10× the tolerance); None
            when only the top is known.
        caution: why they do not, in words (also raised as a RuntimeWarning when the precision
            is below float64); else None.
    """

    eigenvalues: np.ndarray
    eigenvectors: np.ndarray
    effective_rank: float
    participation_ratio: float
    condition_number: float | None
    numerical_rank: int | None
    tol: float | None
    lambda_min: float | None
    convergence_rate: float | None
    decay_exponent: float
    decay_fit_range: tuple[int, int]
    complete: bool
    matvecs: int | None = None
    kind: str | None = None
    num_outputs: int | None = None
    precision: str = "float64"
    reliable: bool | None = None
    caution: str | None = None


def effective_rank(eigenvalues: np.ndarray) -> float:
    """``exp(−Σ p_i log p_i)`` with ``p_i = |λ_i| / Σ_j |λ_j|`` and ``0 log 0 = 0``.

    Roy & Vetterli, "The effective rank: a measure of effective dimensionality", EUSIPCO 2007
    (there on singular values; for a symmetric matrix these are ``|λ_i|``).
    """
    s = np.abs(np.asarray(eigenvalues, dtype=np.float64))
    total = s.sum()
    if total == 0:
        return 0.0
    p = s[s > 0] / total
    return float(np.exp(-np.sum(p * np.log(p))))


def participation_ratio(eigenvalues: np.ndarray) -> float:
    """``(Σλ)² / Σλ²``: n for a multiple of the identity, 1 for rank one (common practice)."""
    w = np.asarray(eigenvalues, dtype=np.float64)
    sq = float(np.sum(w**2))
    return float(np.sum(w) ** 2 / sq) if sq > 0 else 0.0


def _decay_fit(w: np.ndarray, fit_range: tuple[int, int] | None, default_last: int):
    positive = int(np.count_nonzero(w > 0))
    first, last = fit_range if fit_range is not None else (1, max(2, default_last))
    last = min(last, positive)
    if fit_range is not None and (first < 1 or first >= last):
        raise ValueError(
            f"`fit_range` must be (first, last) ranks with 1 <= first < last <= {positive} (the "
            f"number of positive eigenvalues), got {fit_range}."
        )
    if last - first < 1:
        return float("nan"), (first, last)
    ranks = np.arange(first, last + 1)
    slope, _ = np.polyfit(np.log(ranks), np.log(w[first - 1:last]), 1)
    return float(-slope), (int(first), int(last))


def spectrum(
    k,
    *,
    top: int | None = None,
    tol: float | None = None,
    num_examples: int | None = None,
    fit_range: tuple[int, int] | None = None,
    precision: str | None = None,
) -> Spectrum:
    """Eigenvalues, eigenvectors and rank statistics of a symmetric kernel.

    The numerical rank counts ``|λ_i| > tol`` with ``tol = max|λ|·n·ε``, ε the machine epsilon of
    the dtype the kernel was computed in (float32: 1.19e-7). The verdict is flagged unreliable
    (``reliable=False`` and a ``caution``) when a counted eigenvalue lies within 10× the
    tolerance: rounding of that size can decide the rank, λ_min and the condition number (the
    rule in ``ntkcalc/_analysis/rank.py``; docs/cautions.md). A RuntimeWarning carries the
    caution when the kernel's precision is below float64, where float64 would settle it.

    Args:
        k: (n, n) symmetric kernel (a `KernelArray` from `ntkcalc.ntk`, a stored view or a plain
            array), a 4-D ``"full"`` kernel (N, N, O, O), analysed as the (N·O, N·O) matrix over
            (example, output) pairs, or a square ``LinearOperator`` (then ``top`` is required
            and Lanczos finds the ``top`` largest eigenpairs).
        top: keep only the ``top`` largest eigenpairs (dense: the statistics still use all n).
        tol: absolute tolerance for the numerical rank; default ``max|λ|·n·ε``.
        num_examples: N in the convergence rate (default: the kernel's number of examples).
        fit_range: (first, last) 1-based ranks for the power-law fit; default from rank 1 to
            half the numerical rank (the top of a Lanczos spectrum: all k), leaving out the
            rounding floor.
        precision: the dtype the kernel was computed in (``"float32"``, ``"float64"``), when it
            differs from the array's dtype (e.g. a float32 kernel saved as float64); default the
            kernel's own dtype.

    Returns:
        `Spectrum`, with the kernel's ``kind``, ``num_outputs`` and ``precision``.
    """
    if tol is not None:
        tol = float(_checks.nonnegative("tol", tol))
    if top is not None:
        top = _checks.positive_int("top", top)
    kind, num_outputs = kind_of(k)
    dtype = precision_of(k, precision)
    if isinstance(k, spla.LinearOperator):
        op = _checks.square_operator("k", k)
        n = op.shape[0]
        if top is None or top >= n:
            raise ValueError(
                f"`top` must be an integer in [1, {n - 1}] for a LinearOperator `k` of shape "
                f"{op.shape} (Lanczos finds the top eigenpairs), got {top!r}. For the full "
                "spectrum pass the kernel as an array."
            )
        counter = CountingOperator(op)
        w, v = spla.eigsh(counter, k=top, which="LA")
        order = np.argsort(w)[::-1]
        w, v = w[order], v[:, order]
        decay, used = _decay_fit(w, fit_range, top)
        return Spectrum(
            eigenvalues=w, eigenvectors=v, effective_rank=effective_rank(w),
            participation_ratio=participation_ratio(w), condition_number=None,
            numerical_rank=None, tol=None, lambda_min=None, convergence_rate=None,
            decay_exponent=decay, decay_fit_range=used, complete=False,
            matvecs=counter.matvecs, kind=kind, num_outputs=num_outputs, precision=dtype.name,
        )
    if _checks.ndim_of(k) == 4:
        o = int(np.shape(k)[2])
        k, _ = _checks.kernel_to_flat("k", k, num_outputs=o)
        kind, num_outputs = "full", o
        n_ex = k.shape[0] // o
    else:
        k = _checks.square_kernel("k", k)
        n_ex = k.shape[0]
    n = k.shape[0]
    if top is not None and top > n:
        raise ValueError(f"`top`={top} exceeds the kernel size {n}. Pass top <= {n}.")
    w, v = eigh_descending(k)
    verdict = rank_verdict(w, size=n, shape=(n, n), precision=dtype, tol=tol,
                           what=f"spectrum of {describe(kind, num_outputs)}",
                           states_full_rank=False)
    lam_min = float(w[-1])
    cond = float(w[0] / lam_min) if verdict.full_rank and lam_min > 0 else float("inf")
    decay, used = _decay_fit(w, fit_range, verdict.rank // 2)
    if num_examples is not None:
        n_ex = _checks.positive_int("num_examples", num_examples)
    per_output = kind in PER_OUTPUT_KINDS or (kind is not None and num_outputs == 1)
    keep = n if top is None else top
    return Spectrum(
        eigenvalues=w[:keep], eigenvectors=v[:, :keep], effective_rank=effective_rank(w),
        participation_ratio=participation_ratio(w), condition_number=cond,
        numerical_rank=verdict.rank, tol=verdict.tol, lambda_min=lam_min,
        convergence_rate=2.0 * max(lam_min, 0.0) / n_ex if per_output else None,
        decay_exponent=decay, decay_fit_range=used, complete=True, kind=kind,
        num_outputs=num_outputs, precision=verdict.precision, reliable=verdict.reliable,
        caution=verdict.caution,
    )
