r"""Seeded random projections of per-example derivatives: one feature per projection.

Every feature m is an independent random linear functional of the per-example Jacobian, drawn
from the seed alone (never from the parameters or the data), so two checkpoints of one model
projected with one seed share every projection. With ``w_m`` the functional and
``Φ_i[m] = ⟨J_i, w_m⟩`` (J_i: example i's derivative, over parameters and, in ``"trace"``, over
output directions), ``E[w wᵀ] = I`` gives ``E[Φ_i[m] Φ_j[m]] = ⟨J_i, J_j⟩ = Θ_ij``; the returned
features are ``φ = Φ / √k``, so ``φ φᵀ`` is the mean of k independent unbiased estimates.

The functional of one parameter leaf is a *product* (Kronecker-structured) projection of the
leaf's derivative arranged as a matrix ``M_i`` (rows × columns): ``⟨M_i, s uᵀ⟩ = sᵀ M_i u`` with
``s`` and ``u`` independent standard Gaussian vectors. For a dense or conv leaf consumed as
``y = h·W`` the derivative is ``M_i = Σ_t h_t g_tᵀ`` (h: layer input at position t, g: cotangent of
the layer output), so ``sᵀ M_i u = Σ_t (sᵀ h_t)(g_tᵀ u)``: the cost grows with the layer's input and
output widths, never their product, and no per-example derivative is formed (Kronecker-structured
gradient projection: Choe et al., "What is Your Data Worth to GPT?", 2024, arXiv:2405.13954;
random projections of per-example gradients: Park et al., "TRAK", ICML 2023, arXiv:2303.14186).

Arrangement of ``M_i`` per leaf (A output directions: O for ``"trace"``/``"full"``, 1 for
``"logit-sum"``; B: dot-general batch dims or conv feature groups, each its own block with its
own (s, u)):

- factored leaf (dense, conv, embedding; a folded bias is the input 1): rows = input features C,
  columns = (A, R) in ``"trace"``/``"logit-sum"``; in ``"full"`` one matrix C × R per direction a,
  all with the same (s, u) so that ``φ_(i,a) · φ_(j,b)`` estimates ``J_ia · J_jb``;
- any other leaf (scale, bias, fallback) of shape (..., p₂): rows = (A, p₁ = ∏ leading dims),
  columns = p₂ (per direction in ``"full"``). When there is a single row the factor s is dropped
  and the projection is a plain Gaussian vector.

Leaves add with independent projections: ``Φ_i[m] = Σ_leaf sᵀ M_i u``.

Variance of one feature's product ``X = Φ_i[m] Φ_j[m]`` for one leaf (Isserlis' theorem for
Gaussian fourth moments; A = M_i, B = M_j)::

    Var X = ‖A‖²‖B‖² + ⟨A, B⟩² + 2‖AᵀB‖² + 2‖ABᵀ‖² + 2 tr((ABᵀ)²)      (product s uᵀ)
    Var X = ‖A‖²‖B‖² + ⟨A, B⟩²                                          (plain Gaussian u)

(norms Frobenius). Across independent leaves or blocks l ≠ l' add ``‖A_l‖²‖B_l'‖² + K_l K_l'``
per ordered pair. ``Var(φ_i · φ_j) = Var X / k``. The plain Gaussian value is the usual
random-projection variance (common practice; Johnson–Lindenstrauss-type sketches); a product
projection costs at most a few times that (on the diagonal of a rank-one M: 8‖A‖⁴ against 2‖A‖⁴).
"""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
from jax import lax

from .._engine.contract import HIGHEST


def leaf_key(key, leaf: int):
    """The key of one parameter leaf, by its position among all the model's leaves."""
    return jax.random.fold_in(key, leaf)


def _normal(key, which: int, shape, dtype):
    return jax.random.normal(jax.random.fold_in(key, which), shape, dtype)


def factored_projection(key, *, k: int, groups: int, width: int, directions: int, r: int,
                        mix: bool, dtype):
    """(s (B, C, k), u (B, A·R, k) if ``mix`` else (B, R, k)) for one factored leaf."""
    s = _normal(key, 0, (groups, width, k), dtype)
    u = _normal(key, 1, (groups, directions * r if mix else r, k), dtype)
    return s, u


def dense_projection(key, *, k: int, leaf_shape: tuple[int, ...], directions: int, mix: bool,
                     dtype):
    """(s (rows, k) or None, u (p₂, k)) for a leaf projected from its dense derivative."""
    p2 = leaf_shape[-1] if leaf_shape else 1
    rows = math.prod(leaf_shape[:-1]) * (directions if mix else 1)
    s = None if rows == 1 else _normal(key, 0, (rows, k), dtype)
    return s, _normal(key, 1, (p2, k), dtype)


def _bmm(a, b):
    """(B, M, K) @ (B, K, N) -> (B, M, N) at precision highest."""
    return lax.dot_general(a, b, (((2,), (1,)), ((0,), (0,))), precision=HIGHEST)


def project_factored(h, g, s, u, *, mix: bool):
    """Σ_{B,t} (sᵀ h_t)(g_tᵀ u) of a block: h (b, B, T, C) or (b, B, T) row indices (an embedding:
    sᵀ of a one-hot row is a row of s; index -1 reads zero), g (b, A, B, T, R).

    Returns (b, 1, k) with ``mix`` (directions inside the columns), else (b, A, k).
    """
    b, a, nb, t, r = g.shape
    k = s.shape[-1]
    if jnp.issubdtype(h.dtype, jnp.integer):
        rows = jnp.take(s[0], jnp.maximum(h, 0), axis=0)  # (b, 1, T, k)
        ph = jnp.where((h >= 0)[..., None], rows, 0)
        ph = jnp.transpose(ph, (1, 0, 2, 3))  # (B, b, T, k)
    else:
        hm = jnp.transpose(h, (1, 0, 2, 3)).reshape(nb, b * t, h.shape[-1])
        ph = _bmm(hm, s).reshape(nb, b, t, k)
    if mix:
        gm = jnp.transpose(g, (2, 0, 3, 1, 4)).reshape(nb, b * t, a * r)
        pg = _bmm(gm, u).reshape(nb, b, t, k)
        return jnp.sum(ph * pg, axis=(0, 2))[:, None, :]
    gm = jnp.transpose(g, (2, 0, 1, 3, 4)).reshape(nb, b * a * t, r)
    pg = _bmm(gm, u).reshape(nb, b, a, t, k)
    return jnp.einsum("Bbtk,Bbatk->bak", ph, pg, precision=HIGHEST)


def project_dense(j, s, u, *, mix: bool):
    """sᵀ M u of a block's dense derivatives j (b, A, *leaf): (b, 1, k) with ``mix``, else
    (b, A, k)."""
    b, a = j.shape[:2]
    p2 = u.shape[0]
    rows = j.reshape(b, 1 if mix else a, -1, p2)  # (b, A', rows, p₂)
    ju = lax.dot_general(rows, u, (((3,), (0,)), ((), ())), precision=HIGHEST)  # (b, A', rows, k)
    if s is None:
        return ju[:, :, 0, :]
    return jnp.einsum("bark,rk->bak", ju, s, precision=HIGHEST)


def tangent(key, diff, feature, leaves: tuple[int, ...]):
    """A standard Gaussian tangent over the differentiated leaves for one feature (JVP path);
    ``leaves``: each differentiated leaf's position among all the model's leaves."""
    fk = jax.random.fold_in(key, feature)
    return [jax.random.normal(leaf_key(fk, i), jnp.shape(d), d.dtype)
            for i, d in zip(leaves, diff, strict=True)]
