"""One kernel run: the plan, run exactly, over devices, processes, store, progress.

`compute` is what `ntkcalc.ntk` and `ntkcalc.ntk_by_layer` call after validating the request.
The plan (budget, the in-memory result's reservation, the split over devices, a resumed store's
tiles and method) is made by `plan.plan_request` alone, or given by the caller and checked
against the request (`plan.check_plan`); this module runs it without changing it.

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
import time
import warnings

import numpy as np

from .._engine.checks import check_flag
from .blocking import tiles
from .fingerprint import fingerprint
from .location import check_store as check_store  # also used by the sketched-features store
from .messages import NOT_A_STORE, STORE_DAMAGED, STORE_INCOMPLETE, ZERO_KERNEL
from .placement import barrier, check_devices, process, share
from .plan import check_plan, check_stored, plan_request
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


def compute(req, *, outputs, memory, method, store, progress, devices, plan=None,
            verify: bool = True, spot_check: int = 0):
    """([kernel per group], RunInfo, the plan run): numpy arrays in memory, or `StoredKernel`
    views.

    ``plan`` (from `ntkcalc.plan`) is checked against the request and run exactly; None plans
    here (`plan.plan_request`, once the store's record is known). ``spot_check`` entries of
    the finished kernel are recomputed independently (`spot_check`).
    """
    store = check_store(store)
    progress = check_flag("progress", progress)
    checked = check_count(spot_check)
    devs = check_devices(devices) if devices is not None or plan is None else None
    index, count = process()
    if store is None and count > 1:
        raise ValueError(
            f"`store`=None with {count} JAX processes: each process computes a share of the "
            "tiles into one store, so pass store='path/kernel.zarr' on a filesystem (or object "
            "store) every process can reach."
        )
    if store is not None:
        check_writable(store, tag=f"-p{index}")
    location = None if store is None else describe(store)

    def planned(stored):
        if plan is not None:
            given = check_plan(plan, req, outputs=outputs, memory=memory, method=method,
                               store=location, devices=devs)
            if stored is not None:
                check_stored(given, req, stored)
            return given
        return plan_request(req, outputs=outputs, memory=memory, method=method, store=location,
                            stored=stored, devices=devs)

    where = f" (process {index + 1}/{count})" if count > 1 else ""
    if store is None:
        run = planned(None)
        all_tiles = tiles(run.n1, run.n2, run.block, symmetric=run.symmetric)
        with bar(len(all_tiles), enabled=progress, where=where) as b:
            out = assemble(run, req, devices=run.devices, on_tile=lambda t: b.update())
        if not np.any(out):
            warnings.warn(ZERO_KERNEL, RuntimeWarning, stacklevel=3)
        info = RunInfo(None, len(all_tiles), len(all_tiles), 0, 0, run.block, len(run.devices))
        kernels = [out[g] for g in range(len(run.group_names))]
        run_spot_check(req, kernels, count=checked, outputs=outputs)
        return kernels, info, run

    # One process: the store is locked for the whole run, so an independent process on the same
    # store waits and then reuses the tiles. Several JAX processes: only creation is locked, and
    # every other process plans once process 0 has written the store's record.
    with locked(store) if count == 1 else contextlib.nullcontext():
        run = None
        if index == 0:
            with locked(store) if count > 1 else contextlib.nullcontext():
                run = _open_store(store, location, req, planned)
        barrier("ntkcalc-store-ready")
        stored = read_fingerprint(store)
        if stored is None:
            raise ValueError(NOT_A_STORE.format(store=location))
        run = planned(stored) if run is None else run
        check_stored(run, req, stored)
        ts = TileStore.open(store, run)
        all_tiles = tiles(run.n1, run.n2, run.block, symmetric=run.symmetric)
        mine = share(all_tiles, index, count)
        todo, repaired = ts.status(mine, verify=verify)
        _check_space(store, ts, todo)
        logger.info("ntkcalc: store %s: %d of %d tiles done, %d to compute%s (%d failed "
                    "verification), tiles of %d examples on %d device(s)", location,
                    len(mine) - len(todo), len(mine), len(todo), where, repaired, run.block,
                    len(run.devices))
        t0 = time.perf_counter()
        nonzero = False
        with bar(len(todo), enabled=progress, where=where) as b:
            written = 0  # tiles come in `todo` order
            try:
                for t, values in iter_tiles(run, req, todo, devices=run.devices):
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
                   run.block, len(run.devices), (index, count))
    kernels = [StoredKernel(ts.kernel, g, info) for g in range(len(run.group_names))]
    if index == 0:
        run_spot_check(req, kernels, count=checked, outputs=outputs)
    return kernels, info, run


def _open_store(store, location, req, planned):
    """Create the store or check the one there (held under its lock): the plan to run."""
    found = inspect(store)
    if found.damage:
        logger.warning(STORE_DAMAGED.format(store=location, damage=found.damage))
        clear(store)
        found = dataclasses.replace(found, fingerprint=None)
    plan = planned(found.fingerprint)
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
