"""Fixed-size batches over the examples, the last one padded, so each batch shape compiles once."""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np


def batch_slices(n: int, batch: int) -> Iterator[tuple[int, int]]:
    """``(start, stop)`` for consecutive batches of at most ``batch`` rows covering ``range(n)``."""
    for start in range(0, n, batch):
        yield start, min(start + batch, n)


def pad_rows(a, size: int):
    """``a`` with its last row repeated to ``size`` rows (padding is discarded by the caller)."""
    a = np.asarray(a)
    if a.shape[0] == size:
        return a
    return np.concatenate([a, np.repeat(a[-1:], size - a.shape[0], axis=0)], axis=0)
