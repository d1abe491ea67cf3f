"""Equinox modules as Nets.

An equinox model is a pytree that mixes what is trained (floating arrays) with what is not
(activation functions, sizes, integer buffers, ``eqx.nn.StateIndex`` markers). The Net splits it
with ``eqx.partition``:

- ``params``: the inexact (floating) arrays, ``eqx.is_inexact_array``;
- ``state``: ``(frozen, model_state)``: the model's other arrays (integer or boolean buffers)
  and the ``eqx.nn.State`` of a stateful model (``eqx.nn.make_with_state``), both passed to the
  compiled kernel as data;
- the rest (functions, sizes, the tree structure) is held in ``call``'s closure.

This is equinox's own split, so the parameters of a later checkpoint of the same model,
``eqx.filter(trained, eqx.is_inexact_array)``, have the same tree structure, and
``net.replace(params=...)`` with them reuses the compiled kernel. Equinox layers map one
example; the Net maps them over the batch with ``jax.vmap`` (``batched=True`` for a model that
takes the whole batch).
"""

from __future__ import annotations

import functools
import inspect

import jax

from .errors import NetCallError


def _is_state_index(node) -> bool:
    import equinox as eqx

    return isinstance(node, eqx.nn.StateIndex)


def _call_equinox(static, stateful, batched, kwargs, params, state, x):
    import equinox as eqx

    frozen, model_state = state
    model = eqx.combine(params, frozen, static)
    kwargs = dict(kwargs)

    def run(xi):
        if not stateful:
            return model(xi, **kwargs)
        out = model(xi, model_state, **kwargs)
        if not (isinstance(out, tuple) and len(out) == 2):
            raise NetCallError(
                f"a stateful equinox model must return (output, state), but {type(model).__name__}"
                f" returned {type(out).__name__}. Pass `state` only for models called as "
                "`model(x, state)`."
            )
        return out[0]

    return run(x) if batched else jax.vmap(run)(x)


def _check_call_arguments(model, stateful: bool, kwargs: dict) -> None:
    """The model's ``__call__`` gets x (and the state): other required arguments must be given."""
    try:
        sig = inspect.signature(model.__call__)
    except (TypeError, ValueError):
        return
    given = 2 if stateful else 1
    positional = [p for p in sig.parameters.values()
                  if p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD)]
    required = [p.name for p in sig.parameters.values() if p.default is p.empty
                and p.kind not in (p.VAR_POSITIONAL, p.VAR_KEYWORD)]
    missing = [n for n in required[given:] if n not in kwargs]
    if missing:
        raise TypeError(
            f"{type(model).__name__}.__call__ requires {missing}, which the Net does not pass: "
            "give them as keywords, e.g. `Net.from_equinox(model, key=jax.random.key(0))`; they "
            "are passed on every call."
        )
    if stateful and len(positional) < 2 and not any(
            p.kind is p.VAR_POSITIONAL for p in sig.parameters.values()):
        raise TypeError(
            f"`state` was given but {type(model).__name__}.__call__ takes one positional "
            "argument: a stateful model is called as `model(x, state)`. Leave `state` out."
        )


def equinox_parts(model, state=None, *, batched: bool = False, inference: bool = True,
                  **call_kwargs):
    """``(call, params, state, name)`` of `Net.from_equinox` (which documents the arguments)."""
    import equinox as eqx

    if not isinstance(model, eqx.Module) or not callable(model):
        raise TypeError(
            f"`model` must be a callable equinox Module, got {type(model).__name__}. "
            "For a plain function use `ntkcalc.Net(apply, params)`."
        )
    has_state = any(_is_state_index(n) for n in
                    jax.tree_util.tree_leaves(model, is_leaf=_is_state_index))
    if has_state and state is None:
        raise ValueError(
            f"{type(model).__name__} holds stateful layers (eqx.nn.StateIndex, e.g. BatchNorm): "
            "pass the state from `model, state = eqx.nn.make_with_state(Model)(...)` as "
            "`Net.from_equinox(model, state)`."
        )
    if state is not None and not isinstance(state, eqx.nn.State):
        raise TypeError(
            f"`state` must be an eqx.nn.State (from `eqx.nn.make_with_state`), got "
            f"{type(state).__name__}."
        )
    _check_call_arguments(model, state is not None, call_kwargs)
    if inference:
        model = eqx.nn.inference_mode(model, True)
    params, rest = eqx.partition(model, eqx.is_inexact_array)
    frozen, static = eqx.partition(rest, eqx.is_array)
    call = functools.partial(_call_equinox, static, state is not None, bool(batched),
                             tuple(sorted(call_kwargs.items())))
    return (call, params, (frozen, state), type(model).__name__)
