"""The "bias" rule: a leaf added to (or subtracted from, on either side) activations, y = h + b.

Its derivative is the cotangent summed over the dims b is broadcast along, from one VJP of the
consumer (`structured.local_vjp`). When b is added right after a factorable use whose rule
accepts it (`Rule.bias_shape`: a dense layer's or a convolution's output, broadcast over its
positions only), it costs no contraction of its own: with h' = [h, 1] the factored pair (h', g)
is the derivative of [W; b], as y and y + b differ by a constant and the same cotangent g
reaches both (`fold_biases`, `with_unit_input`). b may reach the add through a chain that keeps
its entries (`structured.Use.permuting`): plain JAX's ``x @ w + b`` broadcasts b (R,) to
(1, R), flax reshapes it. Which folds a kernel uses is settled in one place for the planner and
the sketch: `fold_candidates`, then `settle_folds` once each weight's representation is chosen.
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


def fold_candidates(bias_of, groups) -> list[int | None]:
    """Per leaf: the bias its factors may carry, ``bias_of`` (`fold_biases`) where weight and
    bias are in the same group (`Selection.groups`): a kernel per group (`ntk_by_layer`) must
    not carry one group's bias in another's factors."""
    return [j if j is not None and groups[j] == groups[k] else None
            for k, j in enumerate(bias_of or (None,) * len(groups))]


# Representations of a weight that keep its factors, so that they can carry a bias.
CARRIERS = ("factored", "streamed")


def settle_folds(candidates, kinds) -> tuple[tuple[int | None, ...], tuple[str, ...]]:
    """(folds, kinds): a candidate fold stays where its weight's representation keeps factors
    (`CARRIERS`; a dense weight's bias is a leaf of its own), and its bias's kind becomes
    ``"folded"``."""
    folds = tuple(j if j is not None and kinds[k] in CARRIERS else None
                  for k, j in enumerate(candidates))
    folded = {j for j in folds if j is not None}
    return folds, tuple("folded" if k in folded else kind for k, kind in enumerate(kinds))


def with_unit_input(h):
    """Factors h (…, C) with the constant input 1 appended: (…, C + 1), carrying a folded bias."""
    return jnp.concatenate([h, jnp.ones(h.shape[:-1] + (1,), h.dtype)], axis=-1)
