"""Which devices and processes compute which tiles.

Tiles are numbered in row-major order (upper triangle only for K(X, X)). Process p of P takes
tiles ``k ≡ p (mod P)``: an assignment every process derives alone from
``jax.process_index()`` and ``jax.process_count()``, independent of what a store already holds,
so processes resuming a partly filled store never skip a tile. Inside a process, tiles go
round-robin over its devices (see `run.iter_tiles`).
"""

from __future__ import annotations

from collections.abc import Sequence

import jax

from .blocking import Tile


def check_devices(devices) -> tuple[jax.Device, ...]:
    """``devices`` as a tuple of this process's JAX devices (None: all local devices)."""
    local = jax.local_devices()
    if devices is None:
        return tuple(local)
    try:
        devs = tuple(devices)
    except TypeError:
        devs = None
    if not devs or not all(isinstance(d, jax.Device) for d in devs):
        raise ValueError(
            f"`devices`={devices!r} is not a non-empty sequence of JAX devices: pass e.g. "
            "jax.local_devices()[:2], or None for all local devices."
        )
    foreign = [d for d in devs if d not in local]
    if foreign:
        raise ValueError(
            f"`devices` includes {foreign!r}, which this process cannot run on: pass devices from "
            "jax.local_devices() (each process of a multi-host run computes on its own devices)."
        )
    if len(set(devs)) != len(devs):
        raise ValueError(f"`devices`={devices!r} lists a device twice: list each device once.")
    return devs


def shares_host_memory(devices: Sequence[jax.Device]) -> bool:
    """True when the devices' memory is the host's (CPU devices), so budgets must be split."""
    return all(d.platform == "cpu" for d in devices)


def process() -> tuple[int, int]:
    """(index, count) of this JAX process."""
    return jax.process_index(), jax.process_count()


def share(todo: list[Tile], index: int, count: int) -> list[Tile]:
    """The tiles process ``index`` of ``count`` computes."""
    return [t for k, t in enumerate(todo) if k % count == index]


def barrier(name: str) -> None:
    """Wait for every JAX process (no-op with one process)."""
    if jax.process_count() > 1:
        from jax.experimental import multihost_utils

        multihost_utils.sync_global_devices(name)
