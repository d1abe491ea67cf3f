"""The "dot" rule: a leaf consumed by ``dot_general`` (dense layers, attention projections, any
einsum with a weight), y = h · W.

Per example, ``∂f_a/∂W[B, C, R] = Σ_t h[B, t, C] g[a, B, t, R]``: B the dot's batch dims (their
weights are separate), t the free dims of the other operand h (positions), C the contracted
dims, R the leaf's free dims and g = ∂f_a/∂y. It factors as (h, g) (Novak, Sohl-Dickstein &
Schoenholz, "Fast Finite Width Neural Tangent Kernel", ICML 2022, arXiv:2206.08720, §3.2).
"""

from __future__ import annotations

import dataclasses
import math

import jax.numpy as jnp

from ._rule import Rule


def _dims(use):
    """(h's contracted dims, h's batch dims, the leaf's contracted dims) of the use."""
    (lc, rc), (lb, rb) = use.params["dimension_numbers"]
    return (lc, lb, rc) if use.operand == 1 else (rc, rb, lc)


@dataclasses.dataclass(frozen=True)
class Dot(Rule):
    name: str = "dot"
    primitives: tuple[str, ...] = ("dot_general",)
    factorable: bool = True

    def forward_flops(self, params, in_avals, out_aval) -> float:
        """2 · (output elements) · (contracted size): a matmul (m, k) @ (k, n) is 2·m·n·k FLOPs
        (common practice)."""
        (lc, _), _ = params["dimension_numbers"]
        return 2.0 * math.prod(out_aval.shape) * math.prod(in_avals[0].shape[d] for d in lc)

    def step_sizes(self, use) -> tuple[int, int, int, int]:
        hc, hb, _ = _dims(use)
        shape = use.in_avals[1 - use.operand].shape
        b = math.prod(shape[d] for d in hb)
        c = math.prod(shape[d] for d in hc)
        t = math.prod(shape) // (b * c)
        r = math.prod(use.out_aval.shape) // (b * t)
        return b, t, c, r

    def factors(self, use, operands, cot):
        """(h (B, T, C), g (A, B, T, R)); cot (A, *y.shape). y's dims are (batch, lhs-free,
        rhs-free)."""
        hc, hb, pc = _dims(use)
        p_is_rhs = use.operand == 1
        h = operands[1 - use.operand]
        hf = [d for d in range(h.ndim) if d not in hc and d not in hb]
        nb, nhf = len(hb), len(hf)
        n_pf = use.in_avals[use.operand].ndim - len(pc) - nb
        b, t, c, r = self.step_sizes(use)
        h_m = jnp.transpose(h, list(hb) + hf + list(hc)).reshape(b, t, c)
        ob = list(range(1, 1 + nb))
        if p_is_rhs:
            ot = list(range(1 + nb, 1 + nb + nhf))
            op = list(range(1 + nb + nhf, 1 + nb + nhf + n_pf))
        else:
            op = list(range(1 + nb, 1 + nb + n_pf))
            ot = list(range(1 + nb + n_pf, 1 + nb + n_pf + nhf))
        g_m = jnp.transpose(cot, [0] + ob + ot + op).reshape(cot.shape[0], b, t, r)
        return h_m, g_m

    def bias_shape(self, use) -> tuple[int, ...] | None:
        """y = h·W + b with W the rhs, no batch dims, and b broadcast over the positions only:
        ``(1, …, 1, *W's free dims)``."""
        if use.operand != 1 or self.step_sizes(use)[0] != 1:
            return None
        (lc, _), _ = use.params["dimension_numbers"]
        lead = use.in_avals[0].ndim - len(lc)  # lhs-free dims come before W's free dims
        return (1,) * lead + tuple(use.out_aval.shape[lead:])


DOT = Dot()
