"""The engine's planner: which method for which leaf, what block size, and what it will cost.

`prepare` validates a request; `context` traces the model once at abstract shapes (no compute)
and analyses which layer consumes each parameter; `choose` prices every method (`BY_METHOD`)
with `cost` at a per-device budget and picks the cheapest whose tile fits. What only the whole
request knows (the budget, the result's reservation, a store, the devices) is the next stage's,
`_tiles/plan.py`: this module knows nothing of stores or devices. That stage reads a request
through `sides` and prices it through `context`, `candidates` and `choose`, never through the
context's fields.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable

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
from .program import STEPS, Program, Steps
from .rates import Rates
from .rules.bias import fold_candidates, settle_folds
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


def trace_key(req: Request) -> tuple:
    """What the traced per-example function depends on: the Net's call, the parameter tree and
    selection, the shapes and dtypes of parameters, state and one input."""
    return (
        req.net.call, jax.tree_util.tree_structure(req.params), req.selection,
        tuple((np.shape(d), str(d.dtype)) for d in req.diff),
        tuple((np.shape(o), str(o.dtype)) for o in req.other),
        jax.tree_util.tree_structure(req.state),
        tuple((np.shape(s), str(s.dtype)) for s in jax.tree_util.tree_leaves(req.state)),
        req.x1.shape[1:], str(req.x1.dtype),
    )


def traced(req: Request, base: Program):
    """(forward FLOPs, activations, structured analysis) of the per-example function, traced
    once per (Net.call, parameter selection, shapes and dtypes): repeated calls reuse it, and so
    reuse the compiled steps keyed on the resulting `Program`."""
    key = trace_key(req)
    if key not in _TRACED:
        if len(_TRACED) > 64:
            _TRACED.pop(next(iter(_TRACED)))
        closed = _trace(req, base)
        fwd, acts = C.forward_cost(closed)
        _TRACED[key] = (fwd, acts, st.analyze(closed, len(req.diff)))
    return _TRACED[key]


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


@dataclasses.dataclass(frozen=True)
class Sides:
    """The kernel's sides, what the request planner (`_tiles/plan.py`) reads of a request:
    n1 examples of x1 (rows), n2 of x2 (columns; n1 for K(X, X)), symmetric: K(X, X)."""

    n1: int
    n2: int
    symmetric: bool


def sides(req: Request) -> Sides:
    """The `Sides` of ``req``'s kernel: K(x1, x2), or K(x1, x1) when x2 is None."""
    n1 = req.x1.shape[0]
    return Sides(n1, n1 if req.x2 is None else req.x2.shape[0], req.x2 is None)


@dataclasses.dataclass(frozen=True)
class _Shape:
    """The sizes every method is priced over: examples, pairs, the tile's elements, itemsize."""

    n1: int
    n2: int
    symmetric: bool
    pairs: float
    tile_elems: int
    itemsize: int


@dataclasses.dataclass(frozen=True)
class Priced:
    """One method priced for one budget (None block: not even a 1×1 tile fits).

    Fields: method; seconds (inf when nothing fits); peak (bytes; at block 1 when nothing
    fits); block; cache (every block's factors kept); flops; calls (jitted calls); rows (per
    leaf); program.
    """

    method: str
    seconds: float
    peak: float
    block: int | None
    cache: bool
    flops: float
    calls: int
    rows: tuple[LeafCost, ...]
    program: Program


@dataclasses.dataclass(frozen=True)
class MethodCost:
    """What one method costs, as functions of the tile side b (examples).

    Per pair of examples ``pair_flops`` (contraction) and ``pair_tmp`` (temporary elements);
    per example evaluated ``example_flops`` (its factors) and ``example_bytes`` (factors held),
    plus ``transient`` bytes (VJP residuals and cotangents) while a block is evaluated;
    ``extra(b)`` more bytes a tile needs (streamed chunks). Novak, Sohl-Dickstein & Schoenholz,
    ICML 2022, arXiv:2206.08720 (the FLOP counts); memory and traffic terms are common practice.
    """

    method: str
    program: Program
    rows: tuple[LeafCost, ...]
    pair_flops: float
    example_flops: float
    example_bytes: float
    transient: float
    pair_tmp: float
    extra: object = None  # Callable[[int], float] | None

    def peak(self, b: int, s: _Shape) -> float:
        """Bytes of one tile's working set: the blocks' factors (one block for K(X, X) in a
        single tile, whose row is its column), transients, Gram temporaries and the tile."""
        sets = 1 if s.symmetric and b >= s.n1 else 2
        held = (sets * b * self.example_bytes + b * self.transient
                + b * b * (self.pair_tmp + s.tile_elems) * s.itemsize)
        return held + 2 * b * b * s.tile_elems * s.itemsize + (self.extra(b) if self.extra else 0)

    def price(self, s: _Shape, budget: int, rates: Rates, *, block: int | None = None,
              single_device: bool = True) -> Priced:
        """The cost at the largest block that fits ``budget`` (or at ``block``)."""
        b = _blocks(s.n1, s.n2, lambda v: self.peak(v, s), budget) if block is None else block
        if b is None:
            return Priced(self.method, math.inf, self.peak(1, s), None, False, 0.0, 0,
                          self.rows, self.program)
        rows_b = math.ceil(s.n1 / b)
        cols_b = rows_b if s.symmetric else math.ceil(s.n2 / b)
        total_factor_bytes = (s.n1 + (0 if s.symmetric else s.n2)) * self.example_bytes
        cache = total_factor_bytes + self.peak(b, s) <= budget
        evaluations = (s.n1 + (0 if s.symmetric else s.n2)) if cache else (
            s.n1 + (rows_b * s.n1 / 2 if s.symmetric else rows_b * s.n2))
        flops = s.pairs * self.pair_flops + evaluations * self.example_flops
        # Memory traffic: factors and residuals written once per evaluation and read by every
        # tile that uses them; Gram temporaries written and read once per pair.
        tiles = rows_b * (1 if s.symmetric else cols_b)
        moved = (evaluations * (self.example_bytes + self.transient)
                 + tiles * 2 * b * self.example_bytes + 2 * s.pairs * self.pair_tmp * s.itemsize)
        calls = _calls(s, b, cache, single_device)
        seconds = flops / rates.matmul + moved / rates.stream + calls * rates.call
        peak = self.peak(b, s) + (total_factor_bytes if cache else 0)
        return Priced(self.method, seconds, peak, b, cache, flops, calls, self.rows,
                      self.program)


def _calls(s: _Shape, b: int, cache: bool, single_device: bool) -> int:
    """Jitted calls of a run (`run.iter_tiles`): one when the kernel is a single tile on one
    device; else one tile step per tile plus the factor steps: K(X, X) computes each row
    block's factors once when they are cached, else once per tile (the diagonal tile reuses its
    row's); K(X1, X2) computes each row block's once and each column block's once when cached,
    else once per tile."""
    rows_b = math.ceil(s.n1 / b)
    cols_b = rows_b if s.symmetric else math.ceil(s.n2 / b)
    tiles = rows_b * (rows_b + 1) // 2 if s.symmetric else rows_b * cols_b
    if tiles == 1 and single_device:
        return 1
    if s.symmetric:
        factor_steps = rows_b if cache else tiles
    else:
        factor_steps = rows_b + (cols_b if cache else tiles)
    return tiles + factor_steps


@dataclasses.dataclass(frozen=True)
class _Context:
    """What every method's pricing reads from the traced request."""

    req: Request
    outputs: str
    base: Program
    names: list
    shapes: list
    sizes: list
    fwd: float
    acts: float
    analysis: object
    basis: int
    shape: _Shape


def _jacobian_cost(ctx: _Context, budget: int, rates: Rates) -> MethodCost:
    """Jacobian contraction: every leaf dense from the network-wide VJP."""
    a, isz, outputs = ctx.basis, ctx.shape.itemsize, ctx.outputs
    rows = tuple(LeafCost(name, shape, "fallback", "jacobian",
                          ctx.shape.pairs * C.dense_pair_flops(a, p, outputs), a * p * isz)
                 for name, shape, p in zip(ctx.names, ctx.shapes, ctx.sizes, strict=True))
    prog = dataclasses.replace(ctx.base, kinds=tuple("dense" for _ in ctx.names))
    return MethodCost("jacobian", prog, rows,
                      sum(C.dense_pair_flops(a, p, outputs) for p in ctx.sizes),
                      _backprop(ctx) + _loop_flops(ctx, rates), a * sum(ctx.sizes) * isz,
                      _transient(ctx), 0.0)


def _structured_cost(ctx: _Context, budget: int, rates: Rates) -> MethodCost:
    """Structured derivatives: per leaf factored, dense or streamed from its consumer, else the
    fallback Jacobian (`_structured_rows`)."""
    s, a, isz, analysis = ctx.shape, ctx.basis, ctx.shape.itemsize, ctx.analysis
    # Each example's dense derivative is written once and read by every tile it is in:
    # per pair, about 2/(block side) reads plus the write shared by the pairs of its row.
    pricing = _Pricing(rate=rates.matmul, flops_per_byte=rates.matmul / rates.stream,
                       side=min(s.n1, s.n2, 256),
                       examples_per_pair=(s.n1 + (0 if s.symmetric else s.n2)) / s.pairs,
                       rates=rates)
    rows, kinds, folds = _structured_rows(analysis, ctx.req.selection, ctx.names, ctx.shapes,
                                          ctx.sizes, a, isz, ctx.outputs, s.pairs, pricing)
    example_flops = _backprop(ctx) + sum(
        2.0 * a * sum(_use_local_flops(u) for u in analysis.uses[k])
        for k, kind in enumerate(kinds) if kind == "dense" and analysis.uses[k]
    )
    pair_tmp = max([_factored_tmp(analysis.uses[k][0], a, ctx.outputs)
                    for k, kind in enumerate(kinds) if kind == "factored"] + [0.0])
    # A streamed leaf holds two chunks of dense derivatives (both sides) while contracting:
    # for a block of b examples min(all its input features, max(16 of them,
    # STREAM_CHUNK_BYTES)) — the chunk `contract.stream_chunk` picks.
    streamed = [(a * bsz * r * isz, c) for k, kind in enumerate(kinds) if kind == "streamed"
                for bsz, _, c, r in [st.factored_sizes(analysis.uses[k][0])]]

    def chunks(b):
        return max([2.0 * min(b * q * c, max(b * q * 16, STREAM_CHUNK_BYTES))
                    for q, c in streamed] + [0.0])

    prog = dataclasses.replace(ctx.base, method="structured", kinds=tuple(kinds),
                               analysis=analysis, folds=folds)
    return MethodCost("structured", prog, tuple(rows), sum(r.flops for r in rows) / s.pairs,
                      example_flops, sum(r.bytes_per_example for r in rows), _transient(ctx),
                      pair_tmp, chunks if streamed else None)


def _jvp_cost(ctx: _Context, budget: int, rates: Rates) -> MethodCost:
    """NTK-vector products: per pair, one JVP per output direction (the basis chunk sized to
    the budget)."""
    isz, req = ctx.shape.itemsize, ctx.req
    p_total = sum(ctx.sizes)
    chunk = int(max(1, min(64, budget // max(1, 8 * p_total * isz))))
    rows = tuple(LeafCost(n, s, "—", "jvp", 0.0, 0.0)
                 for n, s in zip(ctx.names, ctx.shapes, strict=True))
    prog = dataclasses.replace(ctx.base, method="jvp", jvp_chunk=chunk,
                               kinds=tuple("dense" for _ in ctx.names))
    groups = len(req.selection.group_names)
    x_bytes = int(np.prod(req.x1.shape[1:], dtype=np.int64)) * req.x1.dtype.itemsize
    return MethodCost("jvp", prog, rows, ctx.basis * 3.0 * ctx.fwd * groups,
                      ctx.basis * 3.0 * ctx.fwd + _loop_flops(ctx, rates), x_bytes,
                      chunk * (p_total * isz * 3 + ctx.acts * isz * 2), 0.0)


def _backprop(ctx: _Context) -> float:
    return ctx.fwd + 2.0 * ctx.basis * ctx.fwd  # one forward, A backward passes


def _loop_flops(ctx: _Context, rates: Rates) -> float:
    """A reverse pass of the whole network through a scan adds each loop-constant leaf's
    cotangent into an accumulator at every step (`structured.loop_accumulation`): memory-bound,
    priced at `Rates.accumulation` in matmul-FLOP equivalents, per example. Paid by the methods
    that run that pass (jacobian, jvp)."""
    loops = ctx.basis * sum(st.loop_accumulation(ctx.analysis.uses[k], p)
                            for k, p in enumerate(ctx.sizes))
    return loops * rates.matmul / rates.accumulation if loops else 0.0


def _transient(ctx: _Context) -> float:
    return ctx.basis * ctx.acts * ctx.shape.itemsize  # VJP residuals and cotangents, per example


@dataclasses.dataclass(frozen=True)
class Method:
    """One way of computing the kernel, whole: its two compiled steps (`program.Steps`: per-block
    factors, and the tile from two blocks' factors) and its pricing, ``price(context,
    per-device budget, rates) → MethodCost``. Novak, Sohl-Dickstein & Schoenholz, ICML 2022,
    arXiv:2206.08720 (the three methods)."""

    name: str
    steps: Steps
    price: Callable[[_Context, int, Rates], MethodCost]


#: Every method by name ("jacobian", "structured", "jvp").
BY_METHOD = {name: Method(name, STEPS[name], price) for name, price in (
    ("jacobian", _jacobian_cost), ("structured", _structured_cost), ("jvp", _jvp_cost))}


def context(req: Request, outputs: str) -> _Context:
    """What every method's pricing reads from ``req`` in mode ``outputs``: sizes, the traced
    per-example function (`traced`) and its structured analysis."""
    side = sides(req)
    n1, n2, sym = side.n1, side.n2, side.symmetric
    o = req.num_outputs
    sel = req.selection
    names = [sel.names[i] for i in sel.indices]
    shapes = [tuple(np.shape(d)) for d in req.diff]
    base = Program(req.net.call, jax.tree_util.tree_structure(req.params), sel, outputs, o,
                   "jacobian", ("dense",) * len(req.diff))
    fwd, acts, analysis = traced(req, base)
    shape = _Shape(n1, n2, sym, n1 * (n1 + 1) / 2 if sym else n1 * n2,
                   math.prod(tile_shape(outputs, 1, 1, o)), C.itemsize(req.dtype))
    return _Context(req, outputs, base, names, shapes,
                    [int(np.prod(s, dtype=np.int64)) for s in shapes], fwd, acts, analysis,
                    basis_size(outputs, o), shape)


def candidates(ctx: _Context, method: str) -> list[str]:
    """The methods to price for ``method`` ("auto": every one the model allows), after refusing
    a kernel that would be zero or that ``method`` cannot compute."""
    _check_differentiable(ctx.req, ctx.analysis, ctx.names, method)
    if method != "auto":
        return [method]
    costed = ["jacobian", "structured", "jvp"]
    if uses_custom_vjp(ctx.analysis.closed.jaxpr):
        costed.remove("jvp")  # forward mode is undefined through jax.custom_vjp
    return costed


def choose(ctx: _Context, methods: list[str], *, memory, budget: int, rates: Rates,
           single_device: bool, block: int | None = None) -> tuple[Priced, dict]:
    """(the cheapest of ``methods`` priced at the largest tile that fits ``budget`` (or at
    ``block``), {method: estimated seconds}); MemoryError when not even a 1×1 tile fits."""
    priced = {m: BY_METHOD[m].price(ctx, budget, rates).price(
        ctx.shape, budget, rates, single_device=single_device) for m in methods}
    feasible = {m: p for m, p in priced.items() if p.block is not None}
    if not feasible:
        smallest = min(p.peak for p in priced.values())
        raise MemoryError(
            f"`memory`={memory!r} ({C.format_bytes(budget)}) is too small for even one 1×1 tile "
            f"of this kernel: the smallest budget that works is about "
            f"{C.format_bytes(smallest * 1.25)}. Raise `memory` or choose outputs='trace'."
        )
    best = min(feasible.values(), key=lambda p: p.seconds)
    if block is not None:  # a store's tile size, at most the one that fits
        best = BY_METHOD[best.method].price(ctx, budget, rates).price(
            ctx.shape, budget, rates, block=block, single_device=single_device)
    return best, {m: p.seconds for m, p in priced.items()}


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
    if method == "jvp" and uses_custom_vjp(analysis.closed.jaxpr):
        raise ValueError(
            "`method`='jvp' needs forward-mode derivatives, but the model uses a jax.custom_vjp "
            "function, which has none: use method='jacobian' or 'structured' (or 'auto')."
        )


def uses_custom_vjp(jaxpr) -> bool:
    """Whether ``jaxpr`` (or any jaxpr nested in its equations) calls a jax.custom_vjp rule."""
    for eqn in jaxpr.eqns:
        if eqn.primitive.name.startswith("custom_vjp"):
            return True
        for value in eqn.params.values():
            for sub in value if isinstance(value, tuple | list) else (value,):
                inner = getattr(sub, "jaxpr", sub)
                if hasattr(inner, "eqns") and uses_custom_vjp(inner):
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
    written, per pair of examples; rates: the machine `Rates` (formation rates).
    """

    rate: float
    flops_per_byte: float
    side: int
    examples_per_pair: float
    rates: Rates


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
    folds = fold_candidates(analysis.bias_of, sel.groups)
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
                    / pricing.rates.formation_at(t))
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
        kinds[k] = choice
        rows[k] = LeafCost(name, shape, analysis.rule(k), choice, pairs * pf, eb)
    folds, kinds = settle_folds(folds, kinds)
    for w, j in enumerate(folds):
        if j is not None:
            rows[j] = LeafCost(names[j], shapes[j], analysis.rule(j), "folded", 0.0, 0.0,
                               f"input 1 of {names[w]}'s factors")
    return rows, list(kinds), folds


def _use_local_flops(u: st.Use) -> float:
    """FLOPs of one consumer's VJP with respect to its parameter operand (per direction), over
    every step of its enclosing scans: its rule's `local_flops`."""
    return u.rule.local_flops(u)
