"""Structured rules, one file each, registered by the primitive that consumes the leaf.

Every rule is a small frozen object (`Rule`): which primitives it handles, whether it applies to
a given use (`matches`), its primitive's forward FLOPs, the FLOPs of its VJP with respect to the
leaf, and, if it factors, its factors (h, g) and their sizes (B, T, C, R). The walk in
`structured` asks `rule_for`; the cost model asks `forward_flops`. A primitive without a rule is
never handled by another rule: its leaf falls back to the exact Jacobian.

Adding a rule: a file here with a `Rule` subclass and its instance, one line in `RULES`, the
expected rule of a leaf in tests/test_structured.py and a model that exercises it there.
"""

from __future__ import annotations

from ._rule import Rule as Rule
from ._rule import elementwise_flops
from ._rule import factorable as factorable
from .bias import BIAS
from .concat import CONCAT
from .conv import CONV
from .dot import DOT
from .embed import EMBED
from .scale import SCALE

RULES: dict[str, Rule] = {
    prim: rule for rule in (DOT, CONV, EMBED, SCALE, BIAS, CONCAT) for prim in rule.primitives
}


def rule_for(eqn, operand: int) -> Rule | None:
    """The rule for ``eqn`` consuming a leaf as operand ``operand``, or None (fall back)."""
    rule = RULES.get(eqn.primitive.name)
    return rule if rule is not None and rule.matches(eqn, operand) else None


def forward_flops(eqn) -> float:
    """FLOPs of one evaluation of ``eqn``: its rule's formula, else one per output element."""
    rule = RULES.get(eqn.primitive.name)
    if rule is None:
        return elementwise_flops([v.aval for v in eqn.outvars])
    return rule.forward_flops(eqn.params, tuple(v.aval for v in eqn.invars), eqn.outvars[0].aval)
