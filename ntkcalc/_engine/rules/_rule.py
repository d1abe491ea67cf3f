"""The interface every structured rule implements: one frozen object per rule, one file each.

A rule says how the derivative of the outputs with respect to a parameter leaf follows from the
one primitive that consumes it (Novak, Sohl-Dickstein & Schoenholz, "Fast Finite Width Neural
Tangent Kernel", ICML 2022, arXiv:2206.08720). Every rule can give that derivative as one VJP of
its consumer (`structured.local_vjp`, exact for a consumer linear in the leaf); a *factorable*
rule can also keep it as factors (h, g) whose kernel costs activations² rather than parameters.
"""

from __future__ import annotations

import dataclasses
import math


def elementwise_flops(out_avals) -> float:
    """FLOPs of a primitive that does O(1) work per output element: one per element (common
    practice for cost models that price matmuls and count everything else once)."""
    return float(sum(math.prod(v.shape) for v in out_avals if hasattr(v, "shape")))


@dataclasses.dataclass(frozen=True)
class Rule:
    """A structured rule. Subclasses override what their primitive needs.

    Fields:
        name: the rule's name in plan tables ("dot", "conv", "embed", "scale", "bias", "concat").
        primitives: the JAX primitive names it handles (the registry's keys).
        factorable: whether the derivative can stay factored as (h, g): then `step_sizes` and
            `factors` are defined.
    """

    name: str
    primitives: tuple[str, ...]
    factorable: bool = False

    # -- every rule -----------------------------------------------------------------------------
    def matches(self, eqn, operand: int) -> bool:
        """Whether this rule applies to ``eqn`` consuming the leaf as operand ``operand``."""
        return True

    def forward_flops(self, params, in_avals, out_aval) -> float:
        """FLOPs of one evaluation of the primitive (default: one per output element)."""
        return elementwise_flops((out_aval,))

    def local_flops(self, use) -> float:
        """FLOPs of the consumer's VJP with respect to the leaf, per output direction, over every
        step of its enclosing scans. The consumer is linear in the leaf, so its VJP costs what
        its forward pass costs (common practice; the dual of a matmul is a matmul of the same
        size)."""
        return self.forward_flops(use.params, use.in_avals, use.out_aval) * use.repeats

    # -- factorable rules -----------------------------------------------------------------------
    def step_sizes(self, use) -> tuple[int, int, int, int]:
        """(B, T, C, R) of one evaluation: batch dims with separate weights, positions summed
        over, input features, output features (``J = Σ_t h[B,t,C] g[a,B,t,R]``)."""
        raise TypeError(f"the {self.name!r} rule does not factor: check `rule.factorable` "
                        "before asking for its factors")

    def factors(self, use, operands, cot):
        """(h (B, T, C), g (A, B, T, R)) of one evaluation from the consumer's operands and the
        cotangents cot (A, *y.shape) of its output."""
        raise TypeError(f"the {self.name!r} rule does not factor: check `rule.factorable` "
                        "before asking for its factors")

    def input_gram_width(self, c: int) -> int:
        """Multiply-adds per pair of positions in the input Gram Σ_C h h' (C for features)."""
        return c

    def stored_inputs(self, c: int) -> int:
        """Entries of h stored per position (C for features)."""
        return c

    def looked_up_rows(self, use) -> int:
        """Rows of the table whose rows h indexes (integer h), or 0 when h holds features."""
        return 0

    def dense_inputs(self, h, use, dtype):
        """h as the floating (B, T, C) input of the dense derivative Σ_t h ⊗ g."""
        return h

    def bias_shape(self, use) -> tuple[int, ...] | None:
        """The shape of a bias added to this use's output that can be carried by its factors as
        the constant input 1 (see `bias.fold_biases`), or None if none can."""
        return None


def factorable(uses) -> bool:
    """Whether a leaf's derivative can stay factored: one use, by a factorable rule, through a
    chain that only permutes, relabels or negates its entries (so inner products survive)."""
    return len(uses) == 1 and uses[0].rule.factorable and uses[0].permuting
