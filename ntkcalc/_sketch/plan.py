r"""The cost of sketched features, priced like a kernel method, next to the exact kernel's plan.

`plan_features` estimates what `ntkcalc.ntk_features` will do for a request — FLOPs, bytes moved,
seconds at this machine's measured rates, peak memory and the block size the budget allows —
and plans the exact kernel (`ntkcalc.plan`) for the same inputs, so one printout says which is
cheaper and whether the exact N × N kernel fits the budget at all.

FLOPs per example (structured method; A output directions: O for ``"trace"`` and ``"full"``, 1
for ``"logit-sum"``; k features; a factored leaf with B groups, T positions, C inputs, R outputs;
`projection` has the projections these count):

- the factors: one forward and A backward passes, ``fwd·(1 + 2A)`` (a VJP costs about two
  forward passes: Novak, Sohl-Dickstein & Schoenholz, ICML 2022, arXiv:2206.08720);
- a factored leaf: ``2·B·T·(C + A·R)·k`` for ``sᵀh`` and ``gᵀu`` plus ``2·B·T·k`` (``2·B·T·A·k`` in
  ``"full"``) for their products; a looked-up (embedding) input costs no FLOPs, a gather;
- a leaf projected from its dense derivative (p entries, last axis p₂): ``2·A·p·k``, plus
  ``2·A·(p/p₂)·k`` for its row projection;
- method ``"jvp"``: k forward-mode products per example, about ``3·fwd`` each.

Time = FLOPs at the matmul rate + bytes at the streaming rate (the planner's model,
`ntkcalc._engine.cost`), bytes = inputs read, one block's working set, features written.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Literal

import numpy as np

from .._analysis._result import Result
from .._engine import cost as C
from .._engine import structured as st
from .._engine.options import METHODS, check_choice
from .._engine.select import ParamFilter
from .._tiles.plan import Plan, plan_request
from .features import (
    FeatureMethod,
    FeatureOutputs,
    example_bytes,
    fit_block,
    memory_parts,
    setup,
)


def rates(dtype) -> tuple[float, float]:
    """(matmul FLOP/s, streaming bytes/s) the estimates are converted with: this machine's
    measured rates (`ntkcalc._engine.cost.machine_rate` and `stream_rate`, cached per process).
    The one place that reads them."""
    name = np.dtype(dtype).name
    return C.machine_rate(name), C.stream_rate(name)


@dataclasses.dataclass(frozen=True)
class LeafSketchCost:
    """One parameter leaf of a features plan: how it is projected and its FLOPs per example."""

    name: str
    shape: tuple[int, ...]
    projected: str  # factored, dense, folded (into its layer's factors), unused, jvp
    flops_per_example: float


@dataclasses.dataclass(frozen=True, repr=False)
class FeaturesPlan(Result):
    """What `ntkcalc.ntk_features` will cost for a request, and the exact kernel's plan beside it.
    Print it for a readable comparison.

    Fields:
        n, k, outputs, method, num_outputs, dtype: the request (dtype: the compute dtype name).
        block: examples per compiled step for the budget (0: not even one example fits).
        leaves: per-leaf `LeafSketchCost` rows (structured method).
        flops, bytes_moved, seconds: estimated totals; seconds = flops / rate + bytes / stream.
        peak_bytes: projections + one block's working set (+ the features when held in memory).
        features_bytes: size of the features, N·rows·k·itemsize.
        in_memory: the features are held in memory (False: written to a store).
        memory: the byte budget; rate, stream: measured matmul FLOP/s and streaming bytes/s.
        exact: the exact kernel's `ntkcalc.Plan` for the same inputs and outputs mode (of its
            tiles alone, as into a store, when the result does not fit in memory), or None
            when not even one tile fits the budget; ``exact_note`` says why, in either case.
        exact_bytes: size of the exact kernel (N × N, or N×N×O×O in ``"full"``).
        exact_fits: the exact kernel and its computation fit the budget in memory.
    """

    n: int
    k: int
    outputs: str
    method: str
    num_outputs: int
    dtype: str
    block: int
    leaves: tuple[LeafSketchCost, ...]
    flops: float
    bytes_moved: float
    seconds: float
    peak_bytes: float
    features_bytes: float
    in_memory: bool
    memory: int
    rate: float
    stream: float
    exact: Plan | None
    exact_bytes: float
    exact_fits: bool
    exact_note: str = ""

    @property
    def fits(self) -> bool:
        """The features' computation fits the budget."""
        return self.block > 0

    @property
    def cheaper(self) -> Literal["features", "exact"]:
        """The cheaper of the two by estimated time, among those that fit ("features" when
        neither fits: it needs less memory)."""
        if self.exact is None or not self.exact_fits:
            return "features"
        if not self.fits:
            return "exact"
        return "exact" if self.exact.seconds <= self.seconds else "features"

    def __str__(self) -> str:
        where = "in memory" if self.in_memory else "to a store"
        lines = [
            f"ntkcalc features plan: k={self.k}, outputs={self.outputs!r}, "
            f"method={self.method!r}, N={self.n}, {self.dtype}",
            f"  features ({self.n * (self.num_outputs if self.outputs == 'full' else 1)}, "
            f"{self.k}) {C.format_bytes(self.features_bytes)} {where}; "
            + (f"blocks of {self.block} examples" if self.fits else "does NOT fit")
            + f"; budget {C.format_bytes(self.memory)}",
        ]
        if self.leaves:
            w = max([len(leaf.name) for leaf in self.leaves] + [9])
            lines.append(f"  {'parameter':<{w}}  {'shape':<16} {'projected':<10} "
                         f"{'FLOPs/example':>14}")
            for leaf in self.leaves:
                lines.append(f"  {leaf.name:<{w}}  {str(leaf.shape):<16} {leaf.projected:<10} "
                             f"{C.format_flops(leaf.flops_per_example):>14}")
        lines.append(
            f"  total {C.format_flops(self.flops)}, {C.format_bytes(self.bytes_moved)} moved, "
            f"peak ≈ {C.format_bytes(self.peak_bytes)}, ≈ {_duration(self.seconds)} at "
            f"{self.rate / 1e9:.3g} GFLOP/s and {self.stream / 1e9:.3g} GB/s (measured rates)")
        if self.exact is None:
            lines.append(f"  exact kernel: cannot be planned in this budget ({self.exact_note})")
        else:
            lines.append(
                f"  exact kernel: {self.exact.shape} {C.format_bytes(self.exact_bytes)}, "
                f"method {self.exact.method!r}, ≈ {_duration(self.exact.seconds)}, "
                + ("fits the budget" if self.exact_fits else
                   "does NOT fit the budget in memory (a store on disk could hold it)"))
        lines.append(f"  cheaper: {self.cheaper}")
        return "\n".join(lines)

    __repr__ = __str__


def _duration(seconds: float) -> str:
    if not math.isfinite(seconds):
        return "∞"
    if seconds < 120:
        return f"{seconds:.3g} s"
    if seconds < 7200:
        return f"{seconds / 60:.3g} min"
    return f"{seconds / 3600:.3g} h"


def _leaf_flops(sketch, spec, use, k: int) -> float:
    """FLOPs per example of one leaf's projection (module docstring)."""
    a = sketch.directions
    if spec is None:
        return 0.0
    if spec[0] == "factored":
        bsz, t, _, r = st.factored_sizes(use)
        inputs = 0 if use.rule == "embed" else spec[2]
        return 2.0 * bsz * t * (inputs + a * r) * k + 2.0 * bsz * t * k * (1 if sketch.mix else a)
    shape = spec[1]
    p = math.prod(shape)
    p2 = shape[-1] if shape else 1
    rows = (p // max(p2, 1)) * (a if sketch.mix else 1)
    return 2.0 * a * p * k + (2.0 * rows * k if rows > 1 else 0.0)


def plan_features(
    net,
    x,
    *,
    k: int,
    outputs: FeatureOutputs = "trace",
    method: FeatureMethod = "structured",
    params: ParamFilter = None,
    memory=None,
    to_store: bool = False,
    exact_method: str = "auto",
) -> FeaturesPlan:
    """Estimate `ntkcalc.ntk_features` for these inputs, and plan the exact kernel beside it.

    Nothing is computed but the per-example trace and the machine's rates; only two examples of
    ``x`` are read (a memmap of a million examples costs nothing here).

    Args:
        net: an `ntkcalc.Net`; x: inputs (N, ...), any array with shape and slicing.
        k, outputs, method, params: as in `ntkcalc.ntk_features`.
        memory: the budget (bytes or e.g. ``"2GB"``; default half the memory available now),
            for both the features and the exact kernel.
        to_store: the features go to a store on disk (`ntk_features(..., store=...)`), so only
            the projections and one block need memory; False: they are held in memory.
        exact_method: the exact kernel's method (``"auto"``: the planner's choice).

    Returns:
        `FeaturesPlan`: ``print(plan)`` compares both; ``plan.cheaper`` names the cheaper one
        that fits; ``plan.exact_fits`` says whether the exact kernel fits in memory at all.
    """
    if not isinstance(to_store, bool):
        raise ValueError(f"`to_store`={to_store!r} must be True or False.")
    check_choice("exact_method", exact_method, METHODS)
    x, k, req, sketch, acts, fwd = setup(net, x, k=k, outputs=outputs, method=method,
                                         params=params)
    n = int(x.shape[0])
    budget = C.parse_memory(memory)
    isz = C.itemsize(req.dtype)
    fixed, result, per = memory_parts(sketch, acts, req, n=n, in_memory=not to_store)
    block = fit_block(fixed, result, per, n=n, budget=budget)
    base = sketch.program
    a = sketch.directions
    sel = req.selection
    names = [sel.names[i] for i in sel.indices]
    leaves = []
    if method == "jvp":
        example_flops = 3.0 * fwd * k
        leaves = [LeafSketchCost(nm, tuple(np.shape(d)), "jvp", 0.0)
                  for nm, d in zip(names, req.diff, strict=True)]
    else:
        an = base.analysis
        example_flops = fwd * (1 + 2 * a)
        for leaf, (spec, kind) in enumerate(zip(sketch.projection_shapes(), base.kinds,
                                                strict=True)):
            use = an.uses[leaf][0] if an.uses[leaf] else None
            f = _leaf_flops(sketch, spec, use, k)
            example_flops += f
            leaves.append(LeafSketchCost(names[leaf], tuple(np.shape(req.diff[leaf])), kind, f))
    x_bytes = math.prod(x.shape[1:]) * np.dtype(x.dtype).itemsize
    rows = sketch.rows_per_example
    moved = n * (x_bytes + example_bytes(sketch, acts, isz) + rows * k * isz)
    rate, stream = rates(req.dtype)
    flops = n * example_flops
    exact, note = _exact_plan(req, n, outputs=outputs, memory=memory, method=exact_method)
    exact_bytes = float(n * n * (req.num_outputs ** 2 if outputs == "full" else 1) * isz)
    exact_fits = exact is not None and exact.peak_bytes + exact_bytes <= budget
    return FeaturesPlan(
        n=n, k=k, outputs=outputs, method=method, num_outputs=req.num_outputs,
        dtype=np.dtype(req.dtype).name, block=block, leaves=tuple(leaves), flops=flops,
        bytes_moved=float(moved), seconds=flops / rate + moved / stream,
        peak_bytes=float(fixed + result + max(block, 1) * per),
        features_bytes=float(n * rows * k * isz), in_memory=not to_store, memory=budget,
        rate=rate, stream=stream, exact=exact, exact_bytes=exact_bytes, exact_fits=exact_fits,
        exact_note=note)


def _exact_plan(req, n: int, *, outputs, memory, method) -> tuple[Plan | None, str]:
    """The exact kernel's plan at the full N without reading x: the planner needs only the
    inputs' shape and dtype, so it gets a zero-stride view of one example N times. When the
    result does not fit in memory, the plan of its tiles alone (as into a store), with why."""
    view = np.broadcast_to(req.x1[:1], (n,) + tuple(req.x1.shape[1:]))
    req = dataclasses.replace(req, x1=view)
    try:
        return plan_request(req, outputs=outputs, memory=memory, method=method), ""
    except MemoryError as err:
        note = str(err)
    try:  # the result does not fit in memory: its tiles may (into a store)
        return plan_request(req, outputs=outputs, memory=memory, method=method,
                            reserve=False), note
    except MemoryError as err:
        return None, str(err)
