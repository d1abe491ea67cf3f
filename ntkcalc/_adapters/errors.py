"""Errors about how a Net calls its model, and which constructor fits a model that is not a Net.

`NetCallError` is raised while the model is traced when the fault is in the Net's configuration
(a linen module that needs ``train=False``, an ``item`` a dict output lacks), not in the inputs:
input validation passes it through unchanged instead of blaming the input shape.
"""

from __future__ import annotations

import sys


class NetCallError(ValueError):
    """The Net's wiring of its model does not work; the message says which option to change."""


def model_kind(obj) -> str | None:
    """``"nnx"``, ``"linen"``, ``"equinox"``, ``"haiku"`` for a model of that library, else None.

    Only libraries already imported are asked (an object of a library that was never imported
    cannot exist), so none is imported here.
    """
    nnx = getattr(sys.modules.get("flax.nnx"), "Module", None)
    linen = getattr(sys.modules.get("flax.linen"), "Module", None)
    eqx = getattr(sys.modules.get("equinox"), "Module", None)
    hk = sys.modules.get("haiku")
    if nnx is not None and isinstance(obj, nnx):
        return "nnx"
    if linen is not None and isinstance(obj, linen):
        return "linen"
    if eqx is not None and isinstance(obj, eqx):
        return "equinox"
    if hk is not None and isinstance(obj, hk.Transformed | hk.TransformedWithState):
        return "haiku"
    return None


_HINTS = {
    "nnx": "`{name}` is a flax nnx module: wrap it with `ntkcalc.Net.from_nnx(model)`.",
    "linen": "`{name}` is a flax linen module: wrap it with its variables, "
             "`ntkcalc.Net.from_linen(module, variables)`.",
    "equinox": "`{name}` is an equinox module: wrap it with `ntkcalc.Net.from_equinox(model)` "
               "(`Net.from_equinox(model, state)` for a stateful one), which differentiates its "
               "floating arrays and freezes the rest.",
    "haiku": "`{name}` is a haiku transformed function: wrap it with its parameters, "
             "`ntkcalc.Net.from_haiku(transformed, params)` (and `state` for "
             "`hk.transform_with_state`).",
}
GENERIC_HINT = (
    "Wrap a function with `ntkcalc.Net(apply, params)`, a linen module with "
    "`Net.from_linen(module, variables)`, an nnx module with `Net.from_nnx(model)`, an "
    "equinox module with `Net.from_equinox(model)` or a haiku transform with "
    "`Net.from_haiku(transformed, params)`."
)


def constructor_hint(obj) -> str:
    """Which `Net` constructor fits ``obj``, passed where a Net (or its apply/params) belongs."""
    kind = model_kind(obj)
    return GENERIC_HINT if kind is None else _HINTS[kind].format(name=type(obj).__name__)
