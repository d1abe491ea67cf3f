"""Haiku transformed functions as Nets.

``hk.transform(f)`` gives ``apply(params, rng, x)``; ``hk.transform_with_state(f)`` gives
``apply(params, state, rng, x) -> (out, new_state)``; ``hk.without_apply_rng`` drops ``rng``. The
Net differentiates ``params`` and passes ``(state, rng)`` as frozen data: the haiku state (e.g.
BatchNorm moving averages; ``new_state`` is discarded) and the raw data of a fixed PRNG key, or
None. Keywords such as ``is_training=False`` are passed to ``apply`` on every call.
"""

from __future__ import annotations

import functools
import inspect
import numbers
from collections.abc import Mapping

import jax
import numpy as np


def _call_haiku(apply, with_state, takes_rng, impl, kwargs, params, state, x):
    hk_state, rng = state
    args = (params, hk_state) if with_state else (params,)
    if takes_rng:
        args += (None if rng is None else jax.random.wrap_key_data(rng, impl=impl),)
    out = apply(*args, x, **dict(kwargs))
    return out[0] if with_state else out


def _key_data(rng):
    """(raw key data, implementation name) of ``rng``: None, an int seed or a PRNG key."""
    if rng is None:
        return None, None
    if isinstance(rng, numbers.Integral) and not isinstance(rng, bool):
        rng = jax.random.key(int(rng))
    if isinstance(rng, jax.Array) and jax.dtypes.issubdtype(rng.dtype, jax.dtypes.prng_key):
        return jax.random.key_data(rng), str(jax.random.key_impl(rng))
    arr = np.asarray(rng)
    if arr.dtype == np.uint32 and arr.ndim == 1:
        return jax.numpy.asarray(arr), None
    raise TypeError(
        f"`rng` must be None, an int seed or a PRNG key (jax.random.key(0)), got "
        f"{type(rng).__name__}."
    )


def haiku_parts(transformed, params, state=None, *, rng=None, **apply_kwargs):
    """``(call, params, state, name)`` of `Net.from_haiku` (which documents the arguments)."""
    import haiku as hk

    if not isinstance(transformed, hk.Transformed | hk.TransformedWithState):
        raise TypeError(
            "`transformed` must be the result of `hk.transform(f)` or "
            f"`hk.transform_with_state(f)`, got {type(transformed).__name__}."
        )
    with_state = isinstance(transformed, hk.TransformedWithState)
    if with_state and isinstance(params, tuple) and len(params) == 2 and state is None:
        raise TypeError(
            "`params` is a pair: `transform_with_state(f).init` returns (params, state). Pass "
            "them apart: `Net.from_haiku(transformed, params, state)`."
        )
    if not isinstance(params, Mapping):
        raise TypeError(
            f"`params` must be the dict from `transformed.init(key, x)`, got "
            f"{type(params).__name__}."
        )
    if with_state and state is None:
        raise ValueError(
            "`transformed` is from `hk.transform_with_state`: pass its state too, "
            "`params, state = transformed.init(key, x)` and `Net.from_haiku(transformed, "
            "params, state)`."
        )
    if not with_state and state is not None:
        raise ValueError(
            "`state` was given but `transformed` is from `hk.transform`, which has none. Leave "
            "`state` out, or transform with `hk.transform_with_state`."
        )
    takes_rng = "rng" in inspect.signature(transformed.apply).parameters
    if rng is not None and not takes_rng:
        raise ValueError(
            "`rng` was given but `transformed` was wrapped with `hk.without_apply_rng`, so its "
            "apply takes no key. Leave `rng` out."
        )
    data, impl = _key_data(rng)
    call = functools.partial(_call_haiku, transformed.apply, with_state, takes_rng, impl,
                             tuple(sorted(apply_kwargs.items())))
    return (call, dict(params), (state, data), "haiku")
