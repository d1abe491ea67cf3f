"""Blocks of examples and the tiles of a kernel.

A kernel K(X1, X2) is cut into tiles of ``block × block`` examples. For K(X, X) only tiles on and
above the diagonal are computed and mirrored: K[j, i, b, a] = K[i, j, a, b]. Every block is padded
to the full block size (by repeating its last example) so each compiled step has one shape.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np


@dataclasses.dataclass(frozen=True)
class Tile:
    """Tile (row block i, column block j) covering rows [r0, r1) and columns [c0, c1)."""

    i: int
    j: int
    r0: int
    r1: int
    c0: int
    c1: int


def block_bounds(n: int, block: int) -> list[tuple[int, int]]:
    return [(s, min(s + block, n)) for s in range(0, n, block)]


def tiles(n1: int, n2: int, block: int, *, symmetric: bool) -> list[Tile]:
    """All tiles to compute, row-major; upper triangle only when ``symmetric``."""
    rows, cols = block_bounds(n1, block), block_bounds(n2, block)
    return [
        Tile(i, j, r0, r1, c0, c1)
        for i, (r0, r1) in enumerate(rows)
        for j, (c0, c1) in enumerate(cols)
        if not symmetric or j >= i
    ]


def num_blocks(n: int, block: int) -> int:
    return math.ceil(n / block)


def padded(x: np.ndarray, start: int, stop: int, block: int) -> np.ndarray:
    """x[start:stop] padded to ``block`` examples by repeating the last one."""
    part = x[start:stop]
    if part.shape[0] == block:
        return part
    pad = np.repeat(part[-1:], block - part.shape[0], axis=0)
    return np.concatenate([part, pad], axis=0)


def mirror(tile: np.ndarray, outputs: str) -> np.ndarray:
    """The (j, i) tile from the (i, j) tile; a leading group axis is kept."""
    if outputs == "full":
        return np.swapaxes(np.swapaxes(tile, -4, -3), -2, -1)
    if outputs == "diagonal":
        return np.swapaxes(tile, -3, -2)
    return np.swapaxes(tile, -2, -1)
