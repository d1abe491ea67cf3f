"""Picking the outputs a kernel is taken of: one entry of a dict or tuple output, and a subset of
the output axes.

A model may return a dict (``{"logits": ..., "aux": ...}``), a tuple ``(logits, hidden)`` or
nested containers of them, and its main output may have more axes than the study needs (all
vocabulary logits at every token position). `Net.select_outputs` wraps the Net's ``call`` with
`pick`, so every method and outputs mode of the kernel sees only the chosen array: the Jacobian is
taken of f_S(x) = f(x)[item][:, index] and nothing outside it is differentiated.
"""

from __future__ import annotations

import functools
import numbers
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from .errors import NetCallError

Item = str | int | Sequence[str | int] | None


def check_item(item) -> tuple:
    """``item`` as a path of keys: ``"logits"`` → ``("logits",)``; a list is a nested path."""
    if item is None:
        return ()
    path = tuple(item) if isinstance(item, list | tuple) else (item,)
    if not path:
        raise ValueError("`item` is an empty path: pass a key, a position, or leave it out.")
    for part in path:
        if isinstance(part, bool) or not isinstance(part, str | numbers.Integral):
            raise TypeError(
                f"`item`={item!r} holds {part!r} ({type(part).__name__}): pass a dict key (str), "
                "a tuple position (int), or a list of them for a nested output."
            )
    return path


def _check_index_part(part, index):
    if part is Ellipsis or isinstance(part, slice):
        return part
    if isinstance(part, bool) or part is None:
        raise TypeError(
            f"`index`={index!r} holds {part!r}: an index may hold integers, slices, ``...`` and "
            "integer or boolean arrays, e.g. `np.s_[-1, :]` or `[3, 7]`."
        )
    if isinstance(part, numbers.Integral):
        return int(part)
    arr = np.asarray(part)
    if arr.dtype == np.bool_ or np.issubdtype(arr.dtype, np.integer):
        if arr.size == 0:
            raise ValueError(f"`index`={index!r} selects no output: pass at least one position.")
        return arr
    raise TypeError(
        f"`index`={index!r} holds {part!r} of dtype {arr.dtype}: pass integers, slices, ``...`` "
        "or integer/boolean arrays."
    )


def check_index(index) -> tuple | None:
    """``index`` as a tuple over the per-example output axes (the batch axis is never indexed)."""
    if index is None:
        return None
    parts = index if isinstance(index, tuple) else (index,)
    return tuple(_check_index_part(p, index) for p in parts)


def _describe(out) -> str:
    if isinstance(out, Mapping):
        return f"a dict with keys {sorted(map(str, out))}"
    if isinstance(out, tuple | list):
        return f"a {type(out).__name__} of {len(out)}"
    return f"an array of shape {tuple(getattr(out, 'shape', ()))}"


def _take(out, path: tuple):
    node = out
    for depth, part in enumerate(path):
        where = "the model's output" if depth == 0 else f"output {list(path[:depth])!r}"
        if isinstance(node, Mapping):
            if part not in node:
                raise NetCallError(
                    f"`item`={list(path)!r}: {where} is {_describe(node)}, with no key {part!r}. "
                    "Pass one of its keys to `net.select_outputs(item=...)`."
                )
        elif isinstance(node, tuple | list):
            if not isinstance(part, numbers.Integral) or not -len(node) <= part < len(node):
                raise NetCallError(
                    f"`item`={list(path)!r}: {where} is {_describe(node)}, with no position "
                    f"{part!r}. Pass a position in range to `net.select_outputs(item=...)`."
                )
        else:
            raise NetCallError(
                f"`item`={list(path)!r}: {where} is {_describe(node)}, not a dict or tuple. "
                "Leave `item` out, or pass a shorter path."
            )
        node = node[part]
    return node


def _width(part) -> int:
    """How many axes an index part consumes (a boolean mask covers its own rank)."""
    if part is Ellipsis:
        return 0
    return part.ndim if isinstance(part, np.ndarray) and part.dtype == np.bool_ else 1


def _out_of_bounds(index: tuple, shape: tuple) -> str | None:
    """Why ``index`` does not fit per-example ``shape``, or None. JAX clamps out-of-range
    integer indices instead of raising, so the bounds are checked here."""
    if sum(p is Ellipsis for p in index) > 1:
        return "it holds more than one `...`"
    used = sum(map(_width, index))
    if used > len(shape):
        return f"it indexes {used} axes and the output has {len(shape)}"
    axis = 0
    for i, part in enumerate(index):
        if part is Ellipsis:
            axis = len(shape) - sum(_width(p) for p in index[i + 1:])
            continue
        n = shape[axis]
        if isinstance(part, np.ndarray) and part.dtype == np.bool_:
            if part.shape != shape[axis: axis + part.ndim]:
                return f"a mask of shape {part.shape} is laid over axes of {shape[axis:]}"
        elif isinstance(part, int | np.ndarray) and (np.min(part) < -n or np.max(part) >= n):
            shown = part.tolist() if isinstance(part, np.ndarray) else part
            return f"position {shown} is out of range for an axis of length {n}"
        axis += _width(part)
    return None


def _index(out, index: tuple):
    shape = tuple(getattr(out, "shape", ()))
    if len(shape) < 2:
        raise NetCallError(
            f"`index`={index!r}: the model's output has shape {shape}, with no axis past the "
            "batch axis to index. Leave `index` out."
        )
    problem = _out_of_bounds(index, shape[1:])
    if problem is not None:
        raise NetCallError(
            f"`index`={index!r} does not fit the model's per-example output shape {shape[1:]}: "
            f"{problem}. Index the axes after the batch axis, e.g. `np.s_[-1, :]` for the last "
            "token position or `[3, 7]` for two classes."
        )
    picked = out[(slice(None),) + index]
    if picked.ndim == 0 or picked.shape[0] != shape[0]:
        raise NetCallError(
            f"`index`={index!r} mixes the batch axis into the output (shape {picked.shape} from "
            f"{shape}). Index only the per-example axes."
        )
    return picked


def pick(call, path: tuple, index: tuple | None, params, state, x) -> Any:
    """``call(params, state, x)`` reduced to ``out[path][:, index]``; errors name the option."""
    out = _take(call(params, state, x), path)
    return out if index is None else _index(out, index)


def picking(call, item: Item, index) -> Any:
    """A ``call`` wrapped to return the chosen output (validated up front)."""
    path, idx = check_item(item), check_index(index)
    if not path and idx is None:
        raise ValueError(
            "`net.select_outputs()` got neither `item` nor `index`: pass `item=` (a key or "
            "position of a dict/tuple output) and/or `index=` (an index of the output axes)."
        )
    return functools.partial(pick, call, path, idx)
