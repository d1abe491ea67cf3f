"""A compiled kernel program: per-example derivative factors of a block, and their contraction.

Every method splits a kernel tile K(X_a, X_b) into two jitted steps, so the tile layer can cache
factors of a block and reuse them for every tile in its row and column:

- ``factors(diff, other, state, xb)``: per-example derivative representations of the block;
- ``tile(diff, other, state, fa, fb)``: the ``(groups, *tile)`` kernel of two blocks' factors.

``"jacobian"``: factors are dense per-example Jacobians (one VJP per output direction, vmapped
over examples), contracted leaf by leaf. ``"structured"``: factors come from the consuming layers
(see `structured`), dense or factored per leaf. ``"jvp"``: factors are the inputs themselves, and
the tile is J_a (J_bᵀ u) by one VJP and one JVP per output basis vector u, never forming a
Jacobian. All three: Novak, Sohl-Dickstein & Schoenholz, ICML 2022, arXiv:2206.08720.
"""

from __future__ import annotations

import dataclasses
import functools
from collections.abc import Callable

import jax
import jax.numpy as jnp

from . import products
from . import structured as st
from .contract import contract, dense_from_factored
from .options import basis_size, tile_shape
from .rules.bias import with_unit_input
from .select import Selection


@dataclasses.dataclass(frozen=True)
class Program:
    """Static description of one kernel computation (hashable: the compile-cache key).

    Fields:
        call: the Net's ``call(params, state, x)``.
        treedef: params tree structure; ``selection`` says which leaves are differentiated.
        outputs: outputs mode; num_outputs: O.
        method: "jacobian", "structured" or "jvp".
        kinds: per differentiated leaf, "dense", "factored", "streamed" (factors kept, contracted
            in dense form chunk by chunk inside the tile), "folded" (a bias carried by its
            layer's factors as the constant input 1) or "unused".
        analysis: the structured analysis (method "structured" only).
        jvp_chunk: basis vectors per lax.map step (method "jvp" only).
    """

    call: object
    treedef: object
    selection: Selection
    outputs: str
    num_outputs: int
    method: str
    kinds: tuple[str, ...]
    analysis: st.Analysis | None = None
    jvp_chunk: int = 8
    folds: tuple[int | None, ...] = ()  # per leaf: a bias leaf folded into its factors

    # -- the per-example function -------------------------------------------------------------
    def merge(self, diff, other):
        sel = set(self.selection.indices)
        it_d, it_o = iter(diff), iter(other)
        full = [next(it_d) if i in sel else next(it_o) for i in range(len(diff) + len(other))]
        return jax.tree_util.tree_unflatten(self.treedef, full)

    def example_fn(self, diff, other, state, x):
        """f(x) for one example, flattened to (O,)."""
        out = self.call(self.merge(diff, other), state, x[None])
        return out.reshape(-1)

    def basis(self, dtype):
        a = basis_size(self.outputs, self.num_outputs)
        if self.outputs == "logit-sum":
            return jnp.ones((1, self.num_outputs), dtype)
        return jnp.eye(a, dtype=dtype)

    # -- factors --------------------------------------------------------------------------------
    def factors(self, diff, other, state, xb):
        """Per-example derivative representations of a block: the method's `Steps.factors`."""
        return STEPS[self.method].factors(self, diff, other, state, xb)

    def _jacobian_one(self, diff, other, state, x):
        out, vjp = jax.vjp(lambda d: self.example_fn(d, other, state, x), list(diff))
        (jac,) = jax.vmap(vjp)(self.basis(out.dtype))
        return [j if k != "unused" else None for j, k in zip(jac, self.kinds, strict=True)]

    def _structured_one(self, diff, other, state, x):
        an = self.analysis
        fb_pos = [k for k, kind in enumerate(self.kinds) if kind == "dense" and not an.uses[k]]
        uses = [u for k, kind in enumerate(self.kinds) if kind not in ("unused", "folded")
                for u in an.uses[k]]
        state_leaves = jax.tree_util.tree_leaves(state)

        def run(fb_vals, probes):
            d = list(diff)
            for pos, val in zip(fb_pos, fb_vals, strict=True):
                d[pos] = val
            args = [*d, *other, *state_leaves, x]
            out, caps = st.eval_with_probes(an, args, probes)
            return out, caps

        probes0 = {u.path: jnp.zeros(st.probe_shape(u), u.out_aval.dtype) for u in uses}
        fb0 = [diff[k] for k in fb_pos]
        out, vjp, caps = jax.vjp(run, fb0, probes0, has_aux=True)
        fb_jac, cots = jax.vmap(vjp)(self.basis(out.dtype))
        reps = []
        fb_iter = iter(fb_jac)
        for k, kind in enumerate(self.kinds):
            if kind in ("unused", "folded"):
                reps.append(None)
            elif not an.uses[k]:
                reps.append(next(fb_iter))
            elif st.factorable(an.uses[k]):
                (u,) = an.uses[k]
                h, g = st.factors_of(u, caps[u.path], cots[u.path])
                if self.folds and self.folds[k] is not None:
                    h = with_unit_input(h)
                if kind in ("factored", "streamed"):
                    reps.append((h, g))
                    continue
                # Dense from the factors is one batched matmul (for a conv, over image patches),
                # and its entries are a permutation of the leaf's: the kernel is unchanged.
                reps.append(dense_from_factored(u.rule.dense_inputs(h, u, g.dtype), g))
            else:
                reps.append(
                    st.local_vjp(an.uses[k], diff[k], [caps[u.path] for u in an.uses[k]],
                                 [cots[u.path] for u in an.uses[k]])
                )
        return reps

    # -- tiles ----------------------------------------------------------------------------------
    def widths(self) -> tuple[int, ...]:
        """Per leaf, the input features of its factors (a folded bias adds one); 0 if none."""
        out = []
        for k, kind in enumerate(self.kinds):
            if kind not in ("factored", "streamed"):
                out.append(0)
                continue
            fold = 1 if self.folds and self.folds[k] is not None else 0
            out.append(st.factored_sizes(self.analysis.uses[k][0])[2] + fold)
        return tuple(out)

    def tile(self, diff, other, state, fa, fb, same: bool = False):
        """The ``(groups, *tile)`` kernel of two blocks' factors (the method's `Steps.tile`);
        ``same=True`` when fb is fa (a diagonal tile of K(X, X)), which lets streamed leaves
        form each chunk once."""
        return STEPS[self.method].tile(self, diff, other, state, fa, fb, same)

    def _jvp_tile(self, diff, other, state, xa, xb):
        def f(d, x):  # (b, O): the per-example function over a batch
            return jax.vmap(self.example_fn, in_axes=(None, None, None, 0))(d, other, state, x)

        return products.tile(f, list(diff), xa, xb, basis=self.basis(diff[0].dtype),
                             outputs=self.outputs, group_of=self.selection.group_index(),
                             num_groups=len(self.selection.group_names), chunk=self.jvp_chunk)


@functools.lru_cache(maxsize=64)
def compiled_single(program: Program):
    """One jitted step for a kernel that is a single tile: factors and contraction together
    (``same=True``: K(X, X), one set of factors), so XLA lays the factors out for the
    contraction directly instead of writing them and reading them back (≈ 25% faster on the
    benchmark transformer)."""

    def single(diff, other, state, xa, xb, same: bool):
        fa = program.factors(diff, other, state, xa)
        fb = fa if same else program.factors(diff, other, state, xb)
        return program.tile(diff, other, state, fa, fb, same=same)

    return jax.jit(single, static_argnames="same")


@functools.lru_cache(maxsize=256)
def compiled(program: Program):
    """The two jitted steps of ``program``; cached so repeated calls reuse compilations."""
    return jax.jit(program.factors), jax.jit(program.tile, static_argnames="same")


# -- each method's two steps ------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class Steps:
    """One method's two steps, as functions of its `Program`:
    ``factors(program, diff, other, state, xb)`` (per-example representations of a block) and
    ``tile(program, diff, other, state, fa, fb, same)`` (the ``(groups, *tile)`` kernel)."""

    factors: Callable
    tile: Callable


def _jacobian_factors(program: Program, diff, other, state, xb):
    """Dense per-example Jacobians, one VJP per output direction, vmapped over the block."""
    return jax.vmap(lambda x: program._jacobian_one(diff, other, state, x))(xb)


def _structured_factors(program: Program, diff, other, state, xb):
    """Per leaf the representation its consumer allows (`Program._structured_one`)."""
    return jax.vmap(lambda x: program._structured_one(diff, other, state, x))(xb)


def _inputs(program: Program, diff, other, state, xb):
    """NTK-vector products need no factors: the block's inputs."""
    return xb


def _contracted(program: Program, diff, other, state, fa, fb, same: bool):
    """The contraction of two blocks' factors, leaf by leaf (`contract.contract`)."""
    b1 = jax.tree_util.tree_leaves(fa)[0].shape[0]
    b2 = jax.tree_util.tree_leaves(fb)[0].shape[0]
    return contract(fa, fb, program.kinds, program.selection.group_index(),
                    len(program.selection.group_names), program.outputs,
                    tile_shape(program.outputs, b1, b2, program.num_outputs),
                    widths=program.widths(), same=same)


def _products(program: Program, diff, other, state, xa, xb, same: bool):
    """The tile by NTK-vector products (`Program._jvp_tile`)."""
    return program._jvp_tile(diff, other, state, xa, xb)


#: The two steps of each method, by `Program.method`.
STEPS = {
    "jacobian": Steps(_jacobian_factors, _contracted),
    "structured": Steps(_structured_factors, _contracted),
    "jvp": Steps(_inputs, _products),
}
