r"""Top eigenvalues refined with exact NTK-vector products, started from a sketch's subspace.

A sketch resolves the top of a spectrum as a cluster: when eigenvalues lie closer together than
the sketch's noise, `features_spectrum` mixes their directions and single eigenvalues move by
several error bars (docs/sketch.md). Exact products ``Θ V`` (an `ntkcalc.NTKOperator`: a VJP and
a JVP over the data per probe, never N² entries) fix that in linear time. Starting from the
sketch's top ``q = top + extra`` eigenvectors ``V₀``, each block adds the next Krylov block
``Θ V_b`` (orthogonalised against all earlier ones) and the Rayleigh–Ritz problem on the basis
``B`` of all blocks so far gives Ritz values ``θ`` (the eigenvalues of ``Bᵀ Θ B``):

- **Lower bounds.** ``θ_i ≤ λ_i`` for each i (Cauchy interlacing; B. N. Parlett, *The Symmetric
  Eigenvalue Problem*, SIAM 1998, ch. 10 — from memory), and each block can only raise them: the
  history of ``θ`` per block shows the convergence.
- **A residual bound.** For a Ritz pair (θ, u), ``r = Θu − θu``; some eigenvalue of Θ lies within
  ``‖r‖`` of θ (the residual bound for symmetric matrices, Parlett 1998, Thm 4.5.1 — from memory).
  Inside a near-degenerate cluster that eigenvalue need not be λ_i, so ``‖r‖`` bounds how far θ
  is from the spectrum, not from λ_i; the last block's rise is the practical error estimate.
- **Cost.** ``q`` products per block (``O`` probes each in ``"trace"``), each a pass over the
  data: linear in N. The block Krylov start from a sketch needs about two blocks fewer than a
  random start on the benchmark MLP (docs/performance.md); randomized block Krylov methods:
  Halko, Martinsson & Tropp, SIAM Review 53 (2011), arXiv:0909.4061; Musco & Musco, NeurIPS 2015,
  arXiv:1504.05477.
"""

from __future__ import annotations

import dataclasses
import warnings

import numpy as np
import scipy.sparse.linalg as spla

from .._analysis import _checks
from .._analysis._eig import eigh_descending
from .._analysis._result import Result
from .._analysis.operator import NTKOperator
from .analysis import _array, _moments, top_vectors
from .features import Features

#: Relative rise of a top Ritz value in the last block below which the refinement stops.
TOLERANCE = 0.02


@dataclasses.dataclass(frozen=True, repr=False)
class RefinedSpectrum(Result):
    """Top eigenvalues of the exact kernel by block Krylov Rayleigh–Ritz from a sketch.

    Fields:
        values: (top,) Ritz values, descending: each a lower bound of the matching eigenvalue.
        residuals: (top,) ``‖Θu_i − θ_i u_i‖``: an eigenvalue of Θ lies within each.
        rise: (top,) relative rise of each value in the last block (zeros after a single
            block, which cannot say): the practical error estimate while the values climb.
        history: (blocks, top) the values after each block.
        sketched: (top,) the sketch's own eigenvalues of ``φφᵀ`` (not bias-corrected).
        converged: whether every value rose by less than ``tol`` in the last block (or the
            basis became an invariant subspace, which makes the values exact).
        blocks, products: blocks run and operator columns applied.
        outputs, dtype, method: the operator's kernel mode, compute dtype and product method
            (None for a plain matrix or LinearOperator).
        vectors: (rows, top) Ritz vectors when asked for, else None.
    """

    values: np.ndarray
    residuals: np.ndarray
    rise: np.ndarray
    history: np.ndarray
    sketched: np.ndarray
    converged: bool
    blocks: int
    products: int
    outputs: str | None
    dtype: str | None
    method: str | None
    vectors: np.ndarray | None = None


def _operator(operator, rows: int):
    """``operator`` as a square LinearOperator with ``rows`` rows, and its (outputs, dtype,
    method) when it is an `NTKOperator`."""
    if isinstance(operator, NTKOperator):
        op, info = operator, (operator.outputs, str(operator.dtype_used), operator.method)
    else:
        try:
            op = spla.aslinearoperator(operator)
        except TypeError as err:
            raise TypeError(f"`operator` must be an ntkcalc.NTKOperator, a scipy LinearOperator "
                            f"or an (N, N) array, got {type(operator).__name__}.") from err
        info = (None, None, None)
    if op.shape != (rows, rows):
        raise ValueError(f"`operator` has shape {op.shape} but the features have {rows} rows: "
                         "build both from the same inputs (and the same `outputs` mode).")
    return op, info


def _orthonormal(p: np.ndarray, scale: float) -> np.ndarray:
    """Orthonormal columns spanning ``p``'s directions above ``1e-10·scale`` (dropped: ones
    already in the basis)."""
    u, s, _ = np.linalg.svd(p, full_matrices=False)
    return u[:, s > 1e-10 * max(scale, 1e-300)]


def _start(phi, q: int) -> tuple[np.ndarray, np.ndarray]:
    """The sketch's top-q eigenvectors of φφᵀ, orthonormal (rows, q) again in float64 (columns
    of zero eigenvalue dropped), and its eigenvalues."""
    w, u = top_vectors(phi, _moments(phi)[0], q)
    return _orthonormal(u, 1.0), w


def refine_spectrum(features, operator, *, top: int = 10, extra: int = 10, max_blocks: int = 6,
                    tol: float = TOLERANCE, vectors: bool = False) -> RefinedSpectrum:
    """Top eigenvalues of the exact kernel: block Krylov Rayleigh–Ritz from the sketch's subspace.

    Args:
        features: `Features` or an (rows, k) feature matrix of the same inputs (and outputs mode)
            as ``operator``.
        operator: the exact kernel as an `ntkcalc.ntk_operator` (linear time), or any symmetric
            scipy LinearOperator or (rows, rows) array.
        top: eigenvalues wanted.
        extra: oversampling: each block has ``q = top + extra`` columns (a larger block separates
            the top from the eigenvalues just below it in fewer blocks).
        max_blocks: most blocks (each ``q`` operator columns).
        tol: stop when no top value rose by more than this fraction in the last block.
        vectors: also return the Ritz vectors (rows, top).

    Returns:
        `RefinedSpectrum`. Warns when ``max_blocks`` ran out before the values settled.
    """
    phi = _array("features", features)
    rows, k = phi.shape
    top = _checks.positive_int("top", top)
    extra = _checks.positive_int("extra", extra) if extra else 0
    max_blocks = _checks.positive_int("max_blocks", max_blocks)
    if not 0 < tol < 1:
        raise ValueError(f"`tol`={tol!r} must lie in (0, 1): the relative rise of a value in one "
                         "block below which the refinement stops.")
    q = top + extra
    if q > min(k, rows):
        raise ValueError(f"`top` + `extra` = {q} exceeds min(k, rows) = {min(k, rows)}: the "
                         "sketch has no more directions to start from; lower them.")
    op, (outputs, dtype, method) = _operator(operator, rows)
    if isinstance(features, Features) and outputs is not None and features.outputs != outputs:
        raise ValueError(f"`features` are of the {features.outputs!r} kernel but `operator` is "
                         f"{outputs!r}: build both with the same `outputs`.")
    start, sketched = _start(phi, q)
    basis, images = [start], [np.asarray(op.matmat(start), dtype=np.float64)]
    products, history, invariant = start.shape[1], [], False
    while True:
        b, ab = np.hstack(basis), np.hstack(images)
        h = b.T @ ab
        theta, w = eigh_descending((h + h.T) / 2)
        history.append(np.pad(theta[:top], (0, max(0, top - theta.size))))
        rise = (history[-1] - history[-2]) / np.abs(history[-1]) if len(history) > 1 else (
            np.zeros(top))
        done = len(history) > 1 and bool(np.all(rise < tol))
        if done or len(history) >= max_blocks or b.shape[1] >= rows:
            break
        z = images[-1]
        p = z - b @ (b.T @ z)
        p -= b @ (b.T @ p)  # twice is enough (Giraud et al., Numer. Math. 101, 2005)
        new = _orthonormal(p, float(np.linalg.norm(z, 2)))
        if new.shape[1] == 0:  # the basis is an invariant subspace: the values are exact
            invariant = True
            break
        basis.append(new)
        images.append(np.asarray(op.matmat(new), dtype=np.float64))
        products += new.shape[1]
    theta, w = theta[:top], w[:, :top]
    ritz = b @ w
    residuals = np.linalg.norm(ab @ w - ritz * theta, axis=0)
    converged = done or b.shape[1] >= rows or invariant
    if not converged:
        how = (f"a top value still rose by {100 * float(np.max(rise)):.1f}% in the last block "
               f"(tol {100 * tol:g}%)" if len(history) > 1 else "no rise can be measured yet")
        warnings.warn(
            f"refine_spectrum: after {len(history)} block(s) ({products} products) {how}: the "
            "values are lower bounds that have not settled; raise `max_blocks` or `extra`.",
            stacklevel=2)
    return RefinedSpectrum(theta, residuals, rise, np.stack(history), sketched[:top], converged,
                           len(history), products, outputs, dtype, method,
                           ritz if vectors else None)
