"""Run a plan's tiles and assemble the kernel in memory.

Factors of a row block are computed once per row; column factors are cached for every block
when the plan says they fit, else recomputed per tile. All compiled steps run at matmul precision
"highest", whatever the backend default.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator

import jax
import numpy as np

from .._engine.program import compiled
from .blocking import Tile, mirror, padded, tiles


def iter_tiles(plan, req, todo: list[Tile] | None = None) -> Iterator[tuple[Tile, np.ndarray]]:
    """Yield ``(tile, values)`` for each tile, values of shape (groups, rows, cols, ...)."""
    factors_fn, tile_fn = compiled(plan.program)
    x1 = req.x1
    x2 = x1 if req.x2 is None else req.x2
    b = plan.block
    todo = tiles(plan.n1, plan.n2, b, symmetric=plan.symmetric) if todo is None else todo
    cache: dict[int, object] = {}
    args = (req.diff, req.other, req.state)
    with jax.default_matmul_precision("highest"):
        row_i, row_f = None, None
        for t in todo:
            if t.i != row_i:
                row_i = t.i
                if plan.symmetric and t.i in cache:
                    row_f = cache[t.i]
                else:
                    row_f = factors_fn(*args, padded(x1, t.r0, t.r1, b))
                if plan.symmetric and plan.cache_factors:
                    cache[t.i] = row_f
            if plan.symmetric and t.i == t.j:
                col_f = row_f
            elif plan.cache_factors and t.j in cache:
                col_f = cache[t.j]
            else:
                col_f = factors_fn(*args, padded(x2, t.c0, t.c1, b))
                if plan.cache_factors:
                    cache[t.j] = col_f
            values = np.asarray(tile_fn(*args, row_f, col_f))
            yield t, values[:, : t.r1 - t.r0, : t.c1 - t.c0]


def assemble(plan, req, *, on_tile: Callable[[Tile], None] | None = None) -> np.ndarray:
    """The whole kernel, (groups, N1, N2, ...), in host memory."""
    out = np.empty((len(plan.group_names),) + plan.shape, dtype=plan.dtype)
    for t, values in iter_tiles(plan, req):
        out[:, t.r0 : t.r1, t.c0 : t.c1] = values
        if plan.symmetric and t.i != t.j:
            out[:, t.c0 : t.c1, t.r0 : t.r1] = mirror(values, plan.outputs)
        if on_tile is not None:
            on_tile(t)
    return out
