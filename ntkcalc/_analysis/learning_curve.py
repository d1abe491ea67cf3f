"""Expected kernel-regression test error versus training-set size, from the kernel spectrum.

The self-consistent (replica / "omniscient risk") theory of Canatar, Bordelon & Pehlevan,
"Spectral bias and task-model alignment explain generalization in kernel regression and infinitely
wide neural networks", Nat. Commun. 12, 2914 (2021); the same equations appear as the eigenlearning
framework of Simon, Dickens, Karkada & DeWeese (arXiv:2110.03922) and, for KARE, in Jacot et al.
(NeurIPS 2020, arXiv:2006.09796). Written from memory in the form below and cross-checked between
the Canatar et al. and Simon et al. conventions.

Conventions. The kernel has Mercer decomposition ``K(x, x') = Σ_ρ η_ρ φ_ρ(x) φ_ρ(x')`` with
``E_x[φ_ρ φ_σ] = δ_ρσ`` under the data distribution; the target is ``f*(x) = Σ_ρ a_ρ φ_ρ(x)``
(``target_power`` holds ``a_ρ²``, summed over outputs); training labels carry noise of variance
σ² (``noise``); the predictor is kernel ridge regression with ``(K_n + ridge·I) α = y``, the
`ridge_fit` / KernelRidge convention on the unnormalized n × n Gram matrix. For each n, κ > 0 solves

    κ = ridge + Σ_ρ η_ρ κ / (κ + n η_ρ),

and with ``γ = Σ_ρ n η_ρ² / (κ + n η_ρ)²`` the expected test error (against the noiseless target,
averaged over training sets) is

    E_g = [Σ_ρ a_ρ² κ² / (κ + n η_ρ)² + σ² γ] / (1 − γ).

The theory is asymptotic (many modes, large n); at small n and for real data it is an
approximation whose accuracy should be checked (see the tests: within 25% on digits).
"""

from __future__ import annotations

import dataclasses
import warnings

import numpy as np
import scipy.optimize

from . import _checks
from ._result import Result


@dataclasses.dataclass(frozen=True, repr=False)
class LearningCurve(Result):
    """Predicted test error of kernel ridge regression per training-set size.

    Fields:
        n: (S,) training-set sizes.
        test_error: (S,) expected ``E_x ‖f̂(x) − f*(x)‖²`` (noiseless target, summed over outputs).
        kappa: (S,) the self-consistent κ (an effective ridge).
        gamma: (S,) γ; the error is amplified by ``1/(1 − γ)``.
        mode_errors: (S, P) per-mode error ``a_ρ² κ²/(κ + nη_ρ)² / (1 − γ)``; mode ρ is learned
            when ``n η_ρ >> κ``.
        ridge: the ridge (KernelRidge convention).
        noise: label-noise variance σ².
    """

    n: np.ndarray
    test_error: np.ndarray
    kappa: np.ndarray
    gamma: np.ndarray
    mode_errors: np.ndarray
    ridge: float
    noise: float


def _kappa(eta: np.ndarray, n: float, ridge: float) -> float:
    """The root κ > 0 of ``1 − ridge/κ − Σ η/(κ + nη) = 0`` (0 if none: ridgeless, n >= modes)."""

    def g(kappa):
        return 1.0 - ridge / kappa - np.sum(eta / (kappa + n * eta))

    hi = ridge + float(np.sum(eta))
    lo = ridge if ridge > 0 else hi * 1e-15
    if g(lo) >= 0:  # only reachable without a ridge: n >= number of modes, interpolation
        return 0.0
    return float(scipy.optimize.brentq(g, lo, hi, xtol=1e-300, rtol=4 * np.finfo(float).eps))


def learning_curve(eigenvalues, target_power, *, n, ridge, noise=0.0) -> LearningCurve:
    """Expected test error of kernel ridge regression versus n, from the population spectrum.

    Solves the self-consistent equation of Canatar, Bordelon & Pehlevan (Nat. Commun. 2021) for
    each n; see the module docstring for the equations and conventions.

    Args:
        eigenvalues: (P,) population kernel eigenvalues η_ρ >= 0 (for a sample of size m standing
            in for the distribution: eigenvalues of the m × m Gram matrix divided by m).
        target_power: (P,) squared target coefficients a_ρ² >= 0 in the orthonormal eigenbasis
            (for a sample: ``(v_ρᵀ y)² / m``, see `task_spectrum`).
        n: scalar or (S,) training-set sizes > 0.
        ridge: ridge >= 0 in the `ridge_fit` convention.
        noise: label-noise variance σ² >= 0.

    Returns:
        `LearningCurve`.

    Warns:
        RuntimeWarning where γ >= 1 (ridgeless, n at or beyond the number of modes): the error is
        reported as inf there.
    """
    eta = _checks.finite_array("eigenvalues", eigenvalues, ndim=(1,))
    power = _checks.finite_array("target_power", target_power, ndim=(1,))
    if power.shape != eta.shape:
        raise ValueError(
            f"`target_power` has shape {power.shape} but `eigenvalues` has {eta.shape}: give one "
            "target power per eigenvalue, in the same order."
        )
    for name, arr in (("eigenvalues", eta), ("target_power", power)):
        if np.any(arr < 0):
            raise ValueError(
                f"`{name}` has negative entries (min {arr.min():.3g}); it must be >= 0. Clip "
                "rounding-level negative eigenvalues to 0."
            )
    sizes = np.atleast_1d(_checks.finite_array("n", n, ndim=(0, 1)))
    if np.any(sizes <= 0):
        raise ValueError(_checks.NOT_POSITIVE.format(name="n", value=n))
    ridge = float(_checks.nonnegative("ridge", ridge))
    noise = float(_checks.nonnegative("noise", noise))

    kappas = np.array([_kappa(eta, float(s), ridge) for s in sizes])
    denom = kappas[:, None] + sizes[:, None] * eta[None, :]
    unlearned = np.where(denom > 0, kappas[:, None] / np.where(denom > 0, denom, 1.0), 1.0)
    learned = np.where(denom > 0, sizes[:, None] * eta[None, :] / np.where(denom > 0, denom, 1.0),
                       0.0)
    gamma = np.sum(learned**2, axis=1) / sizes
    amplify = np.where(gamma < 1, 1.0 / np.where(gamma < 1, 1.0 - gamma, 1.0), np.inf)
    if np.any(gamma >= 1):
        warnings.warn(
            f"γ >= 1 at n = {sizes[gamma >= 1].tolist()} (ridgeless interpolation at or past "
            "the number of modes): the predicted error is infinite there. Use ridge > 0.",
            RuntimeWarning,
            stacklevel=2,
        )
    with np.errstate(invalid="ignore"):  # 0·inf where γ >= 1; replaced by inf below
        mode_errors = power[None, :] * unlearned**2 * amplify[:, None]
        test_error = np.sum(mode_errors, axis=1) + noise * gamma * amplify
    test_error = np.where(gamma >= 1, np.inf, test_error)
    return LearningCurve(
        n=sizes, test_error=test_error, kappa=kappas, gamma=gamma, mode_errors=mode_errors,
        ridge=ridge, noise=noise,
    )
