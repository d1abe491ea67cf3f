"""An independent spot check of a finished kernel: a few entries recomputed another way.

Every method computes many examples at once (``vmap`` over a block, the same compiled step for
every tile), so a miscompiled step or a wrong rule corrupts the whole kernel silently. One such
hazard was seen upstream: ``vmap(grad(lax.scan(...)))`` in float64 on XLA CPU gave a wrong
gradient for one example of four (docs/cautions.md). The check picks ``count`` entries (i, j)
— diagonal ones first for K(X, X), then seeded random pairs — and recomputes each from its
definition Θ[i, j, a, b] = Σ_p ∂f_a(x1_i)/∂θ_p · ∂f_b(x2_j)/∂θ_p with ``jax.jacrev`` of the model
on that one example (no ``vmap``, no blocking, no structured rules), then compares. Cost: one
two reverse-mode Jacobians per entry (about O backward passes each) and their contraction, in one
compiled step (compiled once per model, shapes and outputs mode); nothing leaves the device but
the entries.

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
def _entries_fn(call, treedef, selected: tuple[int, ...], groups: tuple[int, ...],
                num_groups: int, outputs: str):
    """jit((x_a, x_b) ↦ per group: (Θ[a, b] in this outputs mode, ‖J(x_a)‖·‖J(x_b)‖)), from the
    two examples' Jacobians by jax.jacrev, each example evaluated alone (batch of one)."""

    def f(diff, leaves, state, x):
        full = list(leaves)
        for k, leaf in zip(selected, diff, strict=True):
            full[k] = leaf
        out = call(jax.tree_util.tree_unflatten(treedef, full), state, x[None])
        return jnp.reshape(out, (-1,))

    def jac(diff, leaves, state, x):
        return [j.reshape(j.shape[0], -1) for j in jax.jacrev(f)(diff, leaves, state, x)]

    def entries(diff, leaves, state, xa, xb):
        ja, jb = jac(diff, leaves, state, xa), jac(diff, leaves, state, xb)
        result = []
        for g in range(num_groups):
            mine = [k for k, kg in enumerate(groups) if kg == g]
            full = sum(jnp.matmul(ja[k], jb[k].T, precision="highest") for k in mine)
            norm = jnp.sqrt(sum(jnp.sum(ja[k] ** 2) for k in mine)
                            * sum(jnp.sum(jb[k] ** 2) for k in mine))
            result.append((_mode(full, outputs), norm))
        return result

    return jax.jit(entries)


def _mode(full, outputs: str):
    """Θ[i, j] in this outputs mode from its (O, O) block."""
    if outputs == "full":
        return full
    if outputs == "diagonal":
        return jnp.diagonal(full)
    if outputs == "trace":
        return jnp.trace(full)
    return jnp.sum(full)  # logit-sum: the kernel of Σ_a f_a


def spot_check(req, kernels, *, count: int, outputs: str) -> int:
    """Recompute ``count`` entries of every group's kernel in ``kernels`` (arrays or stored views)
    and raise RuntimeError at the first that disagrees; returns the number checked."""
    if count == 0:
        return 0
    x1 = req.x1
    x2 = x1 if req.x2 is None else req.x2
    sel = req.selection
    fn = _entries_fn(req.net.call, jax.tree_util.tree_structure(req.params),
                     tuple(sel.indices), tuple(sel.group_index()), len(sel.group_names), outputs)
    leaves = jax.tree_util.tree_leaves(req.params)
    chosen = pairs(x1.shape[0], x2.shape[0], count, symmetric=req.x2 is None)
    eps = float(np.finfo(req.dtype).eps)
    for i, j in chosen:
        with jax.default_matmul_precision("highest"):
            per_group = fn(req.diff, leaves, req.state, jnp.asarray(x1[i]), jnp.asarray(x2[j]))
        for g, (kernel, (want, norm)) in enumerate(zip(kernels, per_group, strict=True)):
            want = np.asarray(want)
            got = np.asarray(kernel[i, j])
            tol = np.sqrt(eps) * float(norm)
            gap = float(np.max(np.abs(got - want)))
            if not gap <= tol:
                name = "" if len(kernels) == 1 else f" of group {sel.group_names[g]!r}"
                raise RuntimeError(SPOT_CHECK_FAILED.format(
                    group=name, i=i, j=j, got=np.array2string(got, precision=6),
                    want=np.array2string(want, precision=6), gap=gap, tol=tol))
    logger.info("ntkcalc: spot check: %d entries recomputed with jax.jacrev agree", len(chosen))
    return len(chosen)
