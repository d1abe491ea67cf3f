"""The one rule for a numerical rank, and for whether a rank verdict holds at the data's precision.

Every rank, smallest eigenvalue, condition number and "full rank" verdict in ntkcalc comes from
`rank_verdict` (used by `spectrum`, `feature_rank` and `feature_rank_of`), so they agree on the
tolerance and on when to say that rounding decides the answer.

The rule. Let ``σ_1 >= σ_2 >= ...`` be the singular values of an (m, n) matrix (for a symmetric
kernel: the absolute eigenvalues) and ε the machine epsilon of the dtype the matrix was *computed
in* (float32: 1.19e-7, float64: 2.22e-16), not of the dtype it is stored in: a float32 kernel
upcast to float64 still carries float32 rounding.

- Tolerance ``tol = σ_1 · max(m, n) · ε`` (the LAPACK/NumPy ``matrix_rank`` convention, common
  practice; Press, Teukolsky, Vetterling & Flannery, "Numerical Recipes", 3rd ed. 2007, §2.6).
- Numerical rank ``r = #{i : σ_i > tol}``; full rank means ``r`` equals the number of rows that
  must be independent (n examples, or N·O for a kernel over outputs).
- Reliability. Rounding errors E of size about ``tol`` move every singular value by at most
  ``‖E‖₂`` (Weyl's inequality, Weyl 1912; Golub & Van Loan, "Matrix Computations", 4th ed. 2013,
  Cor. 8.6.2), and products over a long inner dimension (``J Jᵀ`` over P parameters, ``x W``
  over many inputs) can make ``‖E‖₂`` several times larger (Higham, "Accuracy and Stability of
  Numerical Algorithms", 2nd ed. 2002, §3.5). So a value counted in the rank but within
  ``MARGIN = 10`` times the tolerance (``tol < σ_r <= MARGIN · tol``) may be rounding, or may be
  pushed under the tolerance by it: the verdict is then *unreliable* and the result says so
  (``reliable=False`` and a ``caution``). A ``RuntimeWarning`` carries the caution when the
  precision is below float64 (float64 would settle it), or when a function that states a
  "full rank" verdict (`feature_rank`: interpolation hangs on it) states it on borderline
  float64 data. A float64 spectrum's borderline λ_min is already told by its condition number
  (flagged, without a warning), and a float64 matrix whose values decay smoothly through the
  tolerance has a count that depends on the tolerance while "singular to working precision"
  stands (flagged, without a warning). The same criterion
  covers λ_min and the condition number: when λ_min is counted and ``λ_min > MARGIN · tol``,
  its relative error from rounding is below about 1/MARGIN; when the rank is below full,
  λ_min is rounding noise (zero to working precision) and the condition number is reported as
  infinite. Values below the tolerance are rounding noise or genuinely tiny; they are not
  counted either way, which is the definition of numerical rank, not an unreliable verdict.
"""

from __future__ import annotations

import dataclasses
import warnings

import numpy as np

from ._result import Result

#: A counted singular value within this factor of the tolerance makes a rank verdict unreliable.
MARGIN = 10.0

UNRELIABLE = (
    "{what}: the smallest value counted in the rank, σ_{rank} = {value:.3g}, is within "
    "{margin:g}× the rounding tolerance {tol:.3g} of {precision} data, so rounding can decide "
    "the rank {rank} of {size}{full}. {advice}"
)
FLOAT64_ADVICE = (
    "Compute in float64 (ntkcalc.ntk(..., dtype='float64') or feature_rank(..., "
    "dtype='float64')) to settle it."
)
CLOSE_CALL = (
    "The matrix is that close to singular even in float64: treat \"full rank\" as borderline."
)
TOLERANCE_COUNT = (
    "Its values decay through the tolerance, so the count depends on it; the matrix is "
    "singular to working precision either way."
)


@dataclasses.dataclass(frozen=True, repr=False)
class RankVerdict(Result):
    """A numerical rank and whether it can be trusted at the precision of the data.

    Fields:
        rank: number of values above ``tol``.
        size: the rank that means full (rows that must be independent).
        full_rank: ``rank == size``.
        tol: the tolerance used.
        precision: dtype name whose ε set the default tolerance (where the data was computed).
        smallest_counted: the smallest value counted in the rank (0.0 when the rank is 0).
        margin: ``smallest_counted / tol`` (inf when tol is 0).
        reliable: False when ``smallest_counted <= MARGIN · tol`` (see the module's rule).
        caution: why it is unreliable, in words; None when reliable.
    """

    rank: int
    size: int
    full_rank: bool
    tol: float
    precision: str
    smallest_counted: float
    margin: float
    reliable: bool
    caution: str | None


def precision_of(data, precision=None) -> np.dtype:
    """The dtype whose rounding the data carries: ``precision`` if given, else ``data``'s dtype.

    Integer and boolean data are exact and count as float64. ``precision`` may be a dtype or its
    name (``"float32"``, ``"float64"``, ``"bfloat16"``, ...); pass it when the data was computed
    in lower precision and upcast afterwards.
    """
    if precision is not None:
        return _named(precision)
    dtype = getattr(data, "dtype", None)
    if dtype is None:
        try:
            dtype = np.asarray(data).dtype
        except (TypeError, ValueError):  # not an array: its validation says so by name
            return np.dtype(np.float64)
    dtype = np.dtype(dtype)
    if not np.issubdtype(dtype, np.floating) and dtype.kind != "V":
        return np.dtype(np.float64)
    return dtype


def _named(precision) -> np.dtype:
    try:
        dtype = np.dtype(precision)
    except TypeError:
        import ml_dtypes  # bfloat16 and friends (installed with JAX)

        try:
            dtype = np.dtype(getattr(ml_dtypes, str(precision)))
        except (AttributeError, TypeError):
            dtype = None
    if dtype is None or not (np.issubdtype(dtype, np.floating) or dtype.kind == "V"):
        raise ValueError(
            f"`precision` must name a floating dtype the data was computed in (e.g. 'float32', "
            f"'float64'), got {precision!r}."
        )
    return dtype


def machine_eps(dtype: np.dtype) -> float:
    """ε of a floating dtype (float16/bfloat16 included, through ml_dtypes.finfo)."""
    try:
        return float(np.finfo(dtype).eps)
    except ValueError:
        import ml_dtypes

        return float(ml_dtypes.finfo(dtype).eps)


def rounding_tolerance(sigma_max: float, shape: tuple[int, ...], precision) -> float:
    """``σ_max · max(shape) · ε(precision)``: the size of rounding in a singular value (or
    eigenvalue) of a matrix computed at ``precision`` — the tolerance of every rank here, and the
    yardstick for "below zero by more than rounding" (``−MARGIN ·`` this) in PSD checks."""
    return float(sigma_max) * max(shape) * machine_eps(precision_of(None, precision))


def rank_verdict(
    values,
    *,
    size: int,
    shape: tuple[int, int],
    precision: np.dtype,
    tol: float | None = None,
    what: str = "rank",
    states_full_rank: bool = True,
    stacklevel: int = 3,
) -> RankVerdict:
    """The numerical rank of a matrix from its singular values (or |eigenvalues|), with the
    reliability flag of the module's rule.

    Args:
        values: singular values or absolute eigenvalues, any order, all of them.
        size: the rank that means full.
        shape: (m, n) of the matrix, for ``max(m, n)`` in the tolerance.
        precision: dtype the matrix was computed in (see `precision_of`).
        tol: absolute tolerance instead of ``σ_1·max(m, n)·ε``; the reliability check uses it.
        what: the quantity's name, at the start of the caution (e.g. "feature rank of layer h").
        states_full_rank: the caller states a full-rank verdict (feature rank), so a
            borderline float64 "full rank" warns too; else only precision below float64 warns
            (see the module's rule).
        stacklevel: passed to ``warnings.warn`` (3: the caller of the public function).
    """
    s = np.sort(np.abs(np.asarray(values, dtype=np.float64)))[::-1]
    sigma_max = float(s[0]) if s.size else 0.0
    used = rounding_tolerance(sigma_max, shape, precision) if tol is None else float(tol)
    rank = int(np.count_nonzero(s > used))
    smallest = float(s[rank - 1]) if rank else 0.0
    margin = smallest / used if used > 0 else np.inf
    reliable = rank == 0 or margin > MARGIN
    caution = None
    if not reliable:
        low = machine_eps(precision) > np.finfo(np.float64).eps
        caution = UNRELIABLE.format(
            what=what, value=smallest, margin=MARGIN, tol=used,
            precision=np.dtype(precision).name, rank=rank, size=size,
            full=": full rank is not settled" if rank == size else "",
            advice=FLOAT64_ADVICE if low else CLOSE_CALL if rank == size else TOLERANCE_COUNT,
        )
        if low or (states_full_rank and rank == size):
            warnings.warn(caution, RuntimeWarning, stacklevel=stacklevel)
    return RankVerdict(
        rank=rank, size=int(size), full_rank=rank == size, tol=float(used),
        precision=np.dtype(precision).name, smallest_counted=smallest, margin=float(margin),
        reliable=bool(reliable), caution=caution,
    )
