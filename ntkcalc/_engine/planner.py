"""The planner: which method for which leaf, what block size, and what it will cost.

`plan` traces the model once at abstract shapes (no compute), analyses which layer consumes each
parameter, costs every method with `cost`, and picks the cheapest that fits the memory budget.
`ntkcalc.ntk(..., method="auto")` follows the plan; printing it answers "why is this slow?".
"""

from __future__ import annotations

import dataclasses
import math

import jax
import jax.numpy as jnp
import numpy as np

from .._adapters.net import Net
from . import cost as C
from . import structured as st
from .checks import (
    as_compute,
    check_finite_tree,
    check_independent,
    check_inputs,
    check_net,
    check_pair,
    compute_dtype,
    output_size,
)
from .contract import STREAM_CHUNK_BYTES, stream_chunk
from .options import METHODS, OUTPUTS, basis_size, check_choice, tile_shape
from .program import Program
from .select import ParamFilter, select


@dataclasses.dataclass(frozen=True)
class LeafCost:
    """One row of a plan: a differentiated leaf, how it is handled and what it costs."""

    name: str
    shape: tuple[int, ...]
    rule: str  # dot, conv, embed, scale, bias, concat (×uses, +), fallback, unused
    representation: str  # factored, dense (from the rule), jacobian (fallback), unused, jvp
    flops: float  # total over the whole kernel
    bytes_per_example: float  # factor bytes held per example
    note: str = ""


@dataclasses.dataclass(frozen=True, eq=False)
class Plan:
    """What `ntkcalc.ntk` will do for this request. Print it for a readable table.

    Fields:
        method: the method chosen ("structured", "jacobian" or "jvp").
        outputs: outputs mode; n1, n2: examples; symmetric: K(X, X) with mirrored tiles.
        num_outputs: O; dtype: the kernel dtype.
        block: examples per tile side; cache_factors: whether every block's factors are kept.
        leaves: per-leaf rows for the chosen method.
        flops, peak_bytes, seconds: estimated totals (seconds: FLOPs at `machine_rate` plus
            bytes moved at `stream_rate`).
        estimates: {method: estimated seconds} for every method that was costed.
        memory: the byte budget the block size was chosen for.
        rate, stream: the measured matmul FLOP/s and streaming bytes/s the time is estimated at.
        program: the compiled-computation description the tile layer runs.
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
    rate: float
    stream: float
    program: Program = dataclasses.field(repr=False)
    group_names: tuple[str, ...] = ("all",)

    @property
    def tile(self) -> tuple[int, ...]:
        return tile_shape(self.outputs, self.block, self.block, self.num_outputs)

    @property
    def shape(self) -> tuple[int, ...]:
        return tile_shape(self.outputs, self.n1, self.n2, self.num_outputs)

    def __str__(self) -> str:
        lines = [
            f"ntkcalc plan: method={self.method!r}, outputs={self.outputs!r}, kernel {self.shape} "
            f"{self.dtype}{' (symmetric: upper tiles only)' if self.symmetric else ''}",
            f"  tiles of {self.block}×{self.block} examples, factors "
            f"{'cached per block' if self.cache_factors else 'recomputed per tile'}; "
            f"budget {C.format_bytes(self.memory)}",
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
            f"≈ {self.seconds:.3g} s at {self.rate / 1e9:.3g} GFLOP/s and "
            f"{self.stream / 1e9:.3g} GB/s (measured matmul and streaming rates)"
        )
        alts = ", ".join(f"{m} ≈ {s:.3g} s" for m, s in sorted(self.estimates.items(),
                                                                key=lambda kv: kv[1]))
        lines.append(f"  estimates: {alts}")
        return "\n".join(lines)

    __repr__ = __str__


@dataclasses.dataclass(frozen=True)
class Request:
    """A validated kernel request, arrays on the host in the compute dtype."""

    net: Net
    x1: np.ndarray
    x2: np.ndarray | None
    params: object
    state: object
    diff: list
    other: list
    selection: object
    num_outputs: int
    dtype: np.dtype


def prepare(net, x1, x2=None, *, outputs="trace", method="auto", params: ParamFilter = None,
            by_layer: bool = False) -> Request:
    """Validate everything up front and put the arrays in the compute dtype."""
    net = check_net(net)
    check_choice("method", method, METHODS)
    check_choice("outputs", outputs, OUTPUTS)
    x1 = check_inputs(x1, "x1")
    x2 = None if x2 is None else check_inputs(x2, "x2")
    check_pair(x1, x2)
    dtype = compute_dtype()
    check_finite_tree(net.params, "net.params")
    check_finite_tree(net.state, "net.state")
    selection = select(net.params, params, by_layer=by_layer)
    p = as_compute(net.params, dtype)
    s = as_compute(net.state, dtype)
    x1 = _cast_input(x1, dtype)
    x2 = None if x2 is None else _cast_input(x2, dtype)
    num_outputs = output_size(net, p, s, x1, "x1")
    check_independent(net, p, s, x1, x2)
    leaves = jax.tree_util.tree_leaves(p)
    idx = set(selection.indices)
    diff = [leaf for i, leaf in enumerate(leaves) if i in idx]
    other = [leaf for i, leaf in enumerate(leaves) if i not in idx]
    return Request(net, x1, x2, p, s, diff, other, selection, num_outputs, dtype)


def _cast_input(x: np.ndarray, dtype) -> np.ndarray:
    return x.astype(dtype) if jnp.issubdtype(x.dtype, jnp.floating) else x


def _spec(x):
    return jax.ShapeDtypeStruct(np.shape(x), x.dtype)


def _trace(req: Request, program: Program):
    x_spec = jax.ShapeDtypeStruct(req.x1.shape[1:], req.x1.dtype)
    return st.trace_example(
        program.example_fn,
        ([_spec(d) for d in req.diff], [_spec(o) for o in req.other],
         jax.tree_util.tree_map(_spec, req.state), x_spec),
    )


_TRACED: dict = {}


def _traced(req: Request, base: Program):
    """(forward FLOPs, activations, structured analysis) of the per-example function, traced
    once per (Net.call, parameter selection, shapes and dtypes): repeated calls reuse it, and so
    reuse the compiled steps keyed on the resulting `Program`."""
    key = (
        req.net.call, base.treedef, req.selection,
        tuple((np.shape(d), str(d.dtype)) for d in req.diff),
        tuple((np.shape(o), str(o.dtype)) for o in req.other),
        jax.tree_util.tree_structure(req.state),
        tuple((np.shape(s), str(s.dtype)) for s in jax.tree_util.tree_leaves(req.state)),
        req.x1.shape[1:], str(req.x1.dtype),
    )
    if key not in _TRACED:
        if len(_TRACED) > 64:
            _TRACED.pop(next(iter(_TRACED)))
        closed = _trace(req, base)
        fwd, acts = C.forward_cost(closed)
        _TRACED[key] = (fwd, acts, st.analyze(closed, len(req.diff)))
    return _TRACED[key]


traced = _traced  # the package-internal name (`ntkcalc._sketch` uses it)


def _blocks(n1: int, n2: int, peak, budget: int) -> int | None:
    """Largest tile side (examples) whose estimated peak fits ``budget``; padding kept small."""
    n = max(n1, n2)
    cap = 1
    while cap * 2 <= min(n, 4096):
        cap *= 2
    candidates = sorted({min(n, 4096)} | {2**k for k in range(int(math.log2(cap)) + 1)},
                        reverse=True)
    for b in candidates:
        if peak(b) <= budget:
            # Spread the examples evenly over the same number of blocks to limit padding.
            nb = math.ceil(n / b)
            return math.ceil(n / nb)
    return None


def plan(net, x1, x2=None, *, outputs="trace", memory=None, method="auto",
         params: ParamFilter = None, by_layer: bool = False) -> Plan:
    """Plan a kernel computation without running it.

    Args:
        net: an `ntkcalc.Net`.
        x1: (N1, ...) inputs; x2: (N2, ...) inputs or None for K(x1, x1).
        outputs: "full", "trace", "diagonal" or "logit-sum" (see `ntkcalc.ntk`).
        memory: peak-memory budget: bytes, a string like "2GB", or None for half of what is
            available now.
        method: "auto" (cheapest estimate that fits), "structured", "jacobian" or "jvp".
        params: parameter filter (regular expression on dotted names, or a predicate).

    Returns:
        A `Plan`; ``print(plan)`` shows each leaf's rule, FLOPs and bytes, and the totals.
    """
    req = prepare(net, x1, x2, outputs=outputs, method=method, params=params, by_layer=by_layer)
    return plan_request(req, outputs=outputs, memory=memory, method=method)


def plan_request(req: Request, *, outputs: str, memory, method: str) -> Plan:
    budget = C.parse_memory(memory)
    n1 = req.x1.shape[0]
    n2 = n1 if req.x2 is None else req.x2.shape[0]
    sym = req.x2 is None
    o = req.num_outputs
    a = basis_size(outputs, o)
    isz = C.itemsize(req.dtype)
    sel = req.selection
    names = [sel.names[i] for i in sel.indices]
    shapes = [tuple(np.shape(d)) for d in req.diff]
    sizes = [int(np.prod(s, dtype=np.int64)) for s in shapes]
    base = Program(req.net.call, jax.tree_util.tree_structure(req.params), sel, outputs, o,
                   "jacobian", ("dense",) * len(req.diff))
    fwd, acts, analysis = _traced(req, base)
    _check_differentiable(req, analysis, names, method)
    costed = {"jacobian", "structured", "jvp"} if method == "auto" else {method}
    if method == "auto" and _custom_vjp(analysis.closed.jaxpr):
        costed.discard("jvp")  # forward mode is undefined through jax.custom_vjp
    pairs = n1 * (n1 + 1) / 2 if sym else n1 * n2
    tile_elems = math.prod(tile_shape(outputs, 1, 1, o))
    rate = C.machine_rate(req.dtype.name)
    stream = C.stream_rate(req.dtype.name)
    x_bytes = int(np.prod(req.x1.shape[1:], dtype=np.int64)) * req.x1.dtype.itemsize

    candidates = {}

    def finish(name, program, rows, pair_flops, example_flops, example_bytes, transient, pair_tmp,
               extra=lambda b: 0.0):
        def peak(b):
            # K(X, X) in one tile holds one block of factors (its row is its column).
            sets = 1 if sym and b >= n1 else 2
            held = sets * b * example_bytes + b * transient + b * b * (pair_tmp + tile_elems) * isz
            return held + 2 * b * b * tile_elems * isz + extra(b)

        block = _blocks(n1, n2, peak, budget)
        if block is None:
            candidates[name] = (math.inf, peak(1), None, rows, program, False, 0.0)
            return
        nb_rows = math.ceil(n1 / block)
        total_factor_bytes = (n1 + (0 if sym else n2)) * example_bytes
        cache = total_factor_bytes + peak(block) <= budget
        evaluations = (n1 + (0 if sym else n2)) if cache else (
            n1 + (nb_rows * n1 / 2 if sym else nb_rows * n2))
        flops = pairs * pair_flops + evaluations * example_flops
        # Memory traffic: factors and residuals written once per evaluation and read by every
        # tile that uses them; Gram temporaries written and read once per pair.
        tiles = math.ceil(n1 / block) * (math.ceil(n2 / block) if not sym else 1)
        moved = (evaluations * (example_bytes + transient)
                 + tiles * 2 * block * example_bytes + 2 * pairs * pair_tmp * isz)
        seconds = flops / rate + moved / stream
        candidates[name] = (seconds, peak(block) + (total_factor_bytes if cache else 0), block,
                            rows, program, cache, flops)

    backprop = fwd + 2.0 * a * fwd  # one forward, A backward passes
    transient = a * acts * isz  # VJP residuals and cotangents, per example
    # A reverse pass of the whole network through a scan adds each loop-constant leaf's
    # cotangent into an accumulator at every step: memory-bound, priced at its measured rate
    # (in matmul-FLOP equivalents). Paid by the methods that run that pass (jacobian, jvp).
    loops = a * sum(st.loop_accumulation(analysis.uses[k], p) for k, p in enumerate(sizes))
    loop_flops = loops * rate / C.scan_accumulation_rate(req.dtype.name) if loops else 0.0

    # Jacobian contraction: every leaf dense from the network-wide VJP.
    if "jacobian" in costed:
        rows = []
        for name, shape, p in zip(names, shapes, sizes, strict=True):
            rows.append(LeafCost(name, shape, "fallback", "jacobian",
                                 pairs * C.dense_pair_flops(a, p, outputs), a * p * isz))
        prog = dataclasses.replace(base, kinds=tuple("dense" for _ in names))
        finish("jacobian", prog, rows, sum(C.dense_pair_flops(a, p, outputs) for p in sizes),
               backprop + loop_flops, a * sum(sizes) * isz, transient, 0.0)

    # Structured derivatives: per leaf factored, dense or streamed from its consumer, else the
    # fallback Jacobian.
    if "structured" in costed:
        # Each example's dense derivative is written once and read by every tile it is in:
        # per pair, about 2/(block side) reads plus the write shared by the pairs of its row.
        pricing = _Pricing(rate=rate, flops_per_byte=rate / stream,
                           side=min(n1, n1 if sym else n2, 256),
                           examples_per_pair=(n1 + (0 if sym else n2)) / pairs,
                           dtype_name=req.dtype.name)
        rows, kinds, folds = _structured_rows(analysis, sel, names, shapes, sizes, a, isz,
                                              outputs, pairs, pricing)
        pair_flops = sum(r.flops for r in rows) / pairs
        example_bytes = sum(r.bytes_per_example for r in rows)
        example_flops = backprop + sum(
            2.0 * a * sum(_use_local_flops(u) for u in analysis.uses[k])
            for k, kind in enumerate(kinds) if kind == "dense" and analysis.uses[k]
        )
        pair_tmp = max([_factored_tmp(analysis.uses[k][0], a, outputs)
                        for k, kind in enumerate(kinds) if kind == "factored"] + [0.0])
        # A streamed leaf holds two chunks of dense derivatives (both sides) while contracting:
        # for a block of b examples min(all its input features, max(16 of them,
        # STREAM_CHUNK_BYTES)) — the chunk `contract.stream_chunk` picks.
        streamed = [(a * bsz * r * isz, c) for k, kind in enumerate(kinds) if kind == "streamed"
                    for bsz, _, c, r in [st.factored_sizes(analysis.uses[k][0])]]

        def chunks(b):
            return max([2.0 * min(b * q * c, max(b * q * 16, STREAM_CHUNK_BYTES))
                        for q, c in streamed] + [0.0])

        prog = dataclasses.replace(base, method="structured", kinds=tuple(kinds),
                                   analysis=analysis, folds=folds)
        finish("structured", prog, rows, pair_flops, example_flops, example_bytes, transient,
               pair_tmp, extra=chunks)

    # NTK-vector products: per pair, one JVP per output direction.
    if "jvp" in costed:
        p_total = sum(sizes)
        chunk = int(max(1, min(64, budget // max(1, 8 * p_total * isz))))
        rows = [LeafCost(n, s, "—", "jvp", 0.0, 0.0) for n, s in zip(names, shapes, strict=True)]
        prog = dataclasses.replace(base, method="jvp", jvp_chunk=chunk,
                                   kinds=tuple("dense" for _ in names))
        groups = len(sel.group_names)
        jvp_pair = a * 3.0 * fwd * groups
        finish("jvp", prog, rows, jvp_pair, a * 3.0 * fwd + loop_flops, x_bytes,
               chunk * (p_total * isz * 3 + acts * isz * 2), 0.0)

    feasible = {m: v for m, v in candidates.items() if v[2] is not None}
    if not feasible or (method != "auto" and method not in feasible):
        smallest = min(v[1] for v in candidates.values())
        raise MemoryError(
            f"`memory`={memory!r} ({C.format_bytes(budget)}) is too small for even one 1×1 tile "
            f"of this kernel: the smallest budget that works is about "
            f"{C.format_bytes(smallest * 1.25)}. Raise `memory` or choose outputs='trace'."
        )
    chosen = min(feasible, key=lambda m: feasible[m][0]) if method == "auto" else method
    seconds, peak, block, rows, program, cache, flops = feasible[chosen]
    estimates = {m: v[0] for m, v in candidates.items()}
    return Plan(chosen, outputs, n1, n2, sym, o, req.dtype, block, cache, tuple(rows), flops,
                peak, seconds, estimates, budget, rate, stream, program, sel.group_names)


def _check_differentiable(req: Request, analysis, names: list[str], method: str) -> None:
    """Refuse a kernel that would be identically zero or that the method cannot compute."""
    if all(analysis.unused):
        sel = req.selection
        shown = f"{', '.join(sel.names[:8])}{', ...' if len(sel.names) > 8 else ''}"
        if len(sel.indices) < len(sel.names):
            raise ValueError(
                f"`params` selects only parameters the model's outputs do not depend on "
                f"({', '.join(names[:8])}), so the kernel would be zero: select parameters the "
                f"model uses (all parameters: {shown})."
            )
        raise ValueError(
            f"`net`'s outputs do not depend on its parameters ({shown}), so the kernel would be "
            "zero: check that `apply` uses `params` rather than values captured in a closure."
        )
    if method == "jvp" and _custom_vjp(analysis.closed.jaxpr):
        raise ValueError(
            "`method`='jvp' needs forward-mode derivatives, but the model uses a jax.custom_vjp "
            "function, which has none: use method='jacobian' or 'structured' (or 'auto')."
        )


def _custom_vjp(jaxpr) -> bool:
    """Whether ``jaxpr`` (or any jaxpr nested in its equations) calls a jax.custom_vjp rule."""
    for eqn in jaxpr.eqns:
        if eqn.primitive.name.startswith("custom_vjp"):
            return True
        for value in eqn.params.values():
            for sub in value if isinstance(value, tuple | list) else (value,):
                inner = getattr(sub, "jaxpr", sub)
                if hasattr(inner, "eqns") and _custom_vjp(inner):
                    return True
    return False


def _factored_tmp(use: st.Use, a: int, outputs: str) -> float:
    bsz, t, _, _ = st.factored_sizes(use)
    return C.factored_pair_elements(a, bsz, t, outputs)


@dataclasses.dataclass(frozen=True)
class _Pricing:
    """What converts a leaf's work into comparable per-pair costs (FLOP-equivalents).

    rate: measured matmul FLOP/s; flops_per_byte: rate / measured streaming bytes/s;
    side: examples per tile side (at most 256); examples_per_pair: examples whose factors are
    written, per pair of examples; dtype_name: the compute dtype (for `cost.formation_rate`).
    """

    rate: float
    flops_per_byte: float
    side: int
    examples_per_pair: float
    dtype_name: str


def _structured_rows(analysis, sel, names, shapes, sizes, a, isz, outputs, pairs,
                     pricing: _Pricing):
    """Per leaf: the plan row, the representation, and the bias folded into it (if any).

    Each factorable leaf takes the cheaper of dense and factored, and a dense one is streamed
    when that is cheaper still; costs per pair of examples in FLOP-equivalents (bytes at
    ``flops_per_byte`` = matmul rate / streaming rate):

    - ``dense``: its derivative formed once per example, stored, and re-read by every tile it
      is in (about 2/``side`` reads per pair, ``side`` = examples per tile side);
    - ``factored``: the Gram contraction of (h, g), streaming its Gram temporaries once;
    - ``streamed``: (h, g) stored, the dense derivative re-formed chunk by chunk in every tile
      it is in and contracted while in cache (formation again at 2/``side`` per pair).
    """
    n = len(names)
    kinds: list[str] = [""] * n
    rows: list[LeafCost | None] = [None] * n
    folds: list[int | None] = [None] * n
    for k in range(n):
        j = analysis.bias_of[k] if analysis.bias_of else None
        if j is not None and sel.groups[j] == sel.groups[k]:
            folds[k] = j
    for k, (name, shape, p) in enumerate(zip(names, shapes, sizes, strict=True)):
        uses = analysis.uses[k]
        dense_pf = C.dense_pair_flops(a, p, outputs)
        if analysis.unused[k]:
            kinds[k] = "unused"
            rows[k] = LeafCost(name, shape, "unused", "unused", 0.0, 0.0,
                               "does not affect the outputs")
            continue
        if not uses:
            kinds[k] = "dense"
            rows[k] = LeafCost(name, shape, "fallback", "jacobian", pairs * dense_pf,
                               a * p * isz, analysis.fallback[k] or "")
            continue
        choice, pf, eb = "dense", dense_pf, a * p * isz
        if st.factorable(uses):
            bsz, t, c, r = st.factored_sizes(uses[0])
            rule = uses[0].rule
            extra = 1 if folds[k] is not None else 0  # a folded bias is one more input
            fpf = C.factored_pair_flops(a, bsz, t, rule.input_gram_width(c) + extra, r, outputs)
            # Against the dense form of the weight and, when folded, of its bias too.
            alone = dense_pf + (C.dense_pair_flops(a, sizes[folds[k]], outputs) if extra else 0)
            # One example's dense derivative from its factors, at the speed of a GEMM whose inner
            # dimension is the number of positions t (slow for small t), in matmul FLOPs.
            form = (C.formation_flops(a, bsz, t, c + extra, r) * pricing.rate
                    / C.formation_rate(t, pricing.dtype_name))
            dense_bytes = a * (p + (sizes[folds[k]] if extra else 0)) * isz
            fpb, side, per_pair = pricing.flops_per_byte, pricing.side, pricing.examples_per_pair
            traffic = 2 * C.factored_pair_elements(a, bsz, t, outputs) * isz * fpb
            # Streamed chunks are whole multiples of `stream_chunk` features, the last one
            # zero-padded: the padding is formed too (65 features in chunks of 64 cost 128).
            width = c + extra
            cc = stream_chunk(side, a, bsz, r, width, isz)
            padded = -(-width // cc) * cc / width
            costs = {
                "dense": alone + form * per_pair + dense_bytes * (2.0 / side + per_pair) * fpb,
                "factored": fpf + traffic,
                "streamed": alone + form * padded * 2.0 / side,
            }
            # Streaming is the dense contraction without storing the derivative: it competes
            # with the dense form only, never with a cheaper factored contraction (its
            # memory-bound GEMMs are the least certain part of this model).
            choice = "factored" if costs["factored"] < costs["dense"] else "dense"
            if choice == "dense" and costs["streamed"] < costs["dense"]:
                choice = "streamed"
            if choice != "dense":
                pf = fpf if choice == "factored" else costs["streamed"]
                eb = (bsz * t * (rule.stored_inputs(c) + extra) + a * bsz * t * r) * isz
        if choice == "dense":
            folds[k] = None
        kinds[k] = choice
        rows[k] = LeafCost(name, shape, analysis.rule(k), choice, pairs * pf, eb)
    folded = {j for j in folds if j is not None}
    for j in folded:
        kinds[j] = "folded"
        w = folds.index(j)
        rows[j] = LeafCost(names[j], shapes[j], analysis.rule(j), "folded", 0.0, 0.0,
                           f"input 1 of {names[w]}'s factors")
    return rows, kinds, tuple(folds)


def _use_local_flops(u: st.Use) -> float:
    """FLOPs of one consumer's VJP with respect to its parameter operand (per direction), over
    every step of its enclosing scans: its rule's `local_flops`."""
    return u.rule.local_flops(u)
