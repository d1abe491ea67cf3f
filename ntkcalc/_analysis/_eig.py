"""The one symmetric eigendecomposition every analysis uses: LAPACK in float64, descending order.

``scipy.linalg.eigh`` (LAPACK ``syevr``) returns ascending eigenvalues; analyses here read spectra
from the top, so this helper flips them once. Eigenvalues of a positive semi-definite kernel can
come out slightly negative (about ``-n·eps·λ_max``) from rounding; they are returned as computed,
and each caller decides how to treat them.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg


def eigh_descending(k: np.ndarray, *, vectors: bool = True):
    """Eigenvalues (n,) in descending order and, if ``vectors``, eigenvectors (n, n) as columns.

    ``k`` must already be a validated symmetric float64 (n, n) array.
    """
    if vectors:
        w, v = scipy.linalg.eigh(k, check_finite=False)
        return w[::-1].copy(), v[:, ::-1].copy()
    w = scipy.linalg.eigh(k, eigvals_only=True, check_finite=False)
    return w[::-1].copy()
