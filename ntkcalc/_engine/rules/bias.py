"""The "bias" rule: a leaf added to (or subtracted from, on either side) activations, y = h + b.

Its derivative is the cotangent summed over the dims b is broadcast along, from one VJP of the
consumer (`structured.local_vjp`). When b is added right after a factorable use whose rule
accepts it (`Rule.bias_shape`: a dense layer's output, broadcast over its positions only), it
costs no contraction of its own: with h' = [h, 1] the factored pair (h', g) is the derivative
of [W; b], as y and y + b differ by a constant and the same cotangent g reaches both
(`fold_biases`, `with_unit_input`).
"""

from __future__ import annotations

import dataclasses

import jax.numpy as jnp

from ._rule import Rule, factorable


@dataclasses.dataclass(frozen=True)
class Bias(Rule):
    name: str = "bias"
    primitives: tuple[str, ...] = ("add", "sub")


BIAS = Bias()


def fold_biases(uses) -> tuple[int | None, ...]:
    """Per leaf: the bias leaf whose derivative its factors carry as the extra input 1, or None.

    ``uses``: per leaf, its uses (`structured.Use`). A bias folds into the weight whose use's
    output it is added to (same call, same enclosing scans), when it has that single permuting
    use by ``add``, the sum has the weight's output shape, and the bias has the shape the
    weight's rule accepts (`Rule.bias_shape`).
    """
    by_out = {}
    for k, us in enumerate(uses):
        if factorable(us) and (shape := us[0].rule.bias_shape(us[0])) is not None:
            by_out[(us[0].path[:-1], us[0].out_var)] = (k, shape)
    bias_of: list[int | None] = [None] * len(uses)
    for k, us in enumerate(uses):
        if len(us) != 1 or us[0].primitive.name != "add" or not us[0].permuting:
            continue
        u = us[0]
        w, shape = by_out.get((u.path[:-1], u.in_vars[1 - u.operand]), (None, None))
        if w is None or bias_of[w] is not None:
            continue
        wu = uses[w][0]
        if (wu.scans == u.scans and tuple(u.out_aval.shape) == tuple(wu.out_aval.shape)
                and tuple(u.in_avals[u.operand].shape) == shape):
            bias_of[w] = k
    return tuple(bias_of)


def with_unit_input(h):
    """Factors h (…, C) with the constant input 1 appended: (…, C + 1), carrying a folded bias."""
    return jnp.concatenate([h, jnp.ones(h.shape[:-1] + (1,), h.dtype)], axis=-1)
