"""Contraction of per-example derivative factors into kernel tiles, one outputs mode each.

Two representations of the per-example derivative of the outputs with respect to one leaf:

- *dense*: ``J[i, a, p]``, example i, output direction a, flattened parameter p;
- *factored*: a linear layer's derivative as the sum over positions t of an outer product,
  ``J[i, a, (B, C, R)] = Σ_t h[i, B, t, C] g[i, a, B, t, R]`` (h: the layer input, g: the cotangent
  of the layer output, B: dot-general batch dims, C: contracted features, R: output features). Its
  kernel contribution never forms J:
  ``Σ_{B,t,s} (Σ_C h1[i,B,t,C] h2[j,B,s,C]) (Σ_R g1[i,a,B,t,R] g2[j,b,B,s,R])``
  (the structured-derivatives rule for dense layers: Novak, Sohl-Dickstein & Schoenholz, "Fast
  Finite Width Neural Tangent Kernel", ICML 2022, arXiv:2206.08720).

Every mode contracts the output directions in its cheapest order: ``trace`` (and ``logit-sum``,
whose single direction is Σ_a f_a) contract a together with the parameter index, ``diagonal``
keeps a, and only ``full`` forms the O×O pairs.
"""

from __future__ import annotations

import jax.numpy as jnp
from jax import lax

HIGHEST = lax.Precision.HIGHEST

_DENSE = {
    "full": "iap,jbp->ijab",
    "trace": "iap,jap->ij",
    "logit-sum": "iap,jap->ij",
    "diagonal": "iap,jap->ija",
}
_FACTORED = {
    "full": "ijBts,iaBtR,jbBsR->ijab",
    "trace": "ijBts,iaBtR,jaBsR->ij",
    "logit-sum": "ijBts,iaBtR,jaBsR->ij",
    "diagonal": "ijBts,iaBtR,jaBsR->ija",
}


def contract_dense(j1, j2, outputs: str):
    """Kernel tile of one dense leaf: j1 (b1, A, ...), j2 (b2, A, ...)."""
    j1 = j1.reshape(j1.shape[0], j1.shape[1], -1)
    j2 = j2.reshape(j2.shape[0], j2.shape[1], -1)
    if outputs in ("trace", "logit-sum"):
        a = j1.reshape(j1.shape[0], -1)
        b = j2.reshape(j2.shape[0], -1)
        return lax.dot_general(a, b, (((1,), (1,)), ((), ())), precision=HIGHEST)
    return jnp.einsum(_DENSE[outputs], j1, j2, precision=HIGHEST)


def contract_factored(h1, g1, h2, g2, outputs: str):
    """Kernel tile of one factored leaf: h (b, B, T, C), g (b, A, B, T, R).

    The input Gram ``Σ_C h1 h2`` comes first; the order of the remaining three-way contraction
    (cotangent Gram first, or the input Gram against one cotangent first) is left to the
    einsum path optimiser, which picks the cheaper by FLOPs.
    """
    hh = jnp.einsum("iBtC,jBsC->ijBts", h1, h2, precision=HIGHEST)
    return jnp.einsum(_FACTORED[outputs], hh, g1, g2, precision=HIGHEST, optimize="optimal")


def dense_from_factored(h, g):
    """The dense derivative (A, B·C·R) of one example's factors h (B, T, C), g (A, B, T, R)."""
    j = jnp.einsum("BtC,aBtR->aBCR", h, g, precision=HIGHEST)
    return j.reshape(j.shape[0], -1)


def contract(reps1, reps2, kinds, group_index, num_groups: int, outputs: str, tile: tuple):
    """Sum the per-leaf contributions into ``(num_groups, *tile)``.

    ``reps`` is a list with one entry per differentiated leaf: an array for ``kind == "dense"``,
    an ``(h, g)`` pair for ``kind == "factored"``, ``None`` for ``"unused"`` and ``"folded"``
    (a bias whose derivative is carried by its layer's factors).
    """
    per_group = [None] * num_groups
    for r1, r2, kind, grp in zip(reps1, reps2, kinds, group_index, strict=True):
        if kind in ("unused", "folded"):
            continue
        if kind == "dense":
            k = contract_dense(r1, r2, outputs)
        else:
            k = contract_factored(r1[0], r1[1], r2[0], r2[1], outputs)
        per_group[grp] = k if per_group[grp] is None else per_group[grp] + k
    dtype = next((k.dtype for k in per_group if k is not None), None)
    return jnp.stack([jnp.zeros(tile, dtype) if k is None else k for k in per_group])
