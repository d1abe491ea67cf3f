"""Structured derivatives: the per-example derivative of each parameter leaf from the layer that
consumes it, without the network-wide Jacobian.

The per-example function is traced to a jaxpr. For every differentiated leaf we find the
primitive(s) that consume it, looking through structure-preserving ops applied to the leaf first
(reshape, transpose, convert, squeeze, expand_dims, broadcast). A chain that keeps every entry
once (a permutation, relabelling or negation, or a broadcast that only inserts unit dims, as
``x @ w + b`` broadcasts b to (1, R)) preserves inner products, so a leaf behind it can still be
factored or folded as a bias (`Use.permuting`). A *probe*, an added zero, is placed
on the output y of each consuming primitive, and the primitive's other operands h are captured on
the forward pass. One VJP per output direction then gives the cotangents g = ∂f_a/∂y of every probe
at once, and the leaf's derivative follows from the consumer alone: a VJP of
``w ↦ primitive(h, chain(w))`` at g (rule outputs are exact for any consumer linear in w). For a
factorable rule (dot_general, conv_general_dilated, a row gather) the derivative can also stay
factored as (h, g), whose kernel contribution costs activations² rather than parameters (see
`contract`).

Rules live in `rules`, one file each, registered by primitive: ``"dot"`` (dot_general),
``"conv"`` (conv_general_dilated, any strides, padding, dilation, feature groups), ``"embed"``
(a gather of whole rows), ``"scale"`` (elementwise mul), ``"bias"`` (add, or sub on either
side), ``"concat"`` (a leaf concatenated with activations, e.g. a class token); a leaf with none
is ``"fallback"`` (other gathers, nonlinear use, a leaf used as both operands, a scan carry, a
leaf passed into a custom_jvp/custom_vjp function, whose custom rule need not be its body's
derivative): the Jacobian contraction for that leaf only, from the same VJP. A leaf with several
uses is structured when every use has a rule; its derivative is the sum over uses. The walk
enters jit/pjit and rematerialization (jax.checkpoint, nn.remat) bodies, and the pass-throughs
include rev (a flipped kernel), neg and static slices (``wpe[:T]``).

Scans: a leaf closed over by a scan body (an RNN cell's weights) is applied at every step, and
its derivative is the sum over steps, ``∂f/∂W = Σ_s Σ_t h_s,t ⊗ g_s,t``, so the steps join the
positions T exactly as the positions of a convolution do. A stacked leaf sliced by the scan (an
nn.scan over layers) is one layer per step: the steps join the batch dims B, whose weights are
separate. Probes and captures then carry a leading step axis, sliced per step (`_eval_scan`).

Reference: Novak, Sohl-Dickstein & Schoenholz, "Fast Finite Width Neural Tangent Kernel",
ICML 2022, arXiv:2206.08720 (structured derivatives).
"""

from __future__ import annotations

import dataclasses
import math

import jax
import jax.numpy as jnp
from jax import lax
from jax.extend import core as jcore

from . import rules
from .rules import factorable as factorable
from .rules.bias import fold_biases

PASS_THROUGH = frozenset(
    {"reshape", "transpose", "convert_element_type", "squeeze", "expand_dims",
     "broadcast_in_dim", "copy", "copy_p", "rev", "neg", "slice"}
)
# Pass-throughs that permute, relabel or negate entries: inner products survive them. A
# broadcast_in_dim survives too when it only inserts unit dims (`_keeps_entries`).
PERMUTING = PASS_THROUGH - {"broadcast_in_dim", "slice"}
# Calls whose body is evaluated as written: jit, and rematerialization (jax.checkpoint,
# nn.remat, nnx.remat), which only changes what is stored for the backward pass.
CALLS = frozenset({"jit", "pjit", "closed_call", "remat2", "checkpoint"})
# Custom derivative rules: their body need not be their derivative (a straight-through
# estimator is not), so a parameter passed into one falls back to the exact Jacobian.
CUSTOM = ("custom_jvp_call", "custom_vjp_call")


@dataclasses.dataclass(frozen=True, eq=False)
class Use:
    """One consumption of a differentiated leaf by a primitive with a rule."""

    leaf: int  # position among the differentiated leaves
    path: tuple[int, ...]  # equation indices through nested calls
    operand: int  # which operand of the primitive is the (transformed) leaf
    chain: tuple  # ((primitive, params), ...) applied to the leaf before use
    rule: rules.Rule
    primitive: object
    params: dict
    in_avals: tuple  # abstract values of the primitive's operands (per example)
    out_aval: object
    in_vars: tuple = ()  # the jaxpr variables of the operands and the output
    out_var: object = None
    # Enclosing scans, outermost first: (length, "sum") where the leaf is a loop constant (the
    # same weight at every step), (length, "slice") where the scan slices a stacked leaf (one
    # layer per step). Operands and cotangents carry one leading axis per scan.
    scans: tuple[tuple[int, str], ...] = ()
    # Whether the chain keeps every entry of the leaf exactly once (permutes, relabels, negates
    # or inserts unit dims: `_keeps_entries` of each step), so inner products survive it.
    permuting: bool = True

    @property
    def steps(self) -> tuple[int, ...]:
        return tuple(n for n, _ in self.scans)

    @property
    def repeats(self) -> int:
        """How many times the consumer runs per example (the product of the scan lengths)."""
        return math.prod(self.steps)


@dataclasses.dataclass(frozen=True, eq=False)
class Analysis:
    """The traced per-example function; per differentiated leaf, its uses or why it fell back."""

    closed: object  # ClosedJaxpr of f(diff_leaves, other_leaves, state_leaves, x) -> (O,)
    num_diff: int
    uses: tuple[tuple[Use, ...], ...]  # per differentiated leaf; empty for fallback/unused
    fallback: tuple[str | None, ...]  # per leaf: reason for fallback, or None
    unused: tuple[bool, ...]
    bias_of: tuple[int | None, ...] = ()  # per leaf: a bias leaf folded into its factors

    def rule(self, leaf: int) -> str:
        if self.unused[leaf]:
            return "unused"
        if self.fallback[leaf] is not None:
            return "fallback"
        names = sorted({u.rule.name for u in self.uses[leaf]})
        n = len(self.uses[leaf])
        return "+".join(names) + (f"×{n}" if n > 1 else "")


def _keeps_entries(eqn) -> bool:
    """Whether a pass-through keeps every entry of its operand exactly once: a permuting one, or
    a broadcast_in_dim to as many elements as it reads (it only inserts unit dims: a reshape)."""
    name = eqn.primitive.name
    if name == "broadcast_in_dim":
        return math.prod(eqn.outvars[0].aval.shape) == math.prod(eqn.invars[0].aval.shape)
    return name in PERMUTING


def _scan_operand(params, pos: int) -> str | None:
    """How a scan uses its operand ``pos``: "sum" for a loop constant, "slice" for a scanned
    input (one slice per step), None for a carry."""
    nc, nk = params["num_consts"], params["num_carry"]
    if pos < nc:
        return "sum"
    return None if pos < nc + nk else "slice"


def _sub_jaxpr(eqn):
    p = eqn.params
    if "jaxpr" in p:
        j = p["jaxpr"]
    elif "call_jaxpr" in p:
        j = p["call_jaxpr"]
    else:
        return None
    return j if isinstance(j, jcore.ClosedJaxpr) else jcore.ClosedJaxpr(j, ())


def analyze(closed, num_diff: int) -> Analysis:
    """Find the consumers of the first ``num_diff`` inputs of ``closed``."""
    uses: list[list[Use]] = [[] for _ in range(num_diff)]
    fallback: list[str | None] = [None] * num_diff
    touched = [False] * num_diff

    def fail(leaf, why):
        touched[leaf] = True
        if fallback[leaf] is None:
            fallback[leaf] = why

    def walk(jaxpr, derived: dict, prefix: tuple[int, ...]):
        # derived: var -> (leaf, chain, enclosing scans, whether the chain keeps every entry)
        for i, eqn in enumerate(jaxpr.eqns):
            ins = [derived.get(v) if isinstance(v, jcore.Var) else None for v in eqn.invars]
            hits = [(k, d) for k, d in enumerate(ins) if d is not None]
            if not hits:
                continue
            name = eqn.primitive.name
            leaves = {d[0] for _, d in hits}
            if name in PASS_THROUGH and len(hits) == 1 and hits[0][0] == 0:
                leaf, chain, scans, keeps = hits[0][1]
                derived[eqn.outvars[0]] = (
                    leaf, chain + ((eqn.primitive, dict(eqn.params)),), scans,
                    keeps and _keeps_entries(eqn))
                continue
            rule = rules.rule_for(eqn, hits[0][0]) if len(hits) == 1 else None
            if rule is not None:
                k, (leaf, chain, scans, keeps) = hits[0]
                touched[leaf] = True
                uses[leaf].append(
                    Use(leaf, prefix + (i,), k, chain, rule, eqn.primitive,
                        dict(eqn.params), tuple(v.aval for v in eqn.invars), eqn.outvars[0].aval,
                        tuple(eqn.invars), eqn.outvars[0], scans, keeps)
                )
                continue
            sub = _sub_jaxpr(eqn) if name in CALLS or name == "scan" else None
            if sub is not None:
                inner = {}
                for pos, (v_in, d) in enumerate(zip(sub.jaxpr.invars, ins, strict=True)):
                    if d is None:
                        continue
                    if d[1]:
                        # A transformed leaf entering a call: the chain would cross it.
                        fail(d[0], f"transformed parameter passed into `{name}`")
                    elif name != "scan":
                        inner[v_in] = d
                    else:
                        kind = _scan_operand(eqn.params, pos)
                        if kind is None:
                            fail(d[0], "parameter is a `scan` carry")
                        else:
                            inner[v_in] = (d[0], (), d[2] + ((eqn.params["length"], kind),),
                                           True)
                walk(sub.jaxpr, inner, prefix + (i,))
                for v_out in sub.jaxpr.outvars:
                    if isinstance(v_out, jcore.Var) and v_out in inner:
                        fail(inner[v_out][0], f"parameter returned from `{name}`")
                continue
            for leaf in leaves:
                if len(hits) > 1 and name in rules.RULES:
                    fail(leaf, f"`{name}` with the parameter in more than one operand")
                elif name in CUSTOM:
                    fail(leaf, f"passed into `{name}`, whose custom derivative rule need not "
                               "be its body's derivative")
                else:
                    fail(leaf, f"consumed by `{name}`")
        for v in jaxpr.outvars:
            if isinstance(v, jcore.Var) and v in derived:
                fail(derived[v][0], "parameter is an output")

    walk(closed.jaxpr,
         {v: (k, (), (), True) for k, v in enumerate(closed.jaxpr.invars[:num_diff])}, ())
    final_uses = tuple(tuple(u) if fallback[k] is None else () for k, u in enumerate(uses))
    unused = tuple(not touched[k] for k in range(num_diff))
    return Analysis(closed, num_diff, final_uses, tuple(fallback), unused,
                    fold_biases(final_uses))


# -- evaluation with probes --------------------------------------------------------------------


def bind(prim, params: dict, *args):
    """``prim.bind`` with the bind parameters of an equation (both JAX conventions)."""
    bp = prim.get_bind_params(params)
    if isinstance(bp, tuple):
        subfuns, bp = bp
        return prim.bind(*subfuns, *args, **bp)
    return prim.bind(*args, **bp)


def _eval(jaxpr, consts, args, probes: dict, captures: dict, prefix: tuple[int, ...],
          skip: dict):
    """Evaluate ``jaxpr`` adding ``probes[path]`` to the output of the equation at ``path`` and
    recording its operands in ``captures[path]`` (None for operand ``skip[path]``, the leaf
    itself, which is never needed)."""
    env = {}

    def read(v):
        return v.val if isinstance(v, jcore.Literal) else env[v]

    for v, c in zip(jaxpr.constvars, consts, strict=True):
        env[v] = c
    for v, a in zip(jaxpr.invars, args, strict=True):
        env[v] = a
    probed_prefixes = {p[: len(prefix) + 1] for p in probes}
    for i, eqn in enumerate(jaxpr.eqns):
        path = prefix + (i,)
        invals = [read(v) for v in eqn.invars]
        if path in probes:
            out = bind(eqn.primitive, eqn.params, *invals)
            captures[path] = [None if k == skip.get(path) else v for k, v in enumerate(invals)]
            outs = [out + probes[path]]
        elif path in probed_prefixes and len(path) < max(len(p) for p in probes):
            if eqn.primitive.name == "scan":
                outs = _eval_scan(eqn.params, invals, probes, captures, path, skip)
            else:
                sub = _sub_jaxpr(eqn)
                outs = _eval(sub.jaxpr, sub.consts, invals, probes, captures, path, skip)
        else:
            with eqn.ctx.manager:
                out = bind(eqn.primitive, eqn.params, *invals)
            outs = out if eqn.primitive.multiple_results else [out]
        for v, o in zip(eqn.outvars, outs, strict=True):
            if not isinstance(v, jcore.DropVar):
                env[v] = o
    return [read(v) for v in jaxpr.outvars]


def _eval_scan(params, invals, probes: dict, captures: dict, path: tuple[int, ...], skip: dict):
    """A scan with probes inside its body: each probe (and capture) has a leading step axis,
    sliced per step like the scan's own inputs."""
    body = params["jaxpr"]
    nc, nk = params["num_consts"], params["num_carry"]
    consts, init, xs = invals[:nc], invals[nc:nc + nk], invals[nc + nk:]
    inside = sorted(q for q in probes if q[: len(path)] == path)

    def step(carry, sliced):
        xs_t, probes_t = sliced
        caps: dict = {}
        outs = _eval(body.jaxpr, body.consts, [*consts, *carry, *xs_t],
                     dict(zip(inside, probes_t, strict=True)), caps, path, skip)
        return outs[:nk], (outs[nk:], [caps[q] for q in inside])

    carry, (ys, caps) = lax.scan(step, list(init), (list(xs), [probes[q] for q in inside]),
                                 length=params["length"], reverse=params["reverse"],
                                 unroll=params["unroll"])
    captures.update(zip(inside, caps, strict=True))
    return [*carry, *ys]


def probe_shape(use: Use) -> tuple[int, ...]:
    """Shape of the probe on a consumer's output: one leading axis per enclosing scan."""
    return (*use.steps, *use.out_aval.shape)


def eval_with_probes(analysis: Analysis, args, probes: dict):
    """Evaluate the traced function; returns (outputs (O,), {path: operands of the consumer},
    the leaf operand itself left out as None)."""
    captures: dict = {}
    skip = {u.path: u.operand for us in analysis.uses for u in us}
    (out,) = _eval(analysis.closed.jaxpr, analysis.closed.consts, args, probes, captures, (),
                   skip)
    return out, captures


# -- per-leaf derivatives from (operands, cotangent) -------------------------------------------


def _apply_chain(w, chain):
    for prim, params in chain:
        w = bind(prim, params, w)
    return w


def local_vjp(uses: tuple[Use, ...], leaf_value, operands: list, cotangents: list):
    """Derivative of the outputs w.r.t. one leaf, summed over its uses: one VJP of the consumers.

    operands[u]: the consumer's operands of use u; cotangents[u]: (A, *steps, *y.shape), one
    step axis per enclosing scan (a loop-constant leaf's derivative sums over them, a sliced
    leaf's stacks them). Returns (A, *leaf.shape).
    """

    def consumers(w):
        outs = []
        for u, ops in zip(uses, operands, strict=True):
            def one(w_t, ops_t, u=u):
                ops_t = list(ops_t)
                ops_t[u.operand] = _apply_chain(w_t, u.chain)
                return bind(u.primitive, u.params, *ops_t)

            for _, mode in reversed(u.scans):  # one step axis per scan: a sum or a slice of w
                one = jax.vmap(one, in_axes=(0 if mode == "slice" else None, 0))
            outs.append(one(w, ops))
        return outs

    _, vjp = jax.vjp(consumers, leaf_value)
    return jax.vmap(lambda *g: vjp(list(g))[0])(*cotangents)


def factors_of(use: Use, operands, cot):
    """(h, g) of a factorable use: its rule's `factors`, (h (B, T, C), g (A, B, T, R)).

    Inside a scan (operands (S, ...), cot (A, S, ...)) a loop-constant weight is applied at every
    step, so its derivative is a sum over steps like the positions of a convolution: the steps
    join the positions T. A stacked weight sliced by the scan is one layer per step: the steps
    join the batch dims B, whose weights are separate (``J[(S, B, C, R)]``, block by block).
    """
    if not use.scans:
        return use.rule.factors(use, operands, cot)
    inner = dataclasses.replace(use, scans=use.scans[1:])
    h, g = jax.vmap(lambda ops, c: factors_of(inner, ops, c), in_axes=(0, 1))(operands, cot)
    s, b = h.shape[0], h.shape[1]  # h (S, B, T[, C]); g (S, A, B, T, R)
    if use.scans[0][1] == "slice":
        return h.reshape(s * b, *h.shape[2:]), jnp.swapaxes(g, 0, 1).reshape(
            g.shape[1], s * b, *g.shape[3:])
    h = jnp.swapaxes(h, 0, 1).reshape(b, s * h.shape[2], *h.shape[3:])
    g = jnp.transpose(g, (1, 2, 0, 3, 4)).reshape(g.shape[1], b, s * g.shape[3], g.shape[4])
    return h, g


def factored_sizes(use: Use) -> tuple[int, int, int, int]:
    """(B, T, C, R) of a factorable use, from the abstract shapes alone (an embedding: C = rows);
    the steps of an enclosing scan multiply T (a loop-constant weight) or B (a sliced one)."""
    b, t, c, r = use.rule.step_sizes(use)
    for n, mode in use.scans:
        b, t = (b * n, t) if mode == "slice" else (b, t * n)
    return b, t, c, r


def loop_accumulation(uses: tuple[Use, ...], size: int) -> int:
    """Entries of a leaf's cotangent accumulated by one reverse pass through the whole network
    (per example and output direction): a leaf closed over by a scan is a loop constant, and
    the transposed scan adds its cotangent into an accumulator at every step, S·P entries
    (a stacked leaf sliced by a scan writes each step's slice once; a leaf outside any scan is
    written once). 0 when no use is inside a scan that sums over steps."""
    total = 0
    for u in uses:
        summed = math.prod(n for n, mode in u.scans if mode == "sum")
        if summed > 1:
            total += size // math.prod(n for n, mode in u.scans if mode == "slice") * summed
    return total


def trace_example(fn, args_spec):
    """ClosedJaxpr of ``fn`` at abstract arguments (no compute)."""
    return jax.make_jaxpr(fn)(*args_spec)
