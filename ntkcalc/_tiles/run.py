"""Run a plan's tiles on one or more devices and assemble the kernel in memory.

Factors of a row block are computed once per row; column factors are cached for every block
when the plan says they fit, else recomputed per tile. With several devices, tile k runs on device
``k mod D`` (parameters are placed on every device once; a cached block's factors are copied to
the device that needs them). Tiles are dispatched asynchronously and their values are fetched
``D`` tiles later, so every device has work queued while the host copies or writes results. All
compiled steps run at matmul precision "highest", whatever the backend default.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable, Iterator, Sequence

import jax
import numpy as np

from .._engine.program import compiled, compiled_single
from .blocking import Tile, mirror, padded, tiles
from .messages import NON_FINITE_TILE


class _Placed:
    """Arrays computed on one device, copied to others on first use."""

    def __init__(self, value, device):
        self._on = {device: value}

    def on(self, device):
        if device not in self._on:
            self._on[device] = jax.device_put(next(iter(self._on.values())), device)
        return self._on[device]


def iter_tiles(plan, req, todo: list[Tile] | None = None, *,
               devices: Sequence[jax.Device] | None = None) -> Iterator[tuple[Tile, np.ndarray]]:
    """Yield ``(tile, values)`` for each tile, values of shape (groups, rows, cols, ...).

    ``devices=None`` runs on the default device; a sequence spreads tiles round-robin over it.
    Tiles are yielded in ``todo`` order.
    """
    x1 = req.x1
    x2 = x1 if req.x2 is None else req.x2
    b = plan.block
    whole = tiles(plan.n1, plan.n2, b, symmetric=plan.symmetric)
    todo = whole if todo is None else todo
    if devices is not None and list(devices) == jax.devices()[:1]:
        devices = None  # the default device: jit places the arguments there itself
    devs = [None] if devices is None else list(devices)
    put = (lambda v, d: v) if devices is None else jax.device_put
    args = {d: put((req.diff, req.other, req.state), d) for d in devs}
    cache: dict[int, _Placed] = {}
    pending: deque = deque()

    def factors(x, lo, hi, d):
        return _Placed(factors_fn(*args[d], put(padded(x, lo, hi, b), d)), d)

    with jax.default_matmul_precision("highest"):
        if len(whole) == 1 and todo == whole and len(devs) == 1:
            # The whole kernel is one tile: factors and contraction in one compiled step.
            (t,) = todo
            d = devs[0]
            same = plan.symmetric
            xa = put(padded(x1, t.r0, t.r1, b), d)
            xb = xa if same else put(padded(x2, t.c0, t.c1, b), d)
            yield _fetch(t, compiled_single(plan.program)(*args[d], xa, xb, same=same),
                         plan.symmetric)
            return
        factors_fn, tile_fn = compiled(plan.program)
        row_i, row_f = None, None
        for k, t in enumerate(todo):
            d = devs[k % len(devs)]
            if t.i != row_i:
                row_i = t.i
                if plan.symmetric and t.i in cache:
                    row_f = cache[t.i]
                else:
                    row_f = factors(x1, t.r0, t.r1, d)
                if plan.symmetric and plan.cache_factors:
                    cache[t.i] = row_f
            if plan.symmetric and t.i == t.j:
                col_f = row_f
            elif plan.cache_factors and t.j in cache:
                col_f = cache[t.j]
            else:
                col_f = factors(x2, t.c0, t.c1, d)
                if plan.cache_factors:
                    cache[t.j] = col_f
            same = col_f is row_f
            pending.append((t, tile_fn(*args[d], row_f.on(d), col_f.on(d), same=same)))
            if len(pending) >= len(devs):
                yield _fetch(*pending.popleft(), plan.symmetric)
        while pending:
            yield _fetch(*pending.popleft(), plan.symmetric)


def _fetch(t: Tile, values, symmetric: bool) -> tuple[Tile, np.ndarray]:
    values = np.asarray(values)[:, : t.r1 - t.r0, : t.c1 - t.c0]
    check_finite_tile(t, values, symmetric=symmetric)
    return t, values


def check_finite_tile(t: Tile, values: np.ndarray, *, symmetric: bool) -> None:
    """Raise FloatingPointError naming the examples if a finished tile holds NaN or Inf."""
    bad = ~np.isfinite(values)
    if not bad.any():
        return
    per_pair = bad.any(axis=(0, *range(3, values.ndim)))  # (rows, cols) of the tile
    entries = np.argwhere(per_pair)
    rows = sorted({t.r0 + int(r) for r, _ in entries})
    cols = sorted({t.c0 + int(c) for _, c in entries})
    kinds = ", ".join(k for k, m in (("nan", np.isnan(values)), ("inf", np.isinf(values)))
                      if m.any())

    def listed(idx):
        return ", ".join(map(str, idx[:10])) + (f", ... ({len(idx)} in all)" if len(idx) > 10
                                                 else "")

    raise FloatingPointError(NON_FINITE_TILE.format(
        count=int(bad.sum()), kinds=kinds, r0=t.r0, r1=t.r1 - 1, c0=t.c0, c1=t.c1 - 1,
        other="x1" if symmetric else "x2", i=t.r0 + int(entries[0][0]),
        j=t.c0 + int(entries[0][1]), rows=listed(rows), cols=listed(cols)))


def assemble(plan, req, *, on_tile: Callable[[Tile], None] | None = None,
             devices: Sequence[jax.Device] | None = None,
             todo: list[Tile] | None = None) -> np.ndarray:
    """The whole kernel, (groups, N1, N2, ...), in host memory."""
    out = np.empty((len(plan.group_names),) + plan.shape, dtype=plan.dtype)
    for t, values in iter_tiles(plan, req, todo, devices=devices):
        out[:, t.r0 : t.r1, t.c0 : t.c1] = values
        if plan.symmetric and t.i != t.j:
            out[:, t.c0 : t.c1, t.r0 : t.r1] = mirror(values, plan.outputs)
        if on_tile is not None:
            on_tile(t)
    return out
