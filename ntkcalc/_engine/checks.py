"""Up-front validation of a kernel request: every error names the argument, what it received,
and what to do. Nothing here runs the model beyond abstract shape evaluation."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

from .._adapters.errors import NetCallError, constructor_hint
from .._adapters.net import Net
from .select import leaf_names


def compute_dtype() -> np.dtype:
    """float64 when JAX x64 is enabled, else float32: the dtype of every kernel ntkcalc returns."""
    return np.dtype(np.float64 if jax.config.jax_enable_x64 else np.float32)


def as_compute(tree, dtype):
    """Cast the floating leaves of ``tree`` to ``dtype``; integer leaves (token ids) stay."""

    def cast(leaf):
        if not hasattr(leaf, "dtype"):
            leaf = jnp.asarray(leaf)
        if jnp.issubdtype(leaf.dtype, jnp.floating) and leaf.dtype != dtype:
            return leaf.astype(dtype)
        return leaf

    return jax.tree_util.tree_map(cast, tree)


def check_net(net) -> Net:
    if not isinstance(net, Net):
        raise TypeError(
            f"`net` must be an ntkcalc.Net, got {type(net).__name__}. {constructor_hint(net)}"
        )
    return net


def check_finite_tree(tree, what: str) -> None:
    """Raise if a floating leaf of ``tree`` holds NaN or Inf, naming the leaf and the index."""
    names = leaf_names(tree)
    for name, leaf in zip(names, jax.tree_util.tree_leaves(tree), strict=True):
        if not jnp.issubdtype(getattr(leaf, "dtype", np.float64), jnp.inexact):
            continue
        arr = np.asarray(leaf)
        if not np.all(np.isfinite(arr)):
            bad = tuple(int(i) for i in np.argwhere(~np.isfinite(arr))[0])
            raise ValueError(
                f"`{what}` leaf {name!r} holds a non-finite value {arr[bad]} at index {bad}: "
                "a kernel of a model with NaN/Inf parameters is meaningless. Check the checkpoint "
                "or the training run that produced it."
            )


def check_inputs(x, name: str) -> np.ndarray:
    """A non-empty batch (axis 0 = examples) with finite values."""
    if isinstance(x, jax.Array):
        x = np.asarray(x)
    if not isinstance(x, np.ndarray):
        try:
            x = np.asarray(x)
        except Exception as err:  # noqa: BLE001
            raise TypeError(f"`{name}` must be an array, got {type(x).__name__}.") from err
    if x.ndim == 0:
        raise ValueError(
            f"`{name}` is a scalar: pass a batch of examples with the examples on axis 0, e.g. "
            f"`{name}[None]` for one example."
        )
    if x.shape[0] == 0:
        raise ValueError(
            f"`{name}` is an empty batch, shape {x.shape}: pass at least one example on axis 0."
        )
    if not (np.issubdtype(x.dtype, np.number) or x.dtype == np.bool_):
        raise TypeError(f"`{name}` has dtype {x.dtype}: pass numeric inputs.")
    if np.issubdtype(x.dtype, np.inexact) and not np.all(np.isfinite(x)):
        bad = tuple(int(i) for i in np.argwhere(~np.isfinite(x))[0])
        raise ValueError(
            f"`{name}` holds a non-finite value {x[bad]} at index {bad} (example {bad[0]}): "
            "remove or impute it before computing the kernel."
        )
    return x


def check_pair(x1: np.ndarray, x2: np.ndarray | None) -> None:
    if x2 is None:
        return
    if x2.shape[1:] != x1.shape[1:]:
        raise ValueError(
            f"`x2` has feature shape {x2.shape[1:]} but `x1` has {x1.shape[1:]}: both must match "
            "the model's input."
        )
    if np.issubdtype(x1.dtype, np.integer) != np.issubdtype(x2.dtype, np.integer):
        raise TypeError(
            f"`x1` has dtype {x1.dtype} but `x2` has {x2.dtype}: pass both as token ids or both "
            "as floating inputs."
        )


_OUTPUT_SIZES: dict = {}


def output_size(net: Net, params, state, x: np.ndarray, name: str) -> int:
    """Number of outputs O per example, checking that the model accepts ``x`` and keeps the batch
    on axis 0 (by abstract evaluation at batch sizes 1 and 2: no compute). Remembered per
    (model function, parameter and state shapes, input shape): repeated calls skip the tracing."""
    key = (net.call, jax.tree_util.tree_structure((params, state)),
           tuple((np.shape(v), str(getattr(v, "dtype", None) or np.asarray(v).dtype))
                 for v in jax.tree_util.tree_leaves((params, state))),
           x.shape[1:], str(x.dtype))
    if key not in _OUTPUT_SIZES:
        if len(_OUTPUT_SIZES) > 64:
            _OUTPUT_SIZES.pop(next(iter(_OUTPUT_SIZES)))
        _OUTPUT_SIZES[key] = _output_size(net, params, state, x, name)
    return _OUTPUT_SIZES[key]


def _output_size(net: Net, params, state, x: np.ndarray, name: str) -> int:
    sizes = {}
    for b in (1, 2):
        spec = jax.ShapeDtypeStruct((b,) + x.shape[1:], x.dtype)
        try:
            out = jax.eval_shape(net.call, params, state, spec)
        except NetCallError:  # the Net's configuration, not the inputs: its message says what to do
            raise
        except Exception as err:  # noqa: BLE001
            msg = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
            raise ValueError(
                f"`{name}` with feature shape {x.shape[1:]} and dtype {x.dtype} does not fit the "
                f"model: calling it on a batch of {b} raised {type(err).__name__}: {msg}. Pass "
                "inputs shaped like the model's training data, with examples on axis 0."
            ) from err
        leaves = jax.tree_util.tree_leaves(out)
        if len(leaves) != 1:
            raise ValueError(
                f"the model returned {len(leaves)} arrays; the kernel needs a single output array "
                "with the batch on axis 0. Pick one with `net.select_outputs(item=...)` (a dict "
                "key or tuple position)."
            )
        sizes[b] = leaves[0].shape
    s1, s2 = sizes[1], sizes[2]
    if len(s1) == 0 or s1[0] != 1 or s2[0] != 2 or s1[1:] != s2[1:]:
        raise ValueError(
            f"the model's outputs are not batched on axis 0: a batch of 1 gave shape {s1} and a "
            f"batch of 2 gave {s2}. Make `apply(params, x)` return (batch, ...) outputs."
        )
    if not np.issubdtype(np.dtype(leaves[0].dtype), np.inexact):
        raise TypeError(
            f"the model's outputs have dtype {leaves[0].dtype}: the kernel needs floating outputs "
            "that depend differentiably on the parameters."
        )
    return int(np.prod(s1[1:], dtype=np.int64))
