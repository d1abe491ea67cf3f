"""The "conv" rule: a kernel consumed by ``conv_general_dilated`` as its rhs (any strides,
padding, dilation, feature groups; not batch groups).

``y[n, s, (grp, o)] = Σ_{c,k} P[n, s, (grp, c), k] W[(c, k), (grp, o)]`` with P the image
patches, so the derivative factors as (patches, g) with positions T = (n, s), the feature groups
as batch dims B and C = (input channels per group) × window (Novak, Sohl-Dickstein & Schoenholz,
ICML 2022, arXiv:2206.08720: convolutions as dense layers over patches). A bias added to the
output folds as one more patch entry, the constant 1 (`bias.fold_biases`).
"""

from __future__ import annotations

import dataclasses
import math

import jax.numpy as jnp
from jax import lax

from ..contract import HIGHEST
from ._rule import Rule


@dataclasses.dataclass(frozen=True)
class Conv(Rule):
    name: str = "conv"
    primitives: tuple[str, ...] = ("conv_general_dilated",)
    factorable: bool = True

    def matches(self, eqn, operand: int) -> bool:
        return operand == 1 and eqn.params["batch_group_count"] == 1

    def forward_flops(self, params, in_avals, out_aval) -> float:
        """2 · (output elements) · (window × input channels per group): each output is a dot
        product over its patch (common practice)."""
        rhs = in_avals[1].shape
        cout = rhs[params["dimension_numbers"].rhs_spec[0]]
        return 2.0 * math.prod(out_aval.shape) * (math.prod(rhs) // cout)

    def step_sizes(self, use) -> tuple[int, int, int, int]:
        dn = use.params["dimension_numbers"]
        g = use.params["feature_group_count"]
        out = use.out_aval.shape
        cout = out[dn.out_spec[1]]
        return g, math.prod(out) // cout, math.prod(use.in_avals[1].shape) // cout, cout // g

    def factors(self, use, operands, cot):
        """(h (G, T, C), g (A, G, T, R)) from the patches of the lhs."""
        p = use.params
        dn = p["dimension_numbers"]
        rhs_shape = use.in_avals[1].shape
        window = tuple(rhs_shape[d] for d in dn.rhs_spec[2:])
        patches = lax.conv_general_dilated_patches(
            operands[0], window, p["window_strides"], p["padding"],
            lhs_dilation=p["lhs_dilation"], rhs_dilation=p["rhs_dilation"],
            dimension_numbers=dn, precision=HIGHEST,
        )
        groups = p["feature_group_count"]
        feat = dn.out_spec[1]
        # patches follow the output layout; features are (in-channel, window) flattened.
        pm = jnp.moveaxis(patches, feat, -1)
        pm = pm.reshape(-1, groups, pm.shape[-1] // groups)  # (T, G, C)
        a = cot.shape[0]
        gm = jnp.moveaxis(cot, 1 + feat, -1)  # (A, ..., Cout)
        gm = gm.reshape(a, -1, groups, gm.shape[-1] // groups)  # (A, T, G, R)
        return jnp.transpose(pm, (1, 0, 2)), jnp.transpose(gm, (0, 2, 1, 3))

    def bias_shape(self, use) -> tuple[int, ...] | None:
        """y = conv(x, W) + b with b broadcast over the batch and spatial dims: ones but the
        output features. A bias is the conv's extra input 1 at every position (each patch
        gains a constant 1), per feature group: output feature (grp, o) is group grp's o."""
        feat = use.params["dimension_numbers"].out_spec[1]
        return tuple(n if d == feat else 1 for d, n in enumerate(use.out_aval.shape))


CONV = Conv()
