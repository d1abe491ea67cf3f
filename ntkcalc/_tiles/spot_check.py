"""An independent spot check of a finished kernel: a few entries recomputed another way.

Every method computes many examples at once (``vmap`` over a block, the same compiled step for
every tile), so a miscompiled step or a wrong rule corrupts the whole kernel silently. One such
hazard was seen upstream: ``vmap(grad(lax.scan(...)))`` in float64 on XLA CPU gave a wrong
gradient for one example of four (docs/cautions.md). The check picks ``count`` entries (i, j)
— diagonal ones first for K(X, X), then seeded random pairs — and recomputes each from its
definition Θ[i, j, a, b] = Σ_p ∂f_a(x1_i)/∂θ_p · ∂f_b(x2_j)/∂θ_p with ``jax.jacrev`` of the model
on that one example (no ``vmap``, no blocking, no structured rules), then compares. Cost: one
reverse-mode Jacobian per distinct example (about O backward passes each), compiled once.

Tolerance: |K − K_ref| ≤ √ε · ‖J(x1_i)‖ ‖J(x2_j)‖ per entry (ε: the dtype's machine epsilon;
‖J‖ the Frobenius norm of the example's Jacobian, which bounds |Θ[i, j, a, b]| by
Cauchy–Schwarz), loose enough for reordered float sums and far below what a wrong derivative
gives.
"""

from __future__ import annotations

import functools
import logging

import jax
import jax.numpy as jnp
import numpy as np

logger = logging.getLogger("ntkcalc")

SPOT_CHECK_FAILED = (
    "`spot_check` failed: the kernel{group} at [{i}, {j}] is {got} but its definition, "
    "recomputed with jax.jacrev on the two examples alone, gives {want} (difference {gap:.3g}, "
    "tolerance {tol:.3g}). The kernel is wrong: a miscompiled step (see docs/cautions.md, e.g. "
    "vmap of grad through lax.scan on XLA CPU; XLA_FLAGS=--xla_backend_optimization_level=0 "
    "avoids it) or a bug in ntkcalc. Try another `method=` and report it."
)


def check_count(spot_check) -> int:
    """``spot_check`` as a count of entries (0: off), or a ValueError naming it."""
    if isinstance(spot_check, bool) or not isinstance(spot_check, int | np.integer) or (
            spot_check < 0):
        raise ValueError(
            f"`spot_check`={spot_check!r} must be a number of kernel entries to recompute "
            "independently (an int ≥ 0; 0 turns the check off, 8 is a cheap choice)."
        )
    return int(spot_check)


def pairs(n1: int, n2: int, count: int, *, symmetric: bool, seed: int = 0) -> list[tuple]:
    """``count`` distinct (i, j) entries: diagonal ones first when ``symmetric``, then random."""
    rng = np.random.default_rng(seed)
    chosen: list[tuple[int, int]] = []
    if symmetric:
        for i in rng.permutation(n1)[: (count + 1) // 2]:
            chosen.append((int(i), int(i)))
    total = n1 * n2
    for k in rng.permutation(total)[: min(total, 4 * count)]:
        if len(chosen) >= min(count, total):
            break
        entry = (int(k // n2), int(k % n2))
        if entry not in chosen:
            chosen.append(entry)
    return chosen[:count]


@functools.cache
def _jacobian_fn(call, treedef, selected: tuple[int, ...]):
    """jit(x ↦ [∂f(x)/∂θ_k for selected leaves k]) for one example, each (O, size_k)."""

    def f(diff, leaves, state, x):
        full = list(leaves)
        for k, leaf in zip(selected, diff, strict=True):
            full[k] = leaf
        out = call(jax.tree_util.tree_unflatten(treedef, full), state, x[None])
        return jnp.reshape(out, (-1,))

    def jac(diff, leaves, state, x):
        js = jax.jacrev(f)(diff, leaves, state, x)
        return [j.reshape(j.shape[0], -1) for j in js]

    return jax.jit(jac)


def _entry(ja, jb, outputs: str) -> np.ndarray:
    """Θ[i, j] in this outputs mode from the two examples' Jacobians (O, P)."""
    full = ja @ jb.T
    if outputs == "full":
        return full
    if outputs == "diagonal":
        return np.diagonal(full).copy()
    if outputs == "trace":
        return np.trace(full)
    return full.sum()  # logit-sum: the kernel of Σ_a f_a


def spot_check(req, kernels, *, count: int, outputs: str) -> int:
    """Recompute ``count`` entries of every group's kernel in ``kernels`` (arrays or stored views)
    and raise RuntimeError at the first that disagrees; returns the number checked."""
    if count == 0:
        return 0
    x1 = req.x1
    x2 = x1 if req.x2 is None else req.x2
    sel = req.selection
    leaves = jax.tree_util.tree_leaves(req.params)
    treedef = jax.tree_util.tree_structure(req.params)
    fn = _jacobian_fn(req.net.call, treedef, tuple(sel.indices))
    group_of = np.asarray(sel.group_index())
    chosen = pairs(x1.shape[0], x2.shape[0], count, symmetric=req.x2 is None)
    cache: dict = {}

    def jac(x, i):
        key = (id(x), i)
        if key not in cache:
            with jax.default_matmul_precision("highest"):
                js = fn(req.diff, leaves, req.state, jnp.asarray(x[i]))
            per_group = []
            for g in range(len(sel.group_names)):
                parts = [np.asarray(j) for j, k in zip(js, group_of, strict=True) if k == g]
                per_group.append(np.concatenate(parts, axis=1))
            cache[key] = per_group
        return cache[key]

    eps = float(np.finfo(req.dtype).eps)
    for i, j in chosen:
        ja, jb = jac(x1, i), jac(x2, j)
        for g, kernel in enumerate(kernels):
            want = _entry(ja[g], jb[g], outputs)
            got = np.asarray(kernel[i, j])
            tol = np.sqrt(eps) * np.linalg.norm(ja[g]) * np.linalg.norm(jb[g])
            gap = float(np.max(np.abs(got - want)))
            if not gap <= tol:
                name = "" if len(kernels) == 1 else f" of group {sel.group_names[g]!r}"
                raise RuntimeError(SPOT_CHECK_FAILED.format(
                    group=name, i=i, j=j, got=np.array2string(got, precision=6),
                    want=np.array2string(want, precision=6), gap=gap, tol=tol))
    logger.info("ntkcalc: spot check: %d entries recomputed with jax.jacrev agree", len(chosen))
    return len(chosen)
