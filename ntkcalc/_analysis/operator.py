"""The empirical NTK as a matrix-free operator, for kernels too large to store.

For a network f(θ, x) with Jacobian ``J = ∂f/∂θ`` over the N examples, the kernel is
``Θ = J Jᵀ`` (Jacot, Gabriel & Hongler, NeurIPS 2018, arXiv:1806.07572). Its product with a
vector needs no kernel entries: ``Θ v = J (Jᵀ v)``, accumulated over the data in batches
(`ntkcalc._engine.products`: by one VJP and one JVP, or from the structured per-example
factors). Memory is one parameter-sized vector per probe (plus the factors when cached), never N².
"""

from __future__ import annotations

import contextlib
import dataclasses
import functools
import math
import warnings

import jax
import numpy as np
import scipy.sparse.linalg as spla

from .._engine import cost as C
from .._engine import products
from .._engine import structured as st
from .._engine.checks import check_inputs
from .._engine.options import (
    OPERATOR_OUTPUTS,
    PRODUCT_METHODS,
    OperatorOutputs,
    ProductMethod,
    basis_size,
    check_choice,
)
from .._engine.planner import prepare, uses_custom_vjp
from .._engine.program import Program, compiled
from .._engine.select import ParamFilter
from .._kernel import Precision, precision_scope
from .._tiles.plan import plan_request
from . import _checks
from ._batches import batch_slices, pad_rows

# Parameter-space vectors of one group of probes (S·P values) are kept within this share of the
# memory budget: a matmat with more columns runs them in several groups.
PROBE_SHARE = 0.25


def _batch_fn(program: Program, other, state):
    """``f(diff, xb)`` (b, O): the model on a whole batch (examples do not interact: `prepare`
    checked), flattened per example."""
    def f(diff, xb):
        return program.call(program.merge(diff, other), state, xb).reshape(xb.shape[0], -1)

    return f


@functools.lru_cache(maxsize=64)
def _product_steps(program: Program):
    """Jitted ``(pull, push)`` by differentiation for one program (Nets sharing ``call`` — a
    checkpoint via ``net.replace(params=...)`` — share them): pull maps a block of the operator's
    input to Σ over the batch of ``Jᵀ c`` per probe, push maps those to the result block."""
    a_dim = basis_size(program.outputs, program.num_outputs)

    @jax.jit
    def pull(diff, other, state, xb, v_b):
        f, basis = _batch_fn(program, other, state), program.basis(diff[0].dtype)
        probes = products.to_outputs(products.lift(v_b, program.outputs, a_dim), basis)
        return jax.vmap(lambda c: products.pull(f, diff, xb, c))(probes)

    @jax.jit
    def push(diff, other, state, xb, tangents):
        f, basis = _batch_fn(program, other, state), program.basis(diff[0].dtype)
        outs = jax.vmap(lambda t: products.push(f, diff, xb, t)[0])(tangents)  # (S, b, O)
        return products.lower(products.to_directions(outs, basis), program.outputs, a_dim)

    return pull, push


@functools.lru_cache(maxsize=64)
def _factor_steps(program: Program):
    """Jitted ``(factors, pull, push)`` from the structured factors of ``program``."""
    a_dim = basis_size(program.outputs, program.num_outputs)
    an = program.analysis
    rows = tuple(an.uses[k][0].rule.looked_up_rows(an.uses[k][0])
                 if kind in ("factored", "streamed") else 0
                 for k, kind in enumerate(program.kinds))

    own = program.outputs == "trace"  # Σ_a J_a J_aᵀ: each probe keeps its own output a

    @jax.jit
    def pull(reps, v_b):  # v_b in the compute dtype
        cot = v_b.T if own else products.lift(v_b, program.outputs, a_dim)
        return products.factor_pull(reps, program.kinds, cot, rows, own=own)

    @jax.jit
    def push(reps, ws):
        y = products.factor_push(reps, program.kinds, ws, rows, own=own)
        return y.sum(0).T if own else products.lower(y, program.outputs, a_dim)

    return compiled(program)[0], pull, push


def representations(plan, *, itemsize: int) -> tuple[Program, float]:
    """The program the "factors" path runs, and its factor bytes per example.

    Each leaf keeps the representation the planner chose for the kernel, except that a
    factored (or streamed) layer is formed dense once, from its factors, when its dense
    derivative (A·B·C·R values per example) is no larger than its factors (B·T·C + A·B·T·R):
    then every product is also T× cheaper (2·A·B·C·R against 2·A·B·T·C·R FLOPs per example and
    direction), e.g. a convolution over T positions with few input channels. A dense layer of
    an MLP (T = 1) stays factored: C + A·R values against A·C·R."""
    program = plan.program
    an = program.analysis
    a = basis_size(program.outputs, program.num_outputs)
    kinds, total = list(program.kinds), 0.0
    for k, kind in enumerate(program.kinds):
        if kind not in ("factored", "streamed"):
            total += plan.leaves[k].bytes_per_example
            continue
        use = an.uses[k][0]
        bsz, t, c, r = st.factored_sizes(use)
        c += 1 if program.folds and program.folds[k] is not None else 0
        factors = bsz * t * use.rule.stored_inputs(c) + a * bsz * t * r
        dense = a * bsz * c * r
        kinds[k] = "dense" if dense <= factors else "factored"
        total += min(dense, factors) * itemsize
    return dataclasses.replace(program, kinds=tuple(kinds)), total


def _add(acc, w):
    return w if acc is None else jax.tree_util.tree_map(lambda a, b: a + b, acc, w)


class NTKOperator(spla.LinearOperator):
    """Matrix-free empirical NTK of a `Net` over fixed inputs; build it with `ntk_operator`.

    Attributes: ``net``, ``num_examples`` (N), ``num_outputs`` (O), ``outputs`` (the mode),
    ``method`` ("products" or "factors", as chosen), ``cached`` (whether the factors are kept
    between products), ``batch``, ``dtype_used`` (the compute dtype), ``matvecs`` (vectors
    applied so far).
    """

    def __init__(self, request, plan, *, outputs: str, method: str, batch: int, dtype, budget: int,
                 cache: bool):
        self.net, self.x, self.outputs = request.net, request.x1, outputs
        self.num_examples = int(request.x1.shape[0])
        self.num_outputs = int(request.num_outputs)
        self.method, self.cached = method, cache
        self.batch = min(batch, self.num_examples)
        self.dtype_used = request.dtype
        size = self.num_examples * (self.num_outputs if outputs == "full" else 1)
        super().__init__(dtype=np.dtype(np.float64), shape=(size, size))
        self.matvecs = 0
        self._req, self._precision, self._budget = request, dtype, budget
        self._program, _ = representations(plan, itemsize=request.dtype.itemsize)
        self._factors = None
        if method == "products":
            jvp_program = Program(plan.program.call, plan.program.treedef,
                                  plan.program.selection, outputs, self.num_outputs, "jvp",
                                  ("dense",) * len(request.diff))
            self._pull, self._push = _product_steps(jvp_program)
        else:
            self._factor_step, self._pull, self._push = _factor_steps(self._program)
        self._param_values = sum(int(np.prod(np.shape(d))) for d in request.diff)

    def _scope(self):
        """Every product runs in the operator's dtype and at matmul precision "highest"."""
        stack = contextlib.ExitStack()
        stack.enter_context(precision_scope(self._precision))
        stack.enter_context(jax.default_matmul_precision("highest"))
        return stack

    def _batches(self):
        """(start, stop, padded inputs) of each batch."""
        for start, stop in batch_slices(self.num_examples, self.batch):
            yield start, stop, pad_rows(self.x[start:stop], self.batch)

    def _reps(self):
        """Per batch, its factors: computed once and kept when ``cached``, else per call."""
        if self._factors is not None:
            return self._factors
        req = self._req
        reps = [self._factor_step(req.diff, req.other, req.state, xb)
                for _, _, xb in self._batches()]
        if self.cached:
            self._factors = reps
        return reps

    def _blocks(self, v: np.ndarray) -> np.ndarray:
        """``v`` (size, k) as per-example rows: (N, O, k) for "full", else (N, k)."""
        if self.outputs == "full":
            return v.reshape(self.num_examples, self.num_outputs, -1)
        return v.reshape(self.num_examples, -1)

    def _columns(self) -> int:
        """Columns per group of probes: their parameter-space vectors within `PROBE_SHARE` of
        the budget ("trace" probes each output separately: O vectors per column)."""
        per_column = (self.num_outputs if self.outputs == "trace" else 1) * self._param_values
        return max(1, int(PROBE_SHARE * self._budget // (per_column * self.dtype_used.itemsize)))

    def _matmat(self, v):
        v = np.asarray(v, dtype=self.dtype)
        k = v.shape[1]
        out = np.empty_like(v)
        step = self._columns()
        with self._scope():
            for c0 in range(0, k, step):
                out[:, c0:c0 + step] = self._apply(v[:, c0:c0 + step])
        self.matvecs += k
        return out

    def _apply(self, v: np.ndarray) -> np.ndarray:
        blocks = self._blocks(v)
        req = self._req
        if self.method == "factors":
            reps = self._reps()
            pulled = self._sweep(blocks, lambda i, xb, v_b: self._pull(reps[i], v_b))
            return self._gather(blocks, v.shape, lambda i, xb: self._push(reps[i], pulled))
        pulled = self._sweep(blocks, lambda i, xb, v_b: self._pull(
            req.diff, req.other, req.state, xb, v_b))
        return self._gather(blocks, v.shape, lambda i, xb: self._push(
            req.diff, req.other, req.state, xb, pulled))

    def _sweep(self, blocks, pull):
        """Σ over batches of ``pull(i, xb, v_b)`` (padded rows get a zero cotangent)."""
        acc = None
        for i, (start, stop, xb) in enumerate(self._batches()):
            v_b = np.zeros((self.batch, *blocks.shape[1:]), dtype=self.dtype_used)
            v_b[: stop - start] = blocks[start:stop]
            acc = _add(acc, pull(i, xb, v_b))
        return acc

    def _gather(self, blocks, shape, push):
        out = np.empty(blocks.shape)
        for i, (start, stop, xb) in enumerate(self._batches()):
            out[start:stop] = np.asarray(push(i, xb))[: stop - start]
        return out.reshape(shape)

    def _matvec(self, v):
        return self._matmat(np.asarray(v).reshape(-1, 1)).ravel()

    def _rmatvec(self, v):
        return self._matvec(v)

    def _adjoint(self):
        return self

    def __repr__(self) -> str:
        return (
            f"NTKOperator({self.outputs}, shape={self.shape}, N={self.num_examples}, "
            f"O={self.num_outputs}, method={self.method}"
            f"{' (factors cached)' if self.method == 'factors' and self.cached else ''}, "
            f"batch={self.batch}, dtype={self.dtype_used}, matvecs={self.matvecs})"
        )


def ntk_operator(
    net,
    x,
    *,
    outputs: OperatorOutputs = "trace",
    params: ParamFilter = None,
    dtype: Precision | None = None,
    batch: int = 256,
    method: ProductMethod = "auto",
    memory=None,
) -> NTKOperator:
    """The empirical NTK of ``net`` on inputs ``x`` as a ``scipy.sparse.linalg.LinearOperator``.

    Modes (J_a is the (N, P) Jacobian of output a; outputs with extra axes are flattened to O):

    - "trace": ``Σ_a J_a J_aᵀ``, (N, N): the kernel summed over the output diagonal. A product
      probes each output with ``v ⊗ e_a`` (O probes per vector).
    - "full": ``J Jᵀ`` over (example, output) pairs, (N·O, N·O), row index ``i·O + a``; one probe
      per vector.
    - "logit-sum": ``(Σ_a J_a)(Σ_a J_a)ᵀ``, (N, N): the kernel of the summed outputs.

    Each product ``Θ V = J (Jᵀ V)`` runs over the data in batches of ``batch`` examples (the last
    padded with zero cotangents, so each batch shape compiles once), ``method``:

    - ``"products"``: ``Jᵀ V`` by one VJP and ``J W`` by one JVP of the batch per probe (Novak,
      Sohl-Dickstein & Schoenholz, ICML 2022, arXiv:2206.08720); the network runs forward and
      backward in every product. Needs forward-mode derivatives (no ``jax.custom_vjp``).
    - ``"factors"``: from the structured per-example factors `ntkcalc.ntk` uses (per dense or
      conv layer its input h and output cotangents g; other leaves their formed derivatives;
      a layer whose dense derivative is no larger than its factors, e.g. a convolution with few
      input channels, formed dense once, see `representations`). For a factored leaf
      ``Jᵀ v = Σ_{i,t} h_it ⊗ (Σ_a v_ia g_iat)`` and ``(J W)_ia = Σ_t h_itᵀ W g_iat``: each
      product is a few large GEMMs, about 4·N·A·P FLOPs for A output directions and P
      parameters, with no pass through the network. The factors are computed once and cached
      when they fit in half of ``memory``; otherwise they are recomputed per batch in every
      product (two backward passes per product).
    - ``"auto"``: ``"factors"`` when they can be cached, else ``"products"``. The rule: a cached
      product is the GEMMs of the layers' parameter derivatives alone (≈ 4·N·A·P FLOPs), while
      "products" also runs the network forward and backward through every layer in both the
      VJP and the JVP (measured 2.1× slower per product on the benchmark MLP,
      docs/performance.md), and computing the factors costs about one product; uncached,
      "factors" adds two backward passes to every product and no longer wins, so "products" is
      used (except for a model with ``jax.custom_vjp``, which has no forward mode).

    Validation, the ``params`` filter and the ``dtype`` policy are those of `ntkcalc.ntk`
    (float32 unless x64 is on or ``dtype="float64"``, which runs every product of this operator
    under ``jax.enable_x64`` without touching the global switch), and every product runs at
    matmul precision "highest". In float32 it warns: products carry ~1e-7 relative error, and so
    will Lanczos, CG and Hutch++ results built on them. The operator's scipy dtype is always
    float64. Memory: a ``matmat`` with k columns holds about ``k·P`` parameter values
    (``k·O·P`` for "trace"), in groups of columns within a quarter of ``memory``.

    Args:
        net: an `ntkcalc.Net` (``net.call(params, state, x)``, differentiated in ``net.params``).
        x: (N, ...) inputs as an array, batch on axis 0.
        outputs: "trace", "full" or "logit-sum".
        params: restrict Θ to some parameters, as in `ntkcalc.ntk`.
        dtype: None, "float32" or "float64", as in `ntkcalc.ntk`.
        batch: examples per batch.
        method: "auto", "products" or "factors" (above).
        memory: budget for cached factors and probe vectors (bytes or e.g. "2GB"; default half
            the memory available now), as in `ntkcalc.ntk`.

    Returns:
        `NTKOperator` (a square, symmetric LinearOperator) with a ``matvecs`` counter and the
        ``method`` it uses.
    """
    check_choice("outputs", outputs, OPERATOR_OUTPUTS)
    check_choice("method", method, PRODUCT_METHODS)
    batch = _checks.positive_int("batch", batch)
    x = check_inputs(x, "x")
    with precision_scope(dtype):
        req = prepare(net, x, outputs=outputs, params=params)
        budget = C.parse_memory(memory)
        # The per-leaf representations; the plan's tiles and their budget are not used here.
        plan = plan_request(req, outputs=outputs, memory=None, method="structured",
                            reserve=False)
        no_forward = uses_custom_vjp(plan.program.analysis.closed.jaxpr)
        if method == "products" and no_forward:
            raise ValueError(
                "`method`='products' needs forward-mode derivatives, but the model uses a "
                "jax.custom_vjp function, which has none: use method='factors' (or 'auto')."
            )
        batches = math.ceil(x.shape[0] / min(batch, x.shape[0]))
        per_example = representations(plan, itemsize=req.dtype.itemsize)[1]
        factor_bytes = per_example * batches * min(batch, x.shape[0])
        cache = factor_bytes <= budget / 2
        if method == "auto":
            method = "factors" if cache or no_forward else "products"
        out = jax.eval_shape(req.net.call, req.params, req.state, req.x1[:1])
    if out.dtype != np.float64:
        warnings.warn(
            f"`net` computes in {out.dtype}: kernel products carry about "
            f"{float(np.finfo(out.dtype).eps):.0e} relative rounding error, so Lanczos, CG "
            "and trace estimates are accurate to that level at best. Use dtype='float64' (and "
            "float64 parameters if the model casts them) for reference-quality results.",
            RuntimeWarning,
            stacklevel=2,
        )
    return NTKOperator(req, plan, outputs=outputs, method=method, batch=batch, dtype=dtype,
                       budget=budget, cache=cache)
