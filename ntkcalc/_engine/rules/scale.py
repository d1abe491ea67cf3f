"""The "scale" rule: a leaf consumed by an elementwise ``mul`` (LayerNorm's scale, a gain),
y = h ⊙ w. Its derivative comes from one VJP of the consumer (`structured.local_vjp`): exact for
any consumer linear in the leaf."""

from __future__ import annotations

import dataclasses

from ._rule import Rule


@dataclasses.dataclass(frozen=True)
class Scale(Rule):
    name: str = "scale"
    primitives: tuple[str, ...] = ("mul",)


SCALE = Scale()
