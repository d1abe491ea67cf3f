"""NTK-vector products ``Θ V = J (Jᵀ V)``: the one implementation, never forming Θ.

J is the Jacobian of the outputs with respect to the differentiated parameters over a batch of
examples, so a product needs ``Jᵀ c`` (a parameter-space vector from output-space cotangents c)
and ``J t`` (outputs from a parameter tangent t). Two ways to apply them:

- by differentiation: ``Jᵀ c`` is one VJP of the batch function at cotangent c (`pull`), ``J t``
  one JVP at tangent t (`push`) — the "NTK-vector products" method of Novak, Sohl-Dickstein &
  Schoenholz, "Fast Finite Width Neural Tangent Kernel", ICML 2022, arXiv:2206.08720;
- from per-example structured factors of the program (`factor_pull`, `factor_push`). A
  factored leaf's per-example derivative is ``J[i, a] = Σ_t h_it ⊗ g_iat`` (h: the layer input
  (B, T, C), g: the output cotangent (A, B, T, R); `contract` has the layout), so

      Jᵀ c = Σ_{i,t} h_it ⊗ (Σ_a c_ia g_iat)     one (C × b·T) @ (b·T × S·R) GEMM per batch dim,
      (J w)_ia = Σ_t h_itᵀ W g_iat               one (b·T × C) @ (C × S·R) GEMM, then Σ over R, t,

  for S probes at once; a dense leaf's stored derivative (b, A, P) is one GEMM each way. W is
  kept in the factors' own layout (a permutation of the leaf's): ``J (Jᵀ c)`` does not depend
  on it. Looked-up rows (embeddings) scatter-add Jᵀ c into their rows and gather W's rows back.

Probes are written in *direction* space: A output directions per example (the program's
``basis``: the O unit outputs for "trace", "diagonal" and "full"; Σ_a f_a for "logit-sum").
`lift` turns an operator's input block into cotangent probes (S, b, A) and `lower` turns the
probes' outputs back into the operator's result; `Program._jvp_tile` applies Θ(x_a, x_b) to the
one-hot probes of x_b's examples × directions with the same `pull` and `push` (`tile`).
Every matmul here runs at precision "highest".
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
from jax import lax

HIGHEST = lax.Precision.HIGHEST


# -- by differentiation ---------------------------------------------------------------------------
def pull(f, diff, xb, cot):
    """``Jᵀ c = Σ_i J_iᵀ c_i``: one VJP of ``f(diff, xb)`` (b, O) at cotangent ``cot`` (b, O).

    Returns a list like ``diff`` (one tangent per differentiated leaf)."""
    out, vjp = jax.vjp(lambda d: f(d, xb), list(diff))
    (t,) = vjp(cot.astype(out.dtype))
    return t


def push(f, diff, xb, tangent, group_of=None, num_groups: int = 1):
    """``J t`` per parameter group, (G, b, O): one JVP of ``f(diff, xb)`` per group, each with the
    tangent restricted to the leaves of that group (``group_of[k]``: leaf k's group; None: one
    group holding every leaf)."""
    def jvp(t):
        return jax.jvp(lambda d: f(d, xb), (list(diff),), (list(t),))[1]

    if group_of is None:
        return jvp(tangent)[None]
    return jnp.stack([
        jvp([tk if group_of[k] == g else jnp.zeros_like(tk) for k, tk in enumerate(tangent)])
        for g in range(num_groups)
    ])


def to_outputs(cot, basis):
    """Direction-space cotangents (..., A) as output-space ones (..., O): ``cot @ basis``."""
    return jnp.einsum("...a,ao->...o", cot, basis.astype(cot.dtype), precision=HIGHEST)


def to_directions(outs, basis):
    """Output-space values (..., O) along the A directions: ``outs @ basisᵀ``."""
    return jnp.einsum("...o,ao->...a", outs, basis.astype(outs.dtype), precision=HIGHEST)


def tile(f, diff, xa, xb, *, basis, outputs: str, group_of, num_groups: int, chunk: int):
    """``(G, *tile)`` kernel Θ(x_a, x_b) per parameter group by NTK-vector products.

    Column m = (example j of ``xb``, direction b) is Θ applied to the one-hot probe
    ``e_j ⊗ u_b``: one VJP of example j alone (`pull`) and one JVP of ``xa`` per group (`push`),
    ``chunk`` columns per `lax.map` step. "trace" and "diagonal" keep only direction b of each
    column (never an O×O block), "full" keeps every direction; "logit-sum" has one direction.
    """
    a_dim = basis.shape[0]
    n_a, n_b = xa.shape[0], xb.shape[0]

    def column(m):
        j, b = m // a_dim, m % a_dim
        cot = basis[b][None]  # (1, O): example j along direction b
        t = pull(f, diff, lax.dynamic_slice_in_dim(xb, j, 1), cot)
        col = to_directions(push(f, diff, xa, t, group_of, num_groups), basis)  # (G, n_a, A)
        return col if outputs == "full" else col[..., b]

    size = n_b * a_dim
    cols = lax.map(column, jnp.arange(size), batch_size=min(chunk, size))
    cols = jnp.moveaxis(cols, 1, 0)  # (G, n_b·A, n_a[, A])
    if outputs == "logit-sum":
        return jnp.swapaxes(cols, 1, 2)  # (G, n_a, n_b)
    if outputs == "full":
        return jnp.transpose(cols.reshape(num_groups, n_b, a_dim, n_a, a_dim), (0, 3, 1, 4, 2))
    diag = jnp.transpose(cols.reshape(num_groups, n_b, a_dim, n_a), (0, 3, 1, 2))  # [g, i, j, a]
    return diag if outputs == "diagonal" else diag.sum(-1)


# -- probes of an operator ------------------------------------------------------------------------
def lift(v_b, outputs: str, a_dim: int):
    """Cotangent probes (S, b, A) in direction space for the block ``v_b`` of the operator's input.

    "full": ``v_b`` (b, A, k) gives k probes; "logit-sum": (b, k) gives k probes of the one
    direction; "trace": (b, k) gives A·k probes, probe (a, c) = ``v_c ⊗ e_a``, since
    ``Σ_a J_a J_aᵀ v`` needs ``J_aᵀ v`` for each output a separately.
    """
    if outputs == "full":
        return jnp.moveaxis(v_b, -1, 0)
    if outputs == "logit-sum":
        return v_b.T[:, :, None]
    eye = jnp.eye(a_dim, dtype=v_b.dtype)
    probes = v_b.T[None, :, :, None] * eye[:, None, None, :]  # (A, k, b, A)
    return probes.reshape(a_dim * v_b.shape[1], v_b.shape[0], a_dim)


def lower(outs, outputs: str, a_dim: int):
    """The operator's result block from the probes' outputs ``outs`` (S, b, A): (b, A, k) for
    "full", (b, k) otherwise ("trace": Σ_a of output a's own probe)."""
    if outputs == "full":
        return jnp.moveaxis(outs, 0, -1)
    if outputs == "logit-sum":
        return outs[..., 0].T
    s, b, _ = outs.shape
    return jnp.einsum("akba->bk", outs.reshape(a_dim, s // a_dim, b, a_dim))


# -- from structured factors ----------------------------------------------------------------------
# Probes of ``factor_pull`` / ``factor_push``: ``cot`` (S, b, A), general cotangents in direction
# space, or with ``own=True`` ``cot`` (k, b), the S = A·k probes (a, c) = v_c ⊗ e_a of the "trace"
# operator (ordered a-major) whose pushes keep only direction a: (A, k, b). The own form needs
# no contraction over directions, only broadcasts (A× fewer FLOPs outside the GEMMs), and
# batched small matmuls over examples are avoided throughout (far below matmul speed on CPU).
def _weighted(cot, g, own: bool):
    """``u[B, i, t, s, R] = Σ_a cot[s, i, a] g[i, a, B, t, R]`` (own: ``cot[c, i] g[i, a, ...]``
    with s = (a, c)), as (B, b, T, S, R)."""
    b, a, nb, t, r = g.shape
    if own:
        u = g[:, :, :, :, None, :] * cot.T[:, None, None, None, :, None]  # (i, a, B, t, c, R)
        u = jnp.transpose(u, (2, 0, 3, 1, 4, 5))
    else:
        u = jnp.sum(g[:, :, :, :, None, :] * jnp.transpose(cot, (1, 2, 0))[:, :, None, None, :,
                                                                           None], axis=1)
        u = jnp.transpose(u, (1, 0, 2, 3, 4))  # (B, i, t, s, R)
    return u.reshape(nb, b, t, -1, r)


def _contracted(z, g, own: bool):
    """``y[s, i, a] = Σ_{B,t,R} z[B, i, t, s, R] g[i, a, B, t, R]`` as (S, b, A); own: only
    a = the probe's own direction, as (A, k, b)."""
    nb, b, t, s, r = z.shape
    a = g.shape[1]
    if own:
        z = jnp.transpose(z.reshape(nb, b, t, a, s // a, r), (1, 3, 0, 2, 4, 5))  # (i,a,B,t,c,R)
        y = jnp.sum(z * g[:, :, :, :, None, :], axis=(2, 3, 5))  # (i, a, c)
        return jnp.transpose(y, (1, 2, 0))
    z = jnp.transpose(z, (1, 0, 2, 3, 4))[:, None]  # (i, 1, B, t, s, R)
    y = jnp.sum(z * g[:, :, :, :, None, :], axis=(2, 3, 5))  # (i, a, s)
    return jnp.transpose(y, (2, 0, 1))


def factor_pull(reps, kinds, cot, rows=(), *, own: bool = False):
    """``Jᵀ c`` per leaf from one batch's factors ``reps`` (as `Program.factors` returns them) for
    the probes ``cot`` (above). Per leaf: (B, C, S, R) for a factored (or streamed) leaf,
    (S, B, V, R) for looked-up rows (``rows[k]`` = V, the table's rows), (S, P) for a dense
    one, None for unused and folded leaves (a folded bias is input 1 of its layer's factors)."""
    out = []
    for k, (rep, kind) in enumerate(zip(reps, kinds, strict=True)):
        if kind in ("unused", "folded"):
            out.append(None)
        elif kind == "dense":
            j = rep.reshape(rep.shape[0], rep.shape[1], -1)
            if own:  # per direction a: (k × b) @ (b × P)
                w = jnp.einsum("ci,iap->acp", cot, j, precision=HIGHEST)
                out.append(w.reshape(-1, w.shape[-1]))
            else:
                out.append(jnp.einsum("sia,iap->sp", cot, j, precision=HIGHEST))
        else:
            h, g = rep
            u = _weighted(cot, g, own)
            nb, b, t, s, r = u.shape
            if jnp.issubdtype(h.dtype, jnp.integer):
                idx = _row_index(h, rows[k])  # (B, b·T)
                w = jnp.zeros((s, nb, rows[k] + 1, r), u.dtype)
                u = jnp.transpose(u, (3, 0, 1, 2, 4)).reshape(s, nb, b * t, r)
                out.append(w.at[:, jnp.arange(nb)[:, None], idx].add(u)[:, :, :-1])
                continue
            hm = jnp.transpose(h, (1, 0, 2, 3)).reshape(nb, b * t, h.shape[-1])
            w = lax.dot_general(hm, u.reshape(nb, b * t, s * r), (((1,), (1,)), ((0,), (0,))),
                                precision=HIGHEST)  # (B, C, S·R)
            out.append(w.reshape(nb, -1, s, r))
    return out


def factor_push(reps, kinds, ws, rows=(), *, own: bool = False):
    """``J w`` of one batch from its factors ``reps`` and the per-leaf ``ws`` that `factor_pull`
    returns (summed over batches): (S, b, A), or with ``own`` (A, k, b)."""
    total = None
    for k, (rep, kind, w) in enumerate(zip(reps, kinds, ws, strict=True)):
        if kind in ("unused", "folded"):
            continue
        if kind == "dense":
            j = rep.reshape(rep.shape[0], rep.shape[1], -1)
            if own:
                y = jnp.einsum("iap,acp->aci", j, w.reshape(j.shape[1], -1, w.shape[-1]),
                               precision=HIGHEST)
            else:
                y = jnp.einsum("iap,sp->sia", j, w, precision=HIGHEST)
        else:
            h, g = rep
            b, _, nb, t, r = g.shape
            if jnp.issubdtype(h.dtype, jnp.integer):
                w = jnp.pad(w, ((0, 0), (0, 0), (0, 1), (0, 0)))  # the zero row
                z = w[:, jnp.arange(nb)[:, None], _row_index(h, rows[k])]  # (S, B, b·T, R)
                z = jnp.transpose(z.reshape(z.shape[0], nb, b, t, r), (1, 2, 3, 0, 4))
            else:
                s = w.shape[2]
                hm = jnp.transpose(h, (1, 0, 2, 3)).reshape(nb, b * t, h.shape[-1])
                z = lax.dot_general(hm, w.reshape(nb, -1, s * r), (((2,), (1,)), ((0,), (0,))),
                                    precision=HIGHEST).reshape(nb, b, t, s, r)
            y = _contracted(z, g, own)
        total = y if total is None else total + y
    return total


def _row_index(h, num_rows: int):
    """Looked-up rows h (b, B, T) as (B, b·T) indices into a table with one extra row
    ``num_rows`` (zero, or discarded), where -1 (a position that reads no row) points."""
    idx = jnp.where(h >= 0, h, num_rows)
    return jnp.transpose(idx, (1, 0, 2)).reshape(h.shape[1], -1)
