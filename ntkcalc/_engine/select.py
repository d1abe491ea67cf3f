"""Which parameter leaves a kernel differentiates, and how they group into layers.

A parameter is named by the dotted path of its pytree keys (``"Dense_0.kernel"``,
``"layers.0.bias"``); flax nnx's trailing ``.value`` attribute is dropped. The ``params=`` filter of
`ntkcalc.ntk` is either a regular expression searched in that name or a predicate on it.
"""

from __future__ import annotations

import dataclasses
import re
from collections.abc import Callable

import jax
import jax.numpy as jnp
import numpy as np

ParamFilter = str | re.Pattern | Callable[[str], bool] | None


def _key_name(key) -> str | None:
    if isinstance(key, jax.tree_util.DictKey):
        return str(key.key)
    if isinstance(key, jax.tree_util.SequenceKey):
        return str(key.idx)
    if isinstance(key, jax.tree_util.GetAttrKey):
        return None if key.name == "value" else key.name
    if isinstance(key, jax.tree_util.FlattenedIndexKey):
        return str(key.key)
    return str(key)


def leaf_names(params) -> list[str]:
    """Dotted names of the leaves of ``params``, in `jax.tree_util.tree_leaves` order."""
    names = []
    for path, _ in jax.tree_util.tree_flatten_with_path(params)[0]:
        parts = [p for p in map(_key_name, path) if p is not None]
        names.append(".".join(parts) if parts else "<root>")
    return names


@dataclasses.dataclass(frozen=True)
class Selection:
    """The differentiated leaves and their groups.

    Fields:
        names: dotted name of every leaf of the params pytree.
        indices: positions (in leaf order) of the selected leaves.
        groups: group name of each selected leaf (one group, ``"all"``, unless split by layer).
        group_names: distinct group names in first-seen order.
    """

    names: tuple[str, ...]
    indices: tuple[int, ...]
    groups: tuple[str, ...]
    group_names: tuple[str, ...]

    def group_index(self) -> tuple[int, ...]:
        return tuple(self.group_names.index(g) for g in self.groups)


def _matcher(params_filter: ParamFilter) -> Callable[[str], bool]:
    if params_filter is None:
        return lambda name: True
    if isinstance(params_filter, str | re.Pattern):
        try:
            pattern = re.compile(params_filter)
        except re.error as err:
            raise ValueError(
                f"`params`={params_filter!r} is not a valid regular expression ({err}). Pass a "
                "regular expression searched in dotted parameter names, or a predicate."
            ) from None
        return lambda name: pattern.search(name) is not None
    if callable(params_filter):
        return lambda name: bool(params_filter(name))
    raise TypeError(
        f"`params` must be None, a regular expression or a predicate on the dotted parameter name, "
        f"got {type(params_filter).__name__}."
    )


def _check_depth(by_layer: bool | int) -> int:
    """The grouping depth: 0 (no grouping) for False, 1 for True, else a positive int."""
    if isinstance(by_layer, bool):
        return int(by_layer)
    if not isinstance(by_layer, int) or by_layer < 1:
        raise ValueError(
            f"`depth`={by_layer!r}: pass a positive int, the number of leading parts of the "
            "dotted parameter names that name a group (1: 'encoder', 2: 'encoder.layers')."
        )
    return by_layer


def select(params, params_filter: ParamFilter = None, *, by_layer: bool | int = False
           ) -> Selection:
    """Resolve a ``params=`` filter to the differentiated leaves of ``params``.

    Integer and boolean leaves are never differentiated: unfiltered they raise, since a kernel over
    them is undefined, and a filter can exclude them. ``by_layer`` groups the leaves by the first
    ``by_layer`` parts of their dotted names (``True`` = 1: ``"Dense_0"``; 2: ``"layers.0"``).
    """
    depth = _check_depth(by_layer)
    names = leaf_names(params)
    leaves = jax.tree_util.tree_leaves(params)
    if not leaves:
        raise ValueError("`net.params` has no leaves: there is nothing to differentiate.")
    match = _matcher(params_filter)
    indices = tuple(i for i, n in enumerate(names) if match(n))
    if not indices:
        shown = ", ".join(names[:8]) + (", ..." if len(names) > 8 else "")
        raise ValueError(
            f"`params`={params_filter!r} matches no parameter. The parameters are: {shown}. "
            "Pass a regular expression searched in these names, or a predicate on them."
        )
    for i in indices:
        dtype = leaves[i].dtype if hasattr(leaves[i], "dtype") else np.asarray(leaves[i]).dtype
        if not jnp.issubdtype(dtype, jnp.inexact):
            raise TypeError(
                f"parameter {names[i]!r} has dtype {dtype}: the kernel differentiates parameters, "
                "and an integer or boolean leaf has no derivative. Move it into the Net's frozen "
                "state, or exclude it with `params=`."
            )
    if depth:
        groups = tuple(".".join(names[i].split(".")[:depth]) for i in indices)
    else:
        groups = ("all",) * len(indices)
    group_names = tuple(dict.fromkeys(groups))
    return Selection(tuple(names), indices, groups, group_names)
