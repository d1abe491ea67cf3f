"""Kernel-target alignment, CKA, kernel distance and the target's spectrum on a kernel.

All are Frobenius cosines ``⟨A, B⟩_F / (‖A‖_F ‖B‖_F)`` between kernels, optionally after centering
``A ↦ H A H`` with ``H = I − 11ᵀ/n``.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from . import _checks
from ._eig import eigh_descending
from ._result import Result

ZERO_KERNEL = (
    "`{name}` has zero Frobenius norm{after}: the cosine is undefined. Pass a non-zero kernel "
    "(or non-constant targets)."
)


def _center(k: np.ndarray) -> np.ndarray:
    """``H K H`` with ``H = I − 11ᵀ/n``, computed by subtracting row, column and grand means."""
    return k - k.mean(axis=0, keepdims=True) - k.mean(axis=1, keepdims=True) + k.mean()


def _cosine(a: np.ndarray, b: np.ndarray, *, names: tuple[str, str], centered: bool) -> float:
    if centered:
        a, b = _center(a), _center(b)
    norms = []
    for name, m in zip(names, (a, b)):
        norm = float(np.linalg.norm(m))
        if norm == 0:
            raise ValueError(
                ZERO_KERNEL.format(name=name, after=" after centering" if centered else "")
            )
        norms.append(norm)
    return float(np.sum(a * b) / (norms[0] * norms[1]))


def _kernel_pair(k1, k2) -> tuple[np.ndarray, np.ndarray]:
    a = _checks.square_kernel("k1", k1)
    b = _checks.square_kernel("k2", k2)
    if a.shape != b.shape:
        raise ValueError(
            f"`k1` is {a.shape} but `k2` is {b.shape}: both kernels must be over the same n "
            "examples, in the same order."
        )
    return a, b


def alignment(k, y, *, centered: bool = True) -> float:
    """Kernel-target alignment ``A(K, yyᵀ) = ⟨K, YYᵀ⟩_F / (‖K‖_F ‖YYᵀ‖_F)`` in [-1, 1].

    Uncentered: Cristianini, Shawe-Taylor, Elisseeff & Kandola, "On kernel-target alignment",
    NIPS 2002. Centered (default; both K and YYᵀ replaced by ``H · H``): Cortes, Mohri &
    Rostamizadeh, "Algorithms for learning kernels based on centered alignment", JMLR 13, 2012.

    Args:
        k: (n, n) symmetric kernel.
        y: (n,) or (n, O) targets (e.g. ±1 labels or one-hot rows).
    """
    k = _checks.square_kernel("k", k)
    y = _checks.targets("y", y, n=k.shape[0], kname="k", kshape=k.shape)
    return _cosine(k, y @ y.T, names=("k", "y"), centered=centered)


def cka(k1, k2) -> float:
    """Centered kernel alignment ``HSIC(K1, K2) / √(HSIC(K1, K1) HSIC(K2, K2))``.

    With linear kernels ``K = XXᵀ`` this is linear CKA ``‖YᵀX‖²_F / (‖XᵀX‖_F ‖YᵀY‖_F)`` on centered
    features (Kornblith, Norouzi, Lee & Hinton, "Similarity of Neural Network Representations
    Revisited", ICML 2019): invariant to orthogonal maps and isotropic scaling of the features,
    not to general invertible linear maps.

    Args:
        k1, k2: (n, n) symmetric kernels over the same examples.
    """
    a, b = _kernel_pair(k1, k2)
    return _cosine(a, b, names=("k1", "k2"), centered=True)


def kernel_distance(k1, k2) -> float:
    """``1 − ⟨K1, K2⟩_F / (‖K1‖_F ‖K2‖_F)``, uncentered, in [0, 2].

    Used to track how far the empirical NTK moves during training (Fort, Dziugaite, Paul,
    Kharaghani, Roy & Ganguli, NeurIPS 2020, arXiv:2010.15110). 0 for kernels equal up to scale
    (rounding can put the cosine a few eps above 1: the distance is clipped to [0, 2]).
    """
    a, b = _kernel_pair(k1, k2)
    return float(np.clip(1.0 - _cosine(a, b, names=("k1", "k2"), centered=False), 0.0, 2.0))


@dataclasses.dataclass(frozen=True, repr=False)
class TaskSpectrum(Result):
    """How the targets spread over the kernel's eigenvectors.

    Fields:
        eigenvalues: (n,) kernel eigenvalues, descending.
        power: (n,) ``‖v_ρᵀ Y‖²``, the target power on each eigenvector (summed over outputs).
        cumulative: (n,) ``Σ_{ρ' <= ρ} power / Σ power``, rising to 1; fast rise = a task aligned
            with the top of the spectrum.

    For an n-example sample standing in for the data distribution, ``eigenvalues / n`` and
    ``power / n`` are the population eigenvalues and squared target coefficients that
    `learning_curve` takes.
    """

    eigenvalues: np.ndarray
    power: np.ndarray
    cumulative: np.ndarray


def task_spectrum(k, y) -> TaskSpectrum:
    """Target power on the kernel eigenvectors, in descending-eigenvalue order.

    The cumulative power curve of Canatar, Bordelon & Pehlevan, Nat. Commun. 12, 2914 (2021), on
    the empirical kernel: ``C(ρ) = Σ_{ρ' <= ρ} (v_ρ'ᵀ y)² / ‖y‖²``.

    Args:
        k: (n, n) symmetric kernel.
        y: (n,) or (n, O) targets.
    """
    k = _checks.square_kernel("k", k)
    y = _checks.targets("y", y, n=k.shape[0], kname="k", kshape=k.shape)
    total = float(np.sum(y**2))
    if total == 0:
        raise ValueError(ZERO_KERNEL.format(name="y", after=""))
    w, v = eigh_descending(k)
    power = np.sum((v.T @ y) ** 2, axis=1)
    return TaskSpectrum(eigenvalues=w, power=power, cumulative=np.cumsum(power) / total)
