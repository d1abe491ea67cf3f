"""The plan of a whole request: the tile layer's first stage, between pricing and tiles.

`plan` (and `plan_request`, for a validated request) takes what only the whole request knows:
the memory budget, the in-memory result's reservation or the store (whose tile size and method a
resumed run adopts), and the split over devices; the engine's planner (`_engine.planner`) prices
every method for a request at a per-device budget and tile size. `check_plan` and
`check_stored` refuse a plan, or a store, made for another request.
"""

from __future__ import annotations

import dataclasses
import logging
import math

import jax
import numpy as np

from .._engine import cost as C
from .._engine.options import tile_shape
from .._engine.planner import (
    BY_METHOD,
    LeafCost,
    Request,
    candidates,
    choose,
    context,
    prepare,
    sides,
    trace_key,
)
from .._engine.program import Program
from .._engine.rates import Rates, check_rates, default_rates
from .._engine.select import ParamFilter
from .._words import counted
from .fingerprint import ADOPTABLE, differences, fingerprint
from .location import stored_fingerprint
from .messages import STORE_MISMATCH, STORE_NEEDED
from .placement import check_devices, shares_host_memory

_log = logging.getLogger("ntkcalc")


@dataclasses.dataclass(frozen=True, eq=False)
class Plan:
    """What `ntkcalc.ntk` will do for this request, exactly: ``ntk(..., plan=p)`` runs ``p``.
    Print it for a readable table.

    Fields:
        method: the method chosen ("structured", "jacobian" or "jvp").
        outputs: outputs mode; n1, n2: examples; symmetric: K(X, X) with mirrored tiles.
        num_outputs: O; dtype: the kernel dtype.
        block: examples per tile side; cache_factors: whether every block's factors are kept.
        leaves: per-leaf rows for the chosen method.
        flops, peak_bytes, seconds: estimated totals (peak: per device; seconds: FLOPs at the matmul
            rate, bytes moved at the streaming rate, derivative formation at the formation
            rate, and ``calls`` jitted calls at the per-call cost of ``rates``).
        estimates: {method: estimated seconds} for every method that was costed (inf: does not
            fit the budget).
        memory: the whole byte budget (``memory=``, or the default from the devices' memory).
        rates: the `Rates` the time was estimated at (``rates.source`` says where they came
            from: measured, the per-machine file, or given).
        program: the compiled-computation description the tile layer runs.
        group_names: parameter groups (``ntk_by_layer``).
        devices: the JAX devices the tiles are spread over.
        reserved: bytes of ``memory`` set aside for the in-memory result (0 with a store, and on
            accelerators, where the result is held on the host).
        working: the budget each device's tiles were planned in: (memory − reserved) / D for D
            CPU devices (they share host memory), the whole budget for each accelerator.
        store: where the kernel is written (None: in memory).
        calls: jitted calls the run makes (factor steps and tile steps).
        request: what identifies the request the plan was made for (`check_plan`).
    """

    method: str
    outputs: str
    n1: int
    n2: int
    symmetric: bool
    num_outputs: int
    dtype: np.dtype
    block: int
    cache_factors: bool
    leaves: tuple[LeafCost, ...]
    flops: float
    peak_bytes: float
    seconds: float
    estimates: dict
    memory: int
    rates: Rates
    program: Program = dataclasses.field(repr=False)
    group_names: tuple[str, ...] = ("all",)
    devices: tuple = ()
    reserved: int = 0
    working: int = 0
    store: str | None = None
    calls: int = 1
    request: dict = dataclasses.field(default_factory=dict, repr=False)

    @property
    def rate(self) -> float:
        """The matmul FLOP/s of `rates` (kept for callers reading ``plan.rate``)."""
        return self.rates.matmul

    @property
    def stream(self) -> float:
        """The streaming bytes/s of `rates`."""
        return self.rates.stream

    @property
    def tile(self) -> tuple[int, ...]:
        return tile_shape(self.outputs, self.block, self.block, self.num_outputs)

    @property
    def shape(self) -> tuple[int, ...]:
        return tile_shape(self.outputs, self.n1, self.n2, self.num_outputs)

    @property
    def representations(self) -> tuple[str, ...]:
        """Per differentiated leaf, how it is handled (`LeafCost.representation`)."""
        return tuple(leaf.representation for leaf in self.leaves)

    def __str__(self) -> str:
        kinds = sorted({d.platform for d in self.devices}) or ["?"]
        where = f"store {self.store!r}" if self.store is not None else (
            f"result in memory ({C.format_bytes(self.reserved)} reserved)" if self.reserved
            else "result in host memory")
        lines = [
            f"ntkcalc plan: method={self.method!r}, outputs={self.outputs!r}, kernel {self.shape} "
            f"{self.dtype}{' (symmetric: upper tiles only)' if self.symmetric else ''}",
            f"  tiles of {self.block}×{self.block} examples, factors "
            f"{'cached per block' if self.cache_factors else 'recomputed per tile'}; "
            f"budget {C.format_bytes(self.memory)}, {where}; "
            f"{counted(len(self.devices), '/'.join(kinds) + ' device')}, "
            f"{C.format_bytes(self.working)} each",
        ]
        w = max([len(leaf.name) for leaf in self.leaves] + [9])
        lines.append(f"  {'parameter':<{w}}  {'shape':<16} {'rule':<12} {'as':<10} "
                     f"{'FLOPs':>13} {'bytes/example':>13}")
        for leaf in self.leaves:
            lines.append(
                f"  {leaf.name:<{w}}  {str(leaf.shape):<16} {leaf.rule:<12} "
                f"{leaf.representation:<10} {C.format_flops(leaf.flops):>13} "
                f"{C.format_bytes(leaf.bytes_per_example):>13}"
                + (f"  ({leaf.note})" if leaf.note else "")
            )
        lines.append(
            f"  total {C.format_flops(self.flops)}, peak ≈ {C.format_bytes(self.peak_bytes)}, "
            f"{counted(self.calls, 'jitted call')}, ≈ {self.seconds:.3g} s"
        )
        lines.append(f"  rates: {self.rates.describe()}")
        alts = ", ".join(f"{m} ≈ {s:.3g} s" for m, s in sorted(self.estimates.items(),
                                                                key=lambda kv: kv[1]))
        lines.append(f"  estimates: {alts}")
        return "\n".join(lines)

    __repr__ = __str__

def plan(net, x1, x2=None, *, outputs="trace", memory=None, method="auto",
         params: ParamFilter = None, by_layer: bool | int = False, store=None, devices=None,
         rates: Rates | None = None) -> Plan:
    """Plan a kernel computation without running it: exactly what ``ntk(..., plan=p)`` runs.

    One planner takes the whole request: the memory budget (from the devices' own memory by
    default), the in-memory result's reservation or the store, the split over devices, and the
    tile size and method of a store being resumed.

    Args:
        net: an `ntkcalc.Net`.
        x1: (N1, ...) inputs; x2: (N2, ...) inputs or None for K(x1, x1).
        outputs: "full", "trace", "diagonal" or "logit-sum" (see `ntkcalc.ntk`).
        memory: peak-memory budget: bytes, a string like "2GB", or None for half of what is
            available now (host RAM on CPU; on an accelerator its own free memory,
            ``memory_stats()`` bytes_limit − bytes_in_use).
        method: "auto" (cheapest estimate that fits), "structured", "jacobian" or "jvp".
        params: parameter filter (regular expression on dotted names, or a predicate).
        by_layer: plan the kernel split by parameter group (`ntkcalc.ntk_by_layer`'s ``depth``).
        store: as in `ntkcalc.ntk`: None plans the result in memory (reserved first on CPU); a
            store location plans tiles alone, and adopts the tile size and (for "auto") method
            of a kernel already there.
        devices: as in `ntkcalc.ntk` (default all local devices).
        rates: the machine `Rates` to estimate time at (default: this machine's, measured once
            and kept per machine, `rates.default_rates`); pass fixed rates to reproduce a plan.

    Returns:
        A `Plan`; ``print(plan)`` shows each leaf's rule, FLOPs and bytes, the totals, the
        devices, the reservation and the rates.
    """
    req = prepare(net, x1, x2, outputs=outputs, method=method, params=params, by_layer=by_layer)
    location, stored = (None, None) if store is None else stored_fingerprint(store)
    return plan_request(req, outputs=outputs, memory=memory, method=method, store=location,
                        stored=stored, devices=check_devices(devices), rates=rates)


def result_bytes(req: Request, outputs: str) -> int:
    """Bytes of the in-memory result: groups × the kernel's elements × itemsize."""
    side = sides(req)
    shape = tile_shape(outputs, side.n1, side.n2, req.num_outputs)
    return len(req.selection.group_names) * math.prod(shape) * C.itemsize(req.dtype)


_PLANS: dict = {}


def plan_request(req: Request, *, outputs: str, memory, method: str, store: str | None = None,
                 stored: dict | None = None, devices=None, rates: Rates | None = None,
                 reserve: bool | None = None) -> Plan:
    """The plan of a validated request (`_plan_request`), kept for a repeated request: the same
    traced function, sizes, options, devices, rates and budget give the same `Plan` object
    (the default budget is taken in whole MB, so repeated calls plan alike). A plan against a
    store's record (``stored``) is made every time: the record names the parameters and
    inputs, which the key does not."""
    devs = tuple(jax.local_devices()) if devices is None else tuple(devices)
    rates = default_rates(req.dtype.name, device=devs[0]) if rates is None else check_rates(
        rates)
    budget = C.parse_memory(memory, devices=devs)
    if memory is None:
        budget -= budget % 10**6
    key = (trace_key(req), outputs, req.x1.shape[0],
           None if req.x2 is None else req.x2.shape[0], req.num_outputs, str(req.dtype), method,
           store, devs, rates, budget, reserve)
    held = store is None if reserve is None else reserve
    if held and not shares_host_memory(devs):
        # On an accelerator the result is assembled on the host, outside the device's budget.
        result, host = result_bytes(req, outputs), C.host_memory()
        if result > C.DEFAULT_MEMORY_FRACTION * host:
            raise MemoryError(
                f"the in-memory kernel ({C.format_bytes(result)}) exceeds half the host memory "
                f"available ({C.format_bytes(host)}), where it is assembled from the "
                f"{devs[0].platform} device(s): pass `store=` (e.g. store='kernel.zarr') to "
                "write it to disk tile by tile.")
    if key not in _PLANS or stored is not None:  # a store's record is checked every time
        made = _plan_request(req, outputs=outputs, memory=memory, budget=budget, method=method,
                             store=store, stored=stored, devices=devs, rates=rates,
                             reserve=reserve)
        if stored is not None:
            return made
        if len(_PLANS) > 64:
            _PLANS.pop(next(iter(_PLANS)))
        _PLANS[key] = made
    return _PLANS[key]


def _plan_request(req: Request, *, outputs: str, memory, budget: int, method: str,
                  store: str | None, stored: dict | None, devices: tuple, rates: Rates,
                  reserve: bool | None) -> Plan:
    """The plan of a validated request (see `plan`): budget, reservation, devices, store.

    ``store`` is the store's location (None: in memory) and ``stored`` the fingerprint found
    there (None: empty). ``devices`` are validated JAX devices (default all local devices).
    ``reserve``: whether the result is held in memory (None: when there is no store; False
    for a caller that never builds the kernel, e.g. a matrix-free operator).

    Budget: ``memory`` (default half of what `cost.available_memory` reports for the devices).
    Without a store, on CPU, the result (groups × kernel bytes) is reserved first; on an
    accelerator the result is held on the host and each device's tiles get the whole budget.
    D CPU devices share host memory: each device's tiles are planned in 1/D of what is left,
    or on one device when that is too small.
    """
    devs = devices
    side = sides(req)
    ctx = context(req, outputs)
    want = method
    if stored is not None and method == "auto" and stored.get("method") in BY_METHOD:
        want = stored["method"]  # resume in the store's method
    costed = candidates(ctx, want)
    host = shares_host_memory(devs)
    result = result_bytes(req, outputs) if (store is None if reserve is None else reserve) else 0
    reserved = result if host else 0
    working = budget - reserved
    share = len(devs) if len(devs) > 1 and host else 1
    attempts = [(working // share, devs)] + ([(working, devs[:1])] if share > 1 else [])
    too_small_for_store = None
    for per_device, use in attempts if working > 0 else []:
        try:
            best, estimates = choose(ctx, costed, memory=memory, budget=per_device, rates=rates,
                                     single_device=len(use) == 1)
        except MemoryError:
            if share > 1 and use is devs:
                _log.info("ntkcalc: budget too small for tiles on %d CPU devices at once; "
                          "using one", share)
            continue

        def build(best, use=use, per_device=per_device, estimates=estimates):
            return Plan(best.method, outputs, side.n1, side.n2, side.symmetric,
                        req.num_outputs, req.dtype, best.block, best.cache, best.rows,
                        best.flops, best.peak, best.seconds, estimates, budget, rates,
                        best.program, req.selection.group_names, tuple(use), reserved,
                        per_device, store, best.calls, request_signature(req, outputs))

        made = build(best)
        if stored is not None:
            check_stored(made, req, stored, tiles=False)  # another kernel: refused first
            if stored["block"] > best.block:
                too_small_for_store = best.block
                continue
            if stored["block"] < best.block:
                made = build(choose(ctx, costed, memory=memory, budget=per_device, rates=rates,
                                    single_device=len(use) == 1, block=stored["block"])[0])
        return made
    if too_small_for_store is not None:
        raise MemoryError(
            f"`store`={store!r} was written in tiles of {stored['block']} examples, but "
            f"`memory`={memory!r} fits only {too_small_for_store}: resume with the `memory` of "
            "the first run (or more), or choose a new `store` path."
        )
    try:
        choose(ctx, costed, memory=memory, budget=budget, rates=rates, single_device=True)
    except MemoryError as e:
        if not reserved:
            raise
        raise MemoryError(f"{e} Keeping the result in memory needs another "
                          f"{C.format_bytes(result)} on top, or pass `store=`.") from None
    raise MemoryError(STORE_NEEDED.format(
        result=C.format_bytes(result),
        why="alone exceeds" if working <= 0 else "and one tile together exceed",
        memory=memory, budget=C.format_bytes(budget)))


def check_stored(plan: Plan, req: Request, stored: dict, *, tiles: bool = True) -> None:
    """Refuse a store that holds another kernel (`STORE_MISMATCH`, naming the fields), or (with
    ``tiles``) this kernel in other tiles than ``plan``'s."""
    now = fingerprint(plan, req)
    diffs = differences(stored, now)
    hard = [d for d in diffs if d not in ADOPTABLE]
    if hard:
        raise ValueError(STORE_MISMATCH.format(
            store=plan.store, fields=", ".join(hard),
            stored={k: stored.get(k) for k in hard}, now={k: now.get(k) for k in hard}))
    if diffs and tiles:
        raise ValueError(
            f"`store`={plan.store!r} holds this kernel in tiles of {stored.get('block')} "
            f"examples, but the plan runs tiles of {plan.block}: make the plan with the same "
            "`store=` (it adopts the store's tiles), or choose a new `store` path."
        )


def request_signature(req: Request, outputs: str) -> dict:
    """What a plan must share with a request to run it: the Net's call, input shapes and
    dtypes, compute dtype, outputs mode, differentiated parameters (names and shapes) and
    groups. Parameter *values* may differ (a checkpoint of the same model)."""
    sel = req.selection
    return {
        "net call": req.net.call,
        "x1 shape": tuple(req.x1.shape),
        "x2 shape": None if req.x2 is None else tuple(req.x2.shape),
        "input dtype": str(req.x1.dtype),
        "dtype": np.dtype(req.dtype).name,
        "outputs": outputs,
        "parameters": tuple(sel.names[i] for i in sel.indices),
        "parameter shapes": tuple(tuple(np.shape(d)) for d in req.diff),
        "groups": tuple(sel.group_names),
        "num_outputs": req.num_outputs,
    }


def check_plan(plan: Plan, req: Request, *, outputs: str, memory, method: str,
               store: str | None, devices) -> Plan:
    """``plan`` if it was made for this request and these options, else ValueError naming
    what differs (the plan is run exactly; options that would change it are refused)."""
    if not isinstance(plan, Plan):
        raise ValueError(f"`plan`={plan!r} is not a Plan: pass the result of ntkcalc.plan(...) "
                         "for the same request, or plan=None.")
    now = request_signature(req, outputs)
    diffs = [k for k in now if now[k] != plan.request.get(k)]
    if diffs:
        shown = "; ".join(f"{k}: plan {plan.request.get(k)!r}, now {now[k]!r}" for k in diffs)
        raise ValueError(
            f"`plan` was made for another request ({shown}): make it with ntkcalc.plan on the "
            "same net, inputs, outputs, params (and by_layer) as this call, or pass plan=None.")
    if memory is not None and C.parse_memory(memory) != plan.memory:
        raise ValueError(
            f"`memory`={memory!r} disagrees with `plan`, made for {C.format_bytes(plan.memory)} "
            f"({plan.memory} bytes): leave `memory` out (the plan carries its budget) or plan "
            "again with this `memory`.")
    if method != "auto" and method != plan.method:
        raise ValueError(
            f"`method`={method!r} disagrees with `plan`, which runs {plan.method!r}: leave "
            "`method` out or plan again with this `method`.")
    if store != plan.store:
        raise ValueError(
            f"`store`={store!r} disagrees with `plan`, made for "
            f"{'the kernel in memory (store=None)' if plan.store is None else repr(plan.store)}: "
            "pass the same `store` to ntkcalc.plan and this call.")
    if devices is not None and tuple(devices) != tuple(plan.devices):
        raise ValueError(
            f"`devices`={list(devices)!r} disagrees with `plan`, made for "
            f"{list(plan.devices)!r}: leave `devices` out or plan again with them.")
    return plan
