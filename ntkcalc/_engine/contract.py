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
keeps a, and only ``full`` forms the O×O pairs. Every contraction is written as large GEMMs
(examples × directions as rows) so that it runs at matmul speed on CPU as well as on accelerators.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
from jax import lax

from .options import tile_shape

HIGHEST = lax.Precision.HIGHEST


def contract_dense(j1, j2, outputs: str):
    """Kernel tile of one dense leaf: j1 (b1, A, ...), j2 (b2, A, ...); one GEMM per mode."""
    j1 = j1.reshape(j1.shape[0], j1.shape[1], -1)
    j2 = j2.reshape(j2.shape[0], j2.shape[1], -1)
    if outputs in ("trace", "logit-sum"):
        a = j1.reshape(j1.shape[0], -1)
        b = j2.reshape(j2.shape[0], -1)
        return lax.dot_general(a, b, (((1,), (1,)), ((), ())), precision=HIGHEST)
    if outputs == "diagonal":
        return jnp.einsum("iap,jap->ija", j1, j2, precision=HIGHEST)
    b1, a, _ = j1.shape
    k = lax.dot_general(j1.reshape(b1 * a, -1), j2.reshape(j2.shape[0] * a, -1),
                        (((1,), (1,)), ((), ())), precision=HIGHEST)
    return jnp.transpose(k.reshape(b1, a, j2.shape[0], a), (0, 2, 1, 3))


def _gram(x1, x2):
    """``x1 @ x2ᵀ`` batched over the first axis: (B, M, K), (B, M', K) -> (B, M, M')."""
    return lax.dot_general(x1, x2, (((2,), (2,)), ((0,), (0,))), precision=HIGHEST)


def _input_gram(h1, h2, dtype):
    """H[B, (i,t), (j,s)] = Σ_C h1[i,B,t,C] h2[j,B,s,C]; for looked-up rows h (b, B, T) of
    integer indices, the Gram of their one-hot vectors: [idx1 = idx2 ≥ 0], never formed."""
    nb = h1.shape[1]
    if jnp.issubdtype(h1.dtype, jnp.integer):
        i1 = jnp.transpose(h1, (1, 0, 2)).reshape(nb, -1, 1)
        i2 = jnp.transpose(h2, (1, 0, 2)).reshape(nb, 1, -1)
        return ((i1 == i2) & (i1 >= 0)).astype(dtype)
    return _gram(jnp.transpose(h1, (1, 0, 2, 3)).reshape(nb, -1, h1.shape[-1]),
                 jnp.transpose(h2, (1, 0, 2, 3)).reshape(nb, -1, h2.shape[-1]))


def contract_factored(h1, g1, h2, g2, outputs: str):
    """Kernel tile of one factored leaf: h (b, B, T, C) (or (b, B, T) looked-up row indices),
    g (b, A, B, T, R).

    Two Grams over all (example, position) rows at once, each one large GEMM (batched only over
    the dot-general batch dims B, usually 1), then their elementwise product summed over the
    positions: ``K = Σ_{B,t,s} H[B,(i,t),(j,s)] · G[B,(i,a,t),(j,b,s)]`` with
    ``H = Σ_C h1 h2`` and ``G = Σ_R g1 g2`` (trace and logit-sum sum a inside G's rows:
    ``G[B,(i,t),(j,s)] = Σ_{a,R} g1 g2``; diagonal batches G over a). On CPU this runs at
    matmul speed, where the same contraction as a batched einsum over example pairs does not
    (the product-and-sum is written out: as an einsum XLA would batch it over pairs again).
    """
    b1, a, nb, t, r = g1.shape
    b2 = g2.shape[0]
    hh = _input_gram(h1, h2, g1.dtype).reshape(nb, b1, t, b2, t)
    if outputs in ("trace", "logit-sum"):
        def rows(g, n):  # (B, n·T, A·R)
            return jnp.transpose(g, (2, 0, 3, 1, 4)).reshape(nb, n * t, a * r)
        gg = _gram(rows(g1, b1), rows(g2, b2)).reshape(nb, b1, t, b2, t)
        return (hh * gg).sum((0, 2, 4))
    if outputs == "diagonal":
        def rows(g, n):  # (B·A, n·T, R)
            return jnp.transpose(g, (2, 1, 0, 3, 4)).reshape(nb * a, n * t, r)
        gg = _gram(rows(g1, b1), rows(g2, b2)).reshape(nb, a, b1, t, b2, t)
        return jnp.moveaxis((hh[:, None] * gg).sum((0, 3, 5)), 0, -1)

    def rows(g, n):  # (B, n·A·T, R)
        return jnp.transpose(g, (2, 0, 1, 3, 4)).reshape(nb, n * a * t, r)
    gg = _gram(rows(g1, b1), rows(g2, b2)).reshape(nb, b1, a, t, b2, a, t)
    k = (hh[:, :, None, :, :, None, :] * gg).sum((0, 3, 6))  # (b1, A, b2, A)
    return jnp.transpose(k, (0, 2, 1, 3))


def dense_from_factored(h, g):
    """The dense derivative (A, B·R·C) of one example's factors h (B, T, C), g (A, B, T, R).

    The entries are laid out as the GEMM produces them, (R, C) per batch dim, a permutation of
    the leaf's: inner products, and so the kernel, do not depend on the order.
    """
    j = jnp.einsum("BtC,aBtR->aBRC", h, g, precision=HIGHEST)
    return j.reshape(j.shape[0], -1)


# Target bytes of one streamed chunk of dense derivatives: small enough to stay in cache between
# being formed and being contracted, large enough for an efficient GEMM (measured on the
# benchmark CNN's middle conv, docs/performance.md: ≈ 10 MB chunks ran 1.4× faster than forming
# the whole derivative in memory; 5 MB and 20–40 MB chunks gained 1.05–1.15×).
STREAM_CHUNK_BYTES = 10 << 20


def stream_chunk(b: int, a: int, nb: int, r: int, width: int, itemsize: int) -> int:
    """Input features per streamed chunk: about `STREAM_CHUNK_BYTES` of (b, A, B, R, chunk),
    a multiple of 16 (or all of them)."""
    per_feature = max(1, b * a * nb * r * itemsize)
    cc = max(16, (STREAM_CHUNK_BYTES // per_feature) // 16 * 16)
    return int(min(width, cc))


def contract_streamed(h1, g1, h2, g2, outputs: str, width: int, same: bool):
    """Kernel tile of a factorable leaf contracted in dense form, without storing its derivative.

    The dense derivative ``J[i, a, (B, R, C)] = Σ_t h[i,B,t,C] g[i,a,B,t,R]`` is formed chunk by
    chunk over the input features C (``width`` of them; for looked-up rows h holds indices and
    each chunk is their one-hot slice) and each chunk is contracted at once, so the full J, often
    larger than the cache, is never written. ``same``: both sides are the same block (a diagonal
    tile), so each chunk is formed once.
    """
    b1, a, nb, t, r = g1.shape
    cc = stream_chunk(b1, a, nb, r, width, g1.dtype.itemsize)
    nc = -(-width // cc)
    rows = jnp.issubdtype(h1.dtype, jnp.integer)

    def lhs(g):  # (b, B, A·R, T): laid out once, outside the loop over chunks
        return jnp.transpose(g, (0, 2, 1, 4, 3)).reshape(g.shape[0], nb, a * r, t)

    def split(h):  # (nc, b, B, T, cc) feature chunks, zero-padded to whole chunks
        h = jnp.pad(h, [(0, 0)] * (h.ndim - 1) + [(0, nc * cc - width)])
        return jnp.moveaxis(h.reshape(*h.shape[:-1], nc, cc), -2, 0)

    def chunk(h, gl, c):  # (b, A, B·R·cc)
        hc = jax.nn.one_hot(h - c * cc, cc, dtype=gl.dtype) if rows else h[c]
        j = jnp.matmul(gl, hc, precision=HIGHEST)  # (b, B, A·R, cc)
        j = j.reshape(j.shape[0], nb, a, r * cc)
        return jnp.swapaxes(j, 1, 2).reshape(j.shape[0], a, -1)

    l1 = lhs(g1)
    l2 = l1 if same else lhs(g2)
    x1 = h1 if rows else split(h1)
    x2 = x1 if same else (h2 if rows else split(h2))

    def body(k, c):
        j1 = chunk(x1, l1, c)
        j2 = j1 if same else chunk(x2, l2, c)
        return k + contract_dense(j1, j2, outputs), None

    init = jnp.zeros(tile_shape(outputs, b1, g2.shape[0], a), g1.dtype)
    k, _ = lax.scan(body, init, jnp.arange(nc))
    return k


def contract(reps1, reps2, kinds, group_index, num_groups: int, outputs: str, tile: tuple, *,
             widths=(), same: bool = False):
    """Sum the per-leaf contributions into ``(num_groups, *tile)``.

    ``reps`` is a list with one entry per differentiated leaf: an array for ``kind == "dense"``,
    an ``(h, g)`` pair for ``"factored"`` and ``"streamed"`` (contracted in dense form chunk by
    chunk; ``widths[k]`` is its number of input features), ``None`` for ``"unused"`` and
    ``"folded"`` (a bias whose derivative is carried by its layer's factors). ``same``: reps1 and
    reps2 are the same block.
    """
    per_group = [None] * num_groups
    for k_leaf, (r1, r2, kind, grp) in enumerate(
            zip(reps1, reps2, kinds, group_index, strict=True)):
        if kind in ("unused", "folded"):
            continue
        if kind == "dense":
            k = contract_dense(r1, r2, outputs)
        elif kind == "streamed":
            k = contract_streamed(r1[0], r1[1], r2[0], r2[1], outputs, widths[k_leaf], same)
        else:
            k = contract_factored(r1[0], r1[1], r2[0], r2[1], outputs)
        per_group[grp] = k if per_group[grp] is None else per_group[grp] + k
    dtype = next((k.dtype for k in per_group if k is not None), None)
    return jnp.stack([jnp.zeros(tile, dtype) if k is None else k for k in per_group])
