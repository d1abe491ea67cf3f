"""The "concat" rule: a leaf concatenated with activations (a class token prepended to a
sequence); its derivative is the matching slice of the cotangent, from one VJP of the consumer
(`structured.local_vjp`)."""

from __future__ import annotations

import dataclasses

from ._rule import Rule


@dataclasses.dataclass(frozen=True)
class Concat(Rule):
    name: str = "concat"
    primitives: tuple[str, ...] = ("concatenate",)


CONCAT = Concat()
