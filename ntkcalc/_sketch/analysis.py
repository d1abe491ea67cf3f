r"""Analyses on NTK features in linear time, each number with a jackknife error bar.

With features φ (N, k) and ``K̂ = φ φᵀ``, everything below goes through k × k matrices gathered in
one streamed pass over the rows (``G = φᵀφ``, ``φᵀY``, column sums): O(N k²) time, O(k²) memory,
the features may stay on disk.

- spectrum: the nonzero eigenvalues of ``φ φᵀ`` are those of ``G`` (common practice: the SVD of
  φ); eigenvectors ``U = φ V Λ^{-1/2}``.
- kernel ridge in primal form: ``w = (G + r I)⁻¹ φᵀ y``, predictions ``φ w``, which equal
  ``K̂ (K̂ + r I)⁻¹ y`` (the push-through identity; scikit-learn's ``KernelRidge(alpha=r)``
  convention); GCV through ``tr H = Σ λ/(λ + r)`` (Golub, Heath & Wahba, Technometrics 21, 1979),
  leave-one-out through ``H_ii = φ_iᵀ (G + rI)⁻¹ φ_i`` (common practice).
- alignment, kernel distance and relative change: ``⟨K, YYᵀ⟩ = ‖φᵀY‖²`` is unbiased, but
  ``‖K̂‖²_F`` is biased up by the sketch noise; the unbiased U-statistic over distinct features
  is used instead: ``‖K‖²_F ≈ k/(k−1) (‖G‖²_F − Σ_m G_mm²)`` and, with ``C = φ1ᵀφ2``,
  ``⟨K1, K2⟩_F ≈ k/(k−1) (‖C‖²_F − Σ_m C_mm²)``
  (features of independent columns; for two checkpoints the same seed gives each column the same
  projection, so only distinct columns are independent); ``‖K1 − K2‖²_F`` is their sum
  ``‖K1‖² + ‖K2‖² − 2⟨K1, K2⟩`` (`features_relative_change`).

Error bars: the k features are independent and identically distributed, so the delete-a-group
jackknife over G groups of columns (Quenouille 1956; Efron & Stein, Ann. Stat. 9, 1981) gives a
standard error and a first-order bias estimate for any smooth function of K̂, each replicate
computed from a sub-block of G. Every result is an `Uncertain`: value, error, bias.
"""

from __future__ import annotations

import dataclasses
import warnings

import numpy as np
import scipy.linalg

from .._analysis import _checks
from .._analysis._eig import eigh_descending
from .._analysis._result import Result
from .._analysis.laziness import RESOLVE_BARS
from .features import Features

#: Default number of column groups of the jackknife.
GROUPS = 8
#: Bytes of features read per streamed chunk.
CHUNK_BYTES = 64 << 20


@dataclasses.dataclass(frozen=True, repr=False)
class Uncertain(Result):
    """An estimate from sketched features with its error bar.

    Fields:
        value: the estimate from all k features (float or array).
        error: jackknife standard error over groups of features (same shape): the spread of the
            estimate over independent sketches of this size.
        bias: jackknife estimate of the sketch's bias (value − bias is first-order corrected).
        groups: number of feature groups of the jackknife.
    """

    value: float | np.ndarray
    error: float | np.ndarray
    bias: float | np.ndarray
    groups: int

    @property
    def corrected(self) -> float | np.ndarray:
        """``value − bias``: the jackknife's first-order bias correction (Quenouille 1956). For
        top eigenvalues, which a sketch pushes up by about tr K / k, prefer this."""
        return self.value - self.bias

    def __float__(self) -> float:
        return float(self.value)


def _array(name: str, f):
    """The (rows, k) feature matrix of a `Features` or a 2-D array (not read here)."""
    phi = f.features if isinstance(f, Features) else f
    if not all(hasattr(phi, a) for a in ("shape", "dtype", "__getitem__")):
        phi = np.asarray(phi)
    if len(phi.shape) != 2 or phi.shape[1] < 2:
        raise ValueError(f"`{name}` has shape {tuple(phi.shape)}: pass `Features` or an (N, k) "
                         "feature matrix with k >= 2.")
    return phi


def _chunks(phi):
    step = max(1, CHUNK_BYTES // max(1, phi.shape[1] * np.dtype(phi.dtype).itemsize))
    for r0 in range(0, phi.shape[0], step):
        yield r0, np.asarray(phi[r0:r0 + step], dtype=np.float64)


def _moments(phi, ys=(), other=None):
    """One pass: (G = φᵀφ, column sums, [φᵀy per y], φᵀ·other if given)."""
    k = phi.shape[1]
    g = np.zeros((k, k))
    s = np.zeros(k)
    py = [np.zeros((k, y.shape[1])) for y in ys]
    cross = None if other is None else np.zeros((k, k))
    for r0, part in _chunks(phi):
        if not np.all(np.isfinite(part)):
            raise ValueError(_checks.NOT_FINITE.format(name="features", count=int(
                part.size - np.count_nonzero(np.isfinite(part)))) + " (an unfinished store?)")
        g += part.T @ part
        s += part.sum(0)
        for acc, y in zip(py, ys, strict=True):
            acc += part.T @ y[r0:r0 + part.shape[0]]
        if other is not None:
            cross += part.T @ np.asarray(other[r0:r0 + part.shape[0]], dtype=np.float64)
    return g, s, py, cross


def _groups(k: int, groups) -> list[np.ndarray]:
    """Columns kept by each jackknife replicate (one group of columns left out each)."""
    groups = _checks.positive_int("groups", groups)
    if groups < 2 or groups > k // 2:
        raise ValueError(f"`groups`={groups} must lie in [2, k/2 = {k // 2}]: each jackknife "
                         "replicate leaves out one group of at least two features.")
    bounds = np.linspace(0, k, groups + 1).astype(int)
    cols = np.arange(k)
    return [np.concatenate([cols[:bounds[g]], cols[bounds[g + 1]:]]) for g in range(groups)]


def _jackknife(estimate, k: int, groups) -> Uncertain:
    """``estimate(keep, scale)`` on all columns and on every delete-a-group replicate; ``scale``
    = k / len(keep) makes a replicate's Gram unbiased again."""
    keeps = _groups(k, groups)
    full = np.asarray(estimate(np.arange(k), 1.0), dtype=np.float64)
    reps = np.stack([np.asarray(estimate(keep, k / len(keep)), dtype=np.float64)
                     for keep in keeps])
    g = len(keeps)
    mean = reps.mean(0)
    error = np.sqrt((g - 1) / g * np.sum((reps - mean) ** 2, axis=0))
    bias = (g - 1) * (mean - full)
    if full.ndim == 0:
        return Uncertain(float(full), float(error), float(bias), g)
    return Uncertain(full, error, bias, g)


def _frobenius2(m: np.ndarray, k: int) -> float:
    """U-statistic of ‖K‖²_F (or ⟨K1, K2⟩_F) from the k × k matrix m of scaled inner products of
    k independent feature columns: k/(k−1) (‖m‖² − Σ m_mm²)."""
    return k / (k - 1) * (float(np.sum(m * m)) - float(np.sum(np.diag(m) ** 2)))


def _ridge_solve(gram: np.ndarray, rhs: np.ndarray, r: float) -> tuple[np.ndarray, float]:
    """((G + rI)⁻¹ rhs, tr (G + rI)⁻¹) by one Cholesky factorization (r > 0, G PSD)."""
    factor = scipy.linalg.cho_factor(gram + r * np.eye(gram.shape[0]), lower=True,
                                     check_finite=False)
    linv, info = scipy.linalg.lapack.dtrtri(factor[0], lower=1)
    if info != 0:
        raise np.linalg.LinAlgError(f"the features Gram + {r:g}·I is singular: raise `ridge`.")
    return scipy.linalg.cho_solve(factor, rhs, check_finite=False), float(
        np.sum(np.tril(linv) ** 2))


def features_trace(features) -> float:
    """``tr K̂ = ‖φ‖²_F``, the trace of the sketched kernel (an unbiased estimate of tr K), in one
    streamed pass over the rows (the features may stay on disk)."""
    return float(sum(np.sum(part * part) for _, part in _chunks(_array("features", features))))


def features_spectrum(features, *, top: int = 10, groups: int = GROUPS,
                      vectors: bool = False) -> tuple[Uncertain, np.ndarray | None]:
    """Top eigenvalues of ``K̂ = φ φᵀ`` from the k × k Gram ``φᵀφ`` (the SVD of φ), with errors.

    Args:
        features: `Features` or an (N, k) array (for ``"full"``: rows are (example, output)).
        top: how many eigenvalues (descending).
        groups: jackknife groups of features.
        vectors: also return the top eigenvectors (N, top) of K̂, ``φ V Λ^{-1/2}``.

    Returns:
        (`Uncertain` with (top,) arrays, eigenvectors or None). With N > k every eigenvalue of a
        sketch is pushed up by about ``(tr K − λ) / k``; the jackknife ``bias`` estimates that
        push to first order: read ``.corrected`` (docs/sketch.md has measurements).
    """
    phi = _array("features", features)
    top = _checks.positive_int("top", top)
    k = phi.shape[1]
    if top > k:
        raise ValueError(f"`top`={top} exceeds k = {k}: a sketch of k features has at most k "
                         "nonzero eigenvalues.")
    g, _, _, _ = _moments(phi)

    def estimate(keep, scale):
        w = eigh_descending(scale * g[np.ix_(keep, keep)], vectors=False)
        return np.pad(w, (0, max(0, top - w.size)))[:top]

    result = _jackknife(estimate, k, groups)
    if not vectors:
        return result, None
    return result, top_vectors(phi, g, top)[1]


def top_vectors(phi, g: np.ndarray, top: int) -> tuple[np.ndarray, np.ndarray]:
    """All eigenvalues of ``K̂ = φφᵀ`` from its Gram ``g = φᵀφ`` (descending, (k,)), and the top
    eigenvectors ``φ V Λ^{-1/2}`` (rows, top), orthonormal, streamed over φ's rows."""
    w, v = eigh_descending(g)
    head = w[:top]
    inv = np.where(head > 0, 1.0 / np.sqrt(np.maximum(head, 1e-300)), 0.0)
    u = np.concatenate([part @ (v[:, :top] * inv) for _, part in _chunks(phi)])
    return w, u


def clusters(eigenvalues: Uncertain, *, bars: float = RESOLVE_BARS) -> tuple[tuple[int, int], ...]:
    """Runs of consecutive sketched eigenvalues not told apart: ``(first, last)`` ranks (from 1)
    where each neighbour's bias-corrected value lies within ``bars`` combined standard errors
    ``√(σ_i² + σ_{i+1}²)`` of the next. Inside such a run the sketch mixes the eigenvectors:
    the run's sum is estimated, single values may be off by several error bars and out of order
    (docs/sketch.md); `refine_spectrum` resolves them with exact products."""
    w = np.atleast_1d(np.asarray(eigenvalues.corrected, dtype=np.float64))
    e = np.atleast_1d(np.asarray(eigenvalues.error, dtype=np.float64))
    close = np.abs(np.diff(w)) <= bars * np.hypot(e[:-1], e[1:])
    runs, start = [], None
    for i, c in enumerate(close):
        if c and start is None:
            start = i
        if not c and start is not None:
            runs.append((start + 1, i + 1))
            start = None
    if start is not None:
        runs.append((start + 1, close.size + 1))
    return tuple(runs)


@dataclasses.dataclass(frozen=True, repr=False)
class FeatureRidge(Result):
    """Kernel ridge regression on sketched features (primal, k × k), with error bars.

    Fields:
        ridge: r in ``(K̂ + r I) α = y`` (scikit-learn ``KernelRidge(alpha=r)`` convention).
        weights: (k, O) primal weights w; predictions are ``φ w``.
        train_predictions: (N, O); test_predictions: (M, O) or None.
        train_mse, gcv: `Uncertain` mean squared errors (per example and output).
        loo: leave-one-out mean squared error of the sketched kernel (no error bar: each jackknife
            replicate would need another pass over the rows).
        test_mse: `Uncertain` test mean squared error, or None without test targets.
    """

    ridge: float
    weights: np.ndarray
    train_predictions: np.ndarray
    test_predictions: np.ndarray | None
    train_mse: Uncertain
    gcv: Uncertain
    loo: float
    test_mse: Uncertain | None


def features_ridge(features, y, *, ridge: float, test_features=None, y_test=None,
                   groups: int = GROUPS) -> FeatureRidge:
    """Kernel ridge regression on ``K̂ = φ φᵀ`` in primal form: ``w = (φᵀφ + r I)⁻¹ φᵀ y``.

    Predictions ``φ w = K̂ (K̂ + r I)⁻¹ y`` are exactly those of `ntkcalc.ridge_fit` (and
    scikit-learn's ``KernelRidge(alpha=r, kernel="precomputed")``) on K̂, for O(N k²) instead of
    O(N³). Every error is a mean over examples and outputs.

    Args:
        features: `Features` or (N, k) training features.
        y: (N,) or (N, O) targets (integer labels become one-hot rows).
        ridge: r > 0 (the primal system is singular at r = 0 when N > k).
        test_features, y_test: optional (M, k) test features (same seed) and targets.
        groups: jackknife groups of features.

    Warns:
        RuntimeWarning when ``G + r I`` has condition number above 1e12, and when N > k and
        ``r < tr K̂ / k``: there the sketch's bias (not shown by the error bars) dominates.
    """
    phi = _array("features", features)
    n, k = phi.shape
    y = _checks.targets("y", y, n=n, kname="features", kshape=phi.shape)
    r = _checks.positive("ridge", ridge)
    test = None if test_features is None else _array("test_features", test_features)
    if test is not None and test.shape[1] != k:
        raise ValueError(f"`test_features` has {test.shape[1]} features but `features` has {k}: "
                         "compute both with the same k and seed.")
    if y_test is not None and test is None:
        raise ValueError("`y_test` needs `test_features`: pass both, or neither.")
    g, _, (py,), _ = _moments(phi, (y,))
    yy = float(np.sum(y * y))
    if test is not None and y_test is not None:
        yt = _checks.targets("y_test", y_test, n=test.shape[0], kname="test_features",
                             kshape=test.shape)
        gt, _, (pyt,), _ = _moments(test, (yt,))
        yyt = float(np.sum(yt * yt))
    noise = float(np.trace(g)) / k
    if n > k and r < noise:
        warnings.warn(
            f"`ridge`={r:.4g} is below tr K̂ / k = {noise:.4g} with more examples ({n}) than "
            f"features ({k}): the sketch's noise in the small-eigenvalue directions biases this "
            "fit beyond its error bars (measured: test MSE off by 0.1 at a hundredth of the mean "
            "diagonal, docs/performance.md). Raise `ridge` or k.",
            RuntimeWarning, stacklevel=2)
    top = scipy.linalg.eigh(g, eigvals_only=True, subset_by_index=(k - 1, k - 1),
                            check_finite=False)[0]
    _checks.warn_if_ill_conditioned(float((max(top, 0) + r) / r),
                                    what="features Gram + ridge·I", stacklevel=3)
    o = y.shape[1]

    def errors(keep, scale):
        """(train MSE, GCV, test MSE) of one replicate: one Cholesky factorization."""
        gk = scale * g[np.ix_(keep, keep)]
        pk = np.sqrt(scale) * py[keep]
        w, inv_trace = _ridge_solve(gk, pk, r)
        train = (yy - 2 * np.sum(w * pk) + np.sum(w * (gk @ w))) / (n * o)
        tr_h = len(keep) - r * inv_trace  # tr G (G + rI)⁻¹
        gcv = train / ((n - tr_h) / n) ** 2
        if test is None or y_test is None:
            return np.array([train, gcv, np.nan])
        gt_k = scale * gt[np.ix_(keep, keep)]
        pt_k = np.sqrt(scale) * pyt[keep]
        test_mse = (yyt - 2 * np.sum(w * pt_k) + np.sum(w * (gt_k @ w))) / (test.shape[0] * o)
        return np.array([train, gcv, test_mse])

    est = _jackknife(errors, k, groups)
    parts = [Uncertain(float(est.value[i]), float(est.error[i]), float(est.bias[i]), est.groups)
             for i in range(3)]
    w, _ = _ridge_solve(g, py, r)
    inv, _ = _ridge_solve(g, np.eye(k), r)
    preds, lev = [], []
    for _, part in _chunks(phi):
        preds.append(part @ w)
        lev.append(np.sum((part @ inv) * part, axis=1))
    train = np.concatenate(preds)
    h = np.concatenate(lev)
    loo = float(np.mean(((y - train) / (1.0 - h)[:, None]) ** 2))
    test_pred = None if test is None else np.concatenate([p @ w for _, p in _chunks(test)])
    return FeatureRidge(
        ridge=r, weights=w, train_predictions=train, test_predictions=test_pred,
        train_mse=parts[0], gcv=parts[1], loo=loo,
        test_mse=None if y_test is None else parts[2],
    )


def features_alignment(features, y, *, centered: bool = True,
                       groups: int = GROUPS) -> Uncertain:
    """Kernel-target alignment ``⟨K, YYᵀ⟩_F / (‖K‖_F ‖YYᵀ‖_F)`` of the kernel behind the features.

    The definition of `ntkcalc.alignment` (Cristianini et al., NIPS 2002; centered: Cortes, Mohri
    & Rostamizadeh, JMLR 13, 2012), with ``⟨K, YYᵀ⟩ = ‖φᵀY‖²`` and the unbiased U-statistic for
    ‖K‖²_F (module docstring), so the value estimates the exact kernel's alignment rather than the
    sketch's (whose ‖K̂‖_F is inflated by noise).

    Args:
        features: `Features` or (N, k) features; y: (N,) or (N, O) targets.
        centered: center K and YYᵀ (``H · H``, ``H = I − 11ᵀ/N``) first.
        groups: jackknife groups of features.
    """
    phi = _array("features", features)
    n, k = phi.shape
    y = _checks.targets("y", y, n=n, kname="features", kshape=phi.shape)
    g, s, (py,), _ = _moments(phi, (y,))
    if centered:
        ybar = y.mean(0)
        g = g - np.outer(s, s) / n
        py = py - np.outer(s, ybar)
        y = y - ybar
    yty = y.T @ y
    ynorm = float(np.linalg.norm(yty))
    if ynorm == 0:
        raise ValueError("`y` is constant (zero after centering): the alignment is undefined. "
                         "Pass non-constant targets.")

    def estimate(keep, scale):
        num = scale * float(np.sum(py[keep] ** 2))
        kk = _frobenius2(scale * g[np.ix_(keep, keep)], len(keep))
        return num / (np.sqrt(max(kk, 1e-300)) * ynorm)

    return _jackknife(estimate, k, groups)


def _pair_norms(features1: Features, features2: Features):
    """The one place for the U-statistics of two checkpoints' kernels: checks that the features
    share their projections, gathers ``G1 = φ1ᵀφ1``, ``G2 = φ2ᵀφ2`` and ``C = φ1ᵀφ2`` in one
    streamed pass each, and returns (k, ``norms(keep, scale)``) where ``norms`` gives the
    U-statistics (``‖K1‖²_F``, ``‖K2‖²_F``, ``⟨K1, K2⟩_F``) on the columns ``keep`` (the
    `_jackknife` convention), or None with a RuntimeWarning when a norm is not positive."""
    for name, f in (("features1", features1), ("features2", features2)):
        if not isinstance(f, Features):
            raise TypeError(f"`{name}` must be `Features` from `ntkcalc.ntk_features` (the seed "
                            f"and k are checked), got {type(f).__name__}.")
    same = ("k", "seed", "outputs", "method")
    diff = [a for a in same if getattr(features1, a) != getattr(features2, a)]
    if diff or features1.features.shape != features2.features.shape:
        what = ", ".join(diff) or "shape"
        raise ValueError(f"`features1` and `features2` differ in {what}: compute both with the "
                         "same inputs, k, seed, outputs and method, so they share projections.")
    p1, p2 = _array("features1", features1), _array("features2", features2)
    g1, _, _, c = _moments(p1, other=p2)
    g2, _, _, _ = _moments(p2)

    def norms(keep, scale):
        ix = np.ix_(keep, keep)
        a, b, ab = (_frobenius2(scale * m[ix], len(keep)) for m in (g1, g2, c))
        if a <= 0 or b <= 0:
            warnings.warn("a kernel's Frobenius norm estimate is not positive: k is too small "
                          "for this comparison of kernels; raise k.", RuntimeWarning,
                          stacklevel=5)
            return None
        return a, b, ab

    return p1.shape[1], norms


def _distance(n) -> float:
    """``1 − ⟨K1, K2⟩ / (‖K1‖ ‖K2‖)`` from the three U-statistics (or nan)."""
    return np.nan if n is None else 1.0 - n[2] / np.sqrt(n[0] * n[1])


def _relative_change(n) -> float:
    """Signed ``√((‖K1‖² + ‖K2‖² − 2⟨K1, K2⟩) / ‖K2‖²)`` from the three U-statistics (or nan)."""
    if n is None:
        return np.nan
    ratio = (n[0] + n[1] - 2.0 * n[2]) / n[1]
    return float(np.sign(ratio) * np.sqrt(abs(ratio)))


def features_changes(features1: Features, features2: Features, *,
                     groups: int = GROUPS) -> tuple[Uncertain, Uncertain]:
    """(`features_distance`, `features_relative_change`) of two checkpoints' features from one
    pass over them: the two laziness criteria, each with its jackknife error bar."""
    k, norms = _pair_norms(features1, features2)
    return (_jackknife(lambda keep, scale: _distance(norms(keep, scale)), k, groups),
            _jackknife(lambda keep, scale: _relative_change(norms(keep, scale)), k, groups))


def features_distance(features1: Features, features2: Features, *,
                      groups: int = GROUPS) -> Uncertain:
    """Kernel distance ``1 − ⟨K1, K2⟩_F / (‖K1‖_F ‖K2‖_F)`` between two checkpoints' kernels.

    The definition of `ntkcalc.kernel_distance` (Fort et al., NeurIPS 2020, arXiv:2010.15110),
    each Frobenius product by its unbiased U-statistic over distinct features. Both feature sets
    must come from the same seed, k, outputs mode and method on the same inputs: they then share
    every projection, so the distance reflects the kernels' change, not two sketches' noise.
    """
    k, norms = _pair_norms(features1, features2)
    return _jackknife(lambda keep, scale: _distance(norms(keep, scale)), k, groups)


def features_relative_change(features1: Features, features2: Features, *,
                             groups: int = GROUPS) -> Uncertain:
    """Relative change ``‖K1 − K2‖_F / ‖K2‖_F`` of the kernel behind ``features1`` from the one
    behind ``features2`` (the reference: the first checkpoint's), the laziness criterion
    `ntkcalc.laziness` reads beside the distance; it also sees a kernel that only grows or
    shrinks, which the distance does not.

    From the same unbiased U-statistics as `features_distance` (same requirements: one seed, k,
    outputs mode and method): ``‖K1 − K2‖²_F = ‖K1‖²_F + ‖K2‖²_F − 2⟨K1, K2⟩_F`` is unbiased, and
    with shared projections its noise shrinks with the change (the first-order terms cancel over
    the pairs of distinct features: our derivation, checked against independent seeds in
    tests/test_sketch_analysis.py), so a small change is still resolved. The estimate is the
    signed square root of ``‖K1 − K2‖²_F / ‖K2‖²_F``: noise can push that ratio below 0 when the
    kernels barely differ, read then as a negative change (within its error bars of 0), not
    clipped, so its jackknife error bar stays honest. A square root near 0 is biased (its
    jackknife ``bias`` says by how much): read ``.corrected``, as the laziness verdict does.
    `features_changes` gives this and `features_distance` from one pass over the features.
    """
    k, norms = _pair_norms(features1, features2)
    return _jackknife(lambda keep, scale: _relative_change(norms(keep, scale)), k, groups)
