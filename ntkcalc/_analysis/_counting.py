"""A LinearOperator wrapper that counts matrix-vector products, for matrix-free reports."""

from __future__ import annotations

import numpy as np
import scipy.sparse.linalg as spla


class CountingOperator(spla.LinearOperator):
    """Wraps a square operator (or array) and counts the vectors it is applied to.

    A ``matmat`` with ``k`` columns counts as ``k`` matvecs. The wrapped operator is treated as
    symmetric (``rmatvec = matvec``), as kernels are.
    """

    def __init__(self, op):
        op = spla.aslinearoperator(op)
        super().__init__(dtype=np.dtype(np.float64), shape=op.shape)
        self.inner = op
        self.matvecs = 0

    def _matvec(self, v):
        self.matvecs += 1
        return np.asarray(self.inner.matvec(np.asarray(v, dtype=np.float64)), dtype=np.float64)

    def _matmat(self, v):
        v = np.asarray(v, dtype=np.float64)
        self.matvecs += v.shape[1]
        return np.asarray(self.inner.matmat(v), dtype=np.float64)

    def _rmatvec(self, v):
        return self._matvec(v)

    def _adjoint(self):
        return self
