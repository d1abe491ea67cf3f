"""Stochastic estimates of kernel traces and norms from matrix-vector products (Hutch++).

Hutch++ (Meyer, Musco, Musco & Woodruff, "Hutch++: Optimal Stochastic Trace Estimation", SOSA
2021, arXiv:2010.09649) splits m queries in three: ``Q = orth(A S)`` from m/3 random sign vectors
captures the top of the spectrum, whose trace ``tr(Qᵀ A Q)`` is exact, and Hutchinson's estimator
(Hutchinson 1989) with m/3 sign vectors G handles the rest:

    tr(A) ≈ tr(Qᵀ A Q) + (3/m) tr(Gᵀ (I − QQᵀ) A (I − QQᵀ) G).

It is unbiased, exact when rank(A) <= m/3, and reaches relative error ε with O(1/ε) queries for
PSD A (Hutchinson alone needs O(1/ε²)). Accepts an array or any square LinearOperator (e.g.
`ntk_operator`).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import scipy.sparse.linalg as spla

from . import _checks
from ._counting import CountingOperator
from ._result import Result


@dataclasses.dataclass(frozen=True, repr=False)
class Estimate(Result):
    """A stochastic estimate.

    Fields:
        value: the estimate.
        num_queries: Hutch++ queries (random probe vectors) used per estimated trace.
        matvecs: products with the kernel used in all.
        quantity: what was estimated ("trace", "frobenius", "participation ratio",
            "alignment").
    """

    value: float
    num_queries: int
    matvecs: int
    quantity: str

    def __float__(self) -> float:
        return self.value


def _operator(name: str, k) -> CountingOperator:
    if isinstance(k, spla.LinearOperator):
        return CountingOperator(_checks.square_operator(name, k))
    return CountingOperator(_checks.square_kernel(name, k))


def _squared(op: spla.LinearOperator) -> spla.LinearOperator:
    return spla.LinearOperator(op.shape, matmat=lambda v: op.matmat(op.matmat(v)),
                               matvec=lambda v: op.matvec(op.matvec(v)), dtype=np.float64)


def _centered(op: CountingOperator) -> spla.LinearOperator:
    """``H A H`` with ``H = I − 11ᵀ/n``."""

    def center(v):
        return v - v.mean(axis=0, keepdims=True)

    def matmat(v):
        return center(op.matmat(center(np.asarray(v).reshape(op.shape[0], -1))))

    return spla.LinearOperator(op.shape, matmat=matmat, matvec=lambda v: matmat(v).ravel(),
                               dtype=np.float64)


def _hutchpp(a: spla.LinearOperator, num_queries: int, rng: np.random.Generator) -> float:
    n = a.shape[0]
    k = num_queries // 3
    s = rng.choice([-1.0, 1.0], size=(n, k))
    g = rng.choice([-1.0, 1.0], size=(n, num_queries - 2 * k))
    q, _ = np.linalg.qr(np.asarray(a.matmat(s)))
    exact = float(np.sum(q * np.asarray(a.matmat(q))))
    g = g - q @ (q.T @ g)
    return exact + float(np.sum(g * np.asarray(a.matmat(g)))) / g.shape[1]


def _queries(num_queries) -> int:
    m = _checks.positive_int("num_queries", num_queries)
    if m < 3:
        raise ValueError(
            f"`num_queries` must be >= 3 (Hutch++ splits them in three), got {num_queries}."
        )
    return m


def estimate_trace(k, *, num_queries: int, seed: int) -> Estimate:
    """Hutch++ estimate of ``tr K`` with ``num_queries`` products.

    Args:
        k: (n, n) symmetric array or square LinearOperator.
        num_queries: total products (>= 3); the estimate is exact if rank K <= num_queries // 3.
        seed: seed of the random sign vectors (``numpy.random.default_rng``).
    """
    op, m = _operator("k", k), _queries(num_queries)
    value = _hutchpp(op, m, np.random.default_rng(_checks.seed("seed", seed)))
    return Estimate(value=value, num_queries=m, matvecs=op.matvecs, quantity="trace")


def _frobenius_sq(op: spla.LinearOperator, m: int, rng) -> float:
    return max(_hutchpp(_squared(op), m, rng), 0.0)


def estimate_frobenius(k, *, num_queries: int, seed: int) -> Estimate:
    """``‖K‖_F = √tr(K²)`` by Hutch++ on ``K²`` (2 products with K per query; K symmetric)."""
    op, m = _operator("k", k), _queries(num_queries)
    value = float(np.sqrt(_frobenius_sq(op, m, np.random.default_rng(_checks.seed("seed", seed)))))
    return Estimate(value=value, num_queries=m, matvecs=op.matvecs, quantity="frobenius")


def estimate_participation_ratio(k, *, num_queries: int, seed: int) -> Estimate:
    """Effective rank ``(tr K)² / ‖K‖²_F = (Σλ)²/Σλ²`` (the participation ratio of `spectrum`).

    Both traces by Hutch++ with ``num_queries`` each (3·num_queries products). This is the
    participation ratio, not the entropy-based effective rank of Roy & Vetterli.
    """
    op, m = _operator("k", k), _queries(num_queries)
    rng = np.random.default_rng(_checks.seed("seed", seed))
    trace = _hutchpp(op, m, rng)
    fro_sq = _frobenius_sq(op, m, rng)
    value = trace**2 / fro_sq if fro_sq > 0 else 0.0
    return Estimate(value=float(value), num_queries=m, matvecs=op.matvecs,
                    quantity="participation ratio")


def estimate_alignment(k, y, *, num_queries: int, seed: int, centered: bool = True) -> Estimate:
    """Kernel-target alignment ``⟨K, YYᵀ⟩_F / (‖K‖_F ‖YYᵀ‖_F)`` (see `alignment`) matrix-free.

    The numerator ``Σ_o y_oᵀ K y_o`` is exact (O products); ``‖K‖_F`` (or ``‖HKH‖_F`` when
    ``centered``, Cortes et al., JMLR 2012) is a Hutch++ estimate; ``‖YYᵀ‖_F = ‖YᵀY‖_F`` exact.

    Args:
        k: (n, n) array or LinearOperator.
        y: (n,) or (n, O) targets.
    """
    op, m = _operator("k", k), _queries(num_queries)
    n = op.shape[0]
    y = _checks.targets("y", y, n=n, kname="k", kshape=op.shape)
    a = _centered(op) if centered else op
    if centered:
        y = y - y.mean(axis=0, keepdims=True)
    yty = float(np.linalg.norm(y.T @ y))
    if yty == 0:
        raise ValueError("`y` is constant (zero after centering): the alignment is undefined.")
    numerator = float(np.sum(y * np.asarray(a.matmat(y))))
    fro = np.sqrt(_frobenius_sq(a, m, np.random.default_rng(_checks.seed("seed", seed))))
    value = numerator / (fro * yty) if fro > 0 else float("nan")
    return Estimate(value=float(value), num_queries=m, matvecs=op.matvecs, quantity="alignment")
