"""The "embed" rule: a table read by a ``gather`` of whole rows, y[t] = E[idx_t] (an embedding
lookup, ``jnp.take``, equinox's ``Embedding`` under vmap).

The lookup is one_hot(idx) @ E, so it factors like a dense layer whose inputs are one-hot rows:
h holds the row indices (T of them) and the input Gram is the comparison
``[idx_t = idx'_s ≥ 0]`` (`contract._input_gram`), never a product over the V rows. The dense
derivative forms the one-hot rows (`dense_inputs`).
"""

from __future__ import annotations

import dataclasses
import math

import jax
import jax.numpy as jnp
from jax import lax

from ._rule import Rule


def row_gather(params, operand, indices) -> bool:
    """Whether a gather picks whole rows ``operand[idx]`` (an embedding lookup, ``jnp.take``).

    Also the form ``operand[idx, 0:D]`` (equinox's ``Embedding`` under vmap): a start index on a
    dimension sliced whole is clipped to 0, so only the row index matters.
    """
    dn = params["dimension_numbers"]
    rest = tuple(operand.shape[1:])
    dims = tuple(dn.start_index_map)
    collapsed = tuple(dn.collapsed_slice_dims)
    out_nd = indices.ndim - 1 + operand.ndim - len(collapsed)
    return (
        indices.ndim >= 1 and 0 in dims and indices.shape[-1] == len(dims)
        and (len(dims) == 1 or params["mode"] == lax.GatherScatterMode.CLIP)
        and collapsed in ((0,), ())
        and tuple(dn.operand_batching_dims) == () and tuple(dn.start_indices_batching_dims) == ()
        and tuple(params["slice_sizes"]) == (1, *rest)
        and tuple(dn.offset_dims) == tuple(range(indices.ndim - 1, out_nd))
    )


@dataclasses.dataclass(frozen=True)
class Embed(Rule):
    name: str = "embed"
    primitives: tuple[str, ...] = ("gather",)
    factorable: bool = True

    def matches(self, eqn, operand: int) -> bool:
        return operand == 0 and row_gather(eqn.params, eqn.invars[0].aval, eqn.invars[1].aval)

    def step_sizes(self, use) -> tuple[int, int, int, int]:
        """B = 1, T = looked-up positions, C = V rows of the table, R = row size."""
        table, indices = use.in_avals
        return 1, math.prod(indices.shape[:-1]), table.shape[0], math.prod(table.shape[1:])

    def factors(self, use, operands, cot):
        """(idx (1, T) int32, g (A, 1, T, R)): ``idx`` is the row each position reads after the
        gather's own index handling (clipped, or -1 for an out-of-range index under fill mode,
        whose output does not depend on the rows)."""
        _, indices = operands
        v = use.in_avals[0].shape[0]
        row = tuple(use.params["dimension_numbers"].start_index_map).index(0)
        idx = indices[..., row].reshape(1, -1).astype(jnp.int32)
        if use.params["mode"] == lax.GatherScatterMode.FILL_OR_DROP:
            idx = jnp.where((idx >= 0) & (idx < v), idx, -1)
        else:
            idx = jnp.clip(idx, 0, v - 1)
        return idx, cot.reshape(cot.shape[0], 1, idx.shape[1], -1)

    def input_gram_width(self, c: int) -> int:
        """0: the input Gram of looked-up rows is a comparison of indices, not a product."""
        return 0

    def stored_inputs(self, c: int) -> int:
        """1: one row index per position."""
        return 1

    def looked_up_rows(self, use) -> int:
        """V: h holds indices of the table's rows."""
        return use.in_avals[0].shape[0]

    def dense_inputs(self, h, use, dtype):
        """The looked-up rows as one-hot vectors (an index of -1 gives a zero row)."""
        return jax.nn.one_hot(h, use.in_avals[0].shape[0], dtype=dtype)


EMBED = Embed()
