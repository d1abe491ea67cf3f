"""One kernel run: budget, plan, devices, processes, store, progress.

`compute` is what `ntkcalc.ntk` and `ntkcalc.ntk_by_layer` call after validating the request.

Memory: ``memory`` bounds this process's peak. Without a store the in-memory result (groups ×
kernel bytes) is reserved first and tiles are planned in what is left; when the result alone does
not fit, the error says to pass ``store=``. CPU devices share host memory, so with D of them each
device's tiles are planned in 1/D of the budget (falling back to one device when that is too
small); GPU and TPU devices are planned in the full budget each.

Store: with ``store=`` every tile is written to a zarr store (see `store`) as soon as it is done
and a read-only `StoredKernel` view is returned; the in-memory kernel is never built. A run
started again with the same arguments checks the store's fingerprint, verifies the tiles it holds
and computes only the missing or damaged ones; a store whose own metadata is damaged is
recomputed. Processes of a multi-host run (after ``jax.distributed.initialize``) each compute
their share of tiles into the same store; independent processes on one local store take turns
(the store's lock). Before computing, the free disk space is checked against what the missing
tiles need; a full disk is reported as such, and the same call run again resumes.

Results: every finished tile is checked for NaN/Inf (`run.check_finite_tile`, naming the
examples), and a kernel that is exactly zero is reported with a RuntimeWarning.
"""

from __future__ import annotations

import contextlib
import dataclasses
import math
import os
import time
import warnings

import numpy as np

from .._engine import cost as C
from .._engine.checks import check_flag
from .._engine.options import tile_shape
from .._engine.planner import plan_request
from .blocking import tiles
from .fingerprint import ADOPTABLE, differences, fingerprint
from .messages import (
    NOT_A_STORE,
    STORE_DAMAGED,
    STORE_INCOMPLETE,
    STORE_MISMATCH,
    STORE_NEEDED,
    ZERO_KERNEL,
)
from .placement import barrier, check_devices, process, share, shares_host_memory
from .progress import bar, logger
from .run import assemble, iter_tiles
from .spot_check import check_count
from .spot_check import spot_check as run_spot_check
from .store import (
    TileStore,
    check_writable,
    clear,
    describe,
    disk_full,
    free_bytes,
    inspect,
    is_disk_full,
    locked,
    read_fingerprint,
)
from .view import RunInfo, StoredKernel


def check_store(store):
    """``store`` unchanged if it is None, a path, a URL or a zarr store object."""
    if store is None or isinstance(store, str | os.PathLike):
        return store
    import zarr.abc.store

    if isinstance(store, zarr.abc.store.Store):
        return store
    raise ValueError(
        f"`store`={store!r} is not a store location: pass a directory path such as "
        "'kernel.zarr', a URL zarr can open, or a zarr store object."
    )


def _result_bytes(req, outputs: str) -> int:
    shape = tile_shape(outputs, req.x1.shape[0],
                       (req.x1 if req.x2 is None else req.x2).shape[0], req.num_outputs)
    return len(req.selection.group_names) * math.prod(shape) * C.itemsize(req.dtype)


def _plan(req, *, outputs, memory, method, devs, in_memory: bool):
    """(plan, devices to use): tiles planned to fit ``memory`` with the result and D devices."""
    budget = C.parse_memory(memory)
    result = _result_bytes(req, outputs) if in_memory else 0
    try:
        plan = plan_request(req, outputs=outputs, memory=memory, method=method)
    except MemoryError as e:
        if not in_memory:
            raise
        raise MemoryError(f"{e} Keeping the result in memory needs another "
                          f"{C.format_bytes(result)} on top, or pass `store=`.") from e
    working = budget - result
    if working <= 0:
        raise MemoryError(STORE_NEEDED.format(
            result=C.format_bytes(result), why="alone exceeds", memory=memory,
            budget=C.format_bytes(budget)))
    share_ = len(devs) if len(devs) > 1 and shares_host_memory(devs) else 1
    if plan.peak_bytes * share_ <= working:
        return plan, devs
    if share_ > 1:
        try:
            return plan_request(req, outputs=outputs, memory=working // share_,
                                method=method), devs
        except MemoryError:
            logger.info("ntkcalc: budget too small for tiles on %d CPU devices at once; using one",
                        share_)
    try:
        return plan_request(req, outputs=outputs, memory=working, method=method), devs[:1]
    except MemoryError:
        raise MemoryError(STORE_NEEDED.format(
            result=C.format_bytes(result), why="and one tile together exceed", memory=memory,
            budget=C.format_bytes(budget))) from None


def _adopt(plan, req, stored: dict, *, location, outputs, memory, method):
    """The plan matching a store's fingerprint, or an error saying why it cannot resume."""
    now = fingerprint(plan, req)
    diffs = differences(stored, now)
    if "method" in diffs and method == "auto":
        plan = plan_request(req, outputs=outputs, memory=memory, method=stored["method"])
        now = fingerprint(plan, req)
        diffs = differences(stored, now)
    hard = [d for d in diffs if d not in ADOPTABLE]
    if hard:
        raise ValueError(STORE_MISMATCH.format(
            store=location, fields=", ".join(hard),
            stored={k: stored.get(k) for k in hard}, now={k: now.get(k) for k in hard}))
    if "block" in diffs:
        if stored["block"] > plan.block:
            raise MemoryError(
                f"`store`={location!r} was written in tiles of {stored['block']} examples, but "
                f"`memory`={memory!r} fits only {plan.block}: resume with the `memory` of the "
                "first run (or more), or choose a new `store` path."
            )
        plan = dataclasses.replace(plan, block=int(stored["block"]))
    return plan


def compute(req, *, outputs, memory, method, store, progress, devices, verify: bool = True,
            spot_check: int = 0):
    """([kernel per group], RunInfo): numpy arrays in memory, or `StoredKernel` views.

    ``spot_check`` entries of the finished kernel are recomputed independently (`spot_check`).
    """
    store = check_store(store)
    progress = check_flag("progress", progress)
    checked = check_count(spot_check)
    devs = check_devices(devices)
    index, count = process()
    if store is None and count > 1:
        raise ValueError(
            f"`store`=None with {count} JAX processes: each process computes a share of the "
            "tiles into one store, so pass store='path/kernel.zarr' on a filesystem (or object "
            "store) every process can reach."
        )
    if store is not None:
        check_writable(store, tag=f"-p{index}")
    plan, devs = _plan(req, outputs=outputs, memory=memory, method=method, devs=devs,
                       in_memory=store is None)
    where = f" (process {index + 1}/{count})" if count > 1 else ""
    all_tiles = tiles(plan.n1, plan.n2, plan.block, symmetric=plan.symmetric)
    if store is None:
        with bar(len(all_tiles), enabled=progress, where=where) as b:
            out = assemble(plan, req, devices=devs, on_tile=lambda t: b.update())
        if not np.any(out):
            warnings.warn(ZERO_KERNEL, RuntimeWarning, stacklevel=3)
        info = RunInfo(None, len(all_tiles), len(all_tiles), 0, 0, plan.block, len(devs))
        kernels = [out[g] for g in range(len(plan.group_names))]
        run_spot_check(req, kernels, count=checked, outputs=outputs)
        return kernels, info

    location = describe(store)
    options = dict(location=location, outputs=outputs, memory=memory, method=method)
    # One process: the store is locked for the whole run, so an independent process on the same
    # store waits and then reuses the tiles. Several JAX processes: only creation is locked.
    with locked(store) if count == 1 else contextlib.nullcontext():
        if index == 0:
            with locked(store) if count > 1 else contextlib.nullcontext():
                plan = _open_store(store, plan, req, options)
        barrier("ntkcalc-store-ready")
        stored = read_fingerprint(store)
        if stored is None:
            raise ValueError(NOT_A_STORE.format(store=location))
        plan = _adopt(plan, req, stored, **options)
        ts = TileStore.open(store, plan)
        all_tiles = tiles(plan.n1, plan.n2, plan.block, symmetric=plan.symmetric)
        mine = share(all_tiles, index, count)
        todo, repaired = ts.status(mine, verify=verify)
        _check_space(store, ts, todo)
        logger.info("ntkcalc: store %s: %d of %d tiles done, %d to compute%s (%d failed "
                    "verification), tiles of %d examples on %d device(s)", location,
                    len(mine) - len(todo), len(mine), len(todo), where, repaired, plan.block,
                    len(devs))
        t0 = time.perf_counter()
        nonzero = False
        with bar(len(todo), enabled=progress, where=where) as b:
            written = 0  # tiles come in `todo` order
            try:
                for t, values in iter_tiles(plan, req, todo, devices=devs):
                    ts.write(t, values)
                    written += 1
                    nonzero = nonzero or bool(np.any(values))
                    b.update()
            except OSError as e:
                if is_disk_full(e):
                    raise disk_full(store, needed=sum(map(ts.tile_bytes, todo[written:]))) from e
                raise
        barrier("ntkcalc-store-done")
        missing = len(all_tiles) - ts.count_done()
    logger.info("ntkcalc: computed %d tiles in %.1f s; store %s has %d of %d tiles",
                len(todo), time.perf_counter() - t0, location, len(all_tiles) - missing,
                len(all_tiles))
    if missing:
        raise RuntimeError(STORE_INCOMPLETE.format(store=location, missing=missing,
                                                   total=len(all_tiles)))
    if todo and len(todo) == len(all_tiles) and not nonzero:
        warnings.warn(ZERO_KERNEL, RuntimeWarning, stacklevel=3)
    info = RunInfo(location, len(all_tiles), len(todo), len(mine) - len(todo), repaired,
                   plan.block, len(devs), (index, count))
    kernels = [StoredKernel(ts.kernel, g, info) for g in range(len(plan.group_names))]
    if index == 0:
        run_spot_check(req, kernels, count=checked, outputs=outputs)
    return kernels, info


def _open_store(store, plan, req, options: dict):
    """Create the store or check the one there (held under its lock): the plan to run."""
    found = inspect(store)
    if found.damage:
        logger.warning(STORE_DAMAGED.format(store=options["location"], damage=found.damage))
        clear(store)
    elif found.fingerprint is not None:
        plan = _adopt(plan, req, found.fingerprint, **options)
    try:
        TileStore.create(store, fingerprint(plan, req), plan)
    except OSError as e:
        if is_disk_full(e):
            raise disk_full(store, needed=None) from e
        raise
    return plan


def _check_space(store, ts: TileStore, todo) -> None:
    """Fail before computing when the missing tiles cannot fit on a local store's disk."""
    free = free_bytes(store)
    needed = sum(map(ts.tile_bytes, todo))
    if free is not None and needed > free:
        raise disk_full(store, needed=needed)
