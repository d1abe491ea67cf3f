"""Expressivity: can a linear readout of a layer's features interpolate the dataset?

A readout ``f = H w + b`` on features H (n × width) of n examples fits every target vector exactly
iff ``[H, 1]`` has rank n (row rank = n; needs width + 1 >= n). This is the interpolation condition
behind memorization results for over-parameterized networks (e.g. Zhang, Bengio, Hardt, Recht &
Vinyals, ICLR 2017; Nguyen & Hein, ICML 2018 on wide layers). Rank is numerical: it depends on a
tolerance, so the result reports the n-th singular value and its margin over the tolerance.
"""

from __future__ import annotations

import dataclasses
import functools
from collections.abc import Callable

import jax
import numpy as np
import scipy.linalg

from .._adapters import net as _net
from . import _checks
from ._batches import batch_slices, pad_rows
from ._result import Result

LAYER_NOT_FOUND = (
    "`layer`={layer!r} is not a submodule of the network. Available layers: {names}. Name a "
    "submodule by its path with '/' (e.g. 'block/Dense_0'), or pass a function "
    "features(params, x) -> H."
)


@dataclasses.dataclass(frozen=True, repr=False)
class FeatureRank(Result):
    """Numerical rank of the feature matrix ``[H, 1]`` (or ``H`` without bias).

    Fields:
        num_examples: n, the rows.
        num_features: columns (width, plus 1 for the bias column).
        rank: number of singular values above ``tol``.
        full_rank: ``rank == n``: a linear readout can interpolate any targets.
        sigma_max: largest singular value.
        sigma_min: the n-th largest singular value (0.0 when there are fewer than n columns).
        tol: the tolerance (default ``σ_max·max(n, columns)·eps``, the NumPy ``matrix_rank``
            convention).
        margin: ``sigma_min / tol``; full rank iff > 1, and a margin near 1 means the verdict
            hangs on the tolerance.
        bias: whether the ones column was appended.
        layer: the layer name, or None.
    """

    num_examples: int
    num_features: int
    rank: int
    full_rank: bool
    sigma_max: float
    sigma_min: float
    tol: float
    margin: float
    bias: bool
    layer: str | None = None


def feature_rank_of(h, *, bias: bool = True, tol: float | None = None) -> FeatureRank:
    """Numerical rank of ``[H, 1]`` for features ``h`` of shape (n, ...) (flattened to (n, w)).

    Singular values by LAPACK in float64 (``scipy.linalg.svdvals``).
    """
    h = _checks.finite_array("h", h)
    if h.ndim < 2 or h.shape[0] == 0:
        raise ValueError(f"`h` must be (n, width) features with n >= 1, got shape {h.shape}.")
    h = h.reshape(h.shape[0], -1)
    if bias:
        h = np.concatenate([h, np.ones((h.shape[0], 1))], axis=1)
    n, w = h.shape
    s = scipy.linalg.svdvals(h, check_finite=False)
    used = s[0] * max(n, w) * np.finfo(np.float64).eps if tol is None else float(
        _checks.nonnegative("tol", tol))
    rank = int(np.count_nonzero(s > used))
    sigma_min = float(s[n - 1]) if w >= n else 0.0
    margin = sigma_min / used if used > 0 else (np.inf if sigma_min > 0 else 0.0)
    return FeatureRank(
        num_examples=n, num_features=w, rank=rank, full_rank=rank == n, sigma_max=float(s[0]),
        sigma_min=sigma_min, tol=float(used), margin=float(margin), bias=bias,
    )


def _tree_names(tree, prefix=()) -> dict:
    """Submodule paths that recorded a ``__call__`` output, from a nested dict of intermediates."""
    found = {}
    for key, value in tree.items():
        if key == "__call__":
            if prefix:
                found["/".join(map(str, prefix))] = prefix
        elif hasattr(value, "items"):
            found.update(_tree_names(value, (*prefix, key)))
    return found


def _linen_features(module, trainable, apply_kwargs, path, params, state, x):
    variables = {**state, trainable: params}
    _, inter = module.apply(variables, x, capture_intermediates=True, mutable=["intermediates"],
                            **dict(apply_kwargs))
    node = inter["intermediates"]
    for part in path:
        node = node[part]
    return node["__call__"][0]


def _nnx_intermediates(graphdef, params, state, x) -> dict:
    from flax import nnx

    model = nnx.merge(graphdef, params, state)  # a fresh copy: the caller's model is untouched
    _, inter = nnx.capture(model, nnx.Intermediate, method_outputs=nnx.Intermediate)(x)
    return {tuple(k): v.get_value()[0] for k, v in nnx.to_flat_state(inter)}


def _nnx_features(graphdef, path, params, state, x):
    return _nnx_intermediates(graphdef, params, state, x)[(*path, "__call__")]


def _named_layer(net, layer: str, x1) -> Callable:
    """``features(params, state, x)`` for the submodule named ``layer``."""
    call = net.call
    func = getattr(call, "func", None)
    if func is _net._call_linen:
        module, trainable, apply_kwargs = call.args
        _, inter = module.apply({**net.state, trainable: net.params}, x1,
                                capture_intermediates=True, mutable=["intermediates"],
                                **dict(apply_kwargs))
        names = _tree_names(inter["intermediates"])
        make = functools.partial(_linen_features, module, trainable, apply_kwargs)
    elif func is _net._call_nnx:
        (graphdef,) = call.args
        flat = _nnx_intermediates(graphdef, net.params, net.state, x1)
        nested = {}
        for key in flat:
            node = nested
            for part in key[:-1]:
                node = node.setdefault(part, {})
            node[key[-1]] = True
        names = _tree_names(nested)
        make = functools.partial(_nnx_features, graphdef)
    else:
        raise TypeError(
            f"`layer`={layer!r} names a submodule, but this Net wraps a plain function with no "
            "submodules. Pass `layer` as a function features(params, x) -> H."
        )
    if layer not in names:
        raise ValueError(LAYER_NOT_FOUND.format(layer=layer, names=", ".join(names) or "none"))
    return functools.partial(make, names[layer])


def feature_rank(
    net,
    x,
    *,
    layer: str | Callable,
    bias: bool = True,
    tol: float | None = None,
    batch: int = 1024,
) -> FeatureRank:
    """Numerical rank of ``[H, 1]``, H the outputs of one layer of ``net`` over the dataset ``x``.

    Args:
        net: an `ntkcalc.Net`.
        x: (n, ...) inputs.
        layer: a function ``features(params, x) -> H`` (batch on axis 0), or the name of a
            submodule: for linen Nets the path of its ``__call__`` output as recorded by
            ``capture_intermediates`` (e.g. "Dense_1", "block/Dense_0"); for nnx Nets its
            attribute path (e.g. "linear1", "layers/0"), captured with ``nnx.capture`` on a
            fresh copy of the model.
        bias: append a ones column (the readout's bias).
        tol: rank tolerance (default ``σ_max·max(n, columns)·eps``).
        batch: examples per forward pass (the last batch is padded), so large n fits memory;
            the features themselves (n × width float64) must fit.

    Returns:
        `FeatureRank` with ``layer`` set to the name (or the function's name).
    """
    batch = _checks.positive_int("batch", batch)
    x = _checks.examples("x", x)
    if callable(layer):
        user = layer

        def features(params, state, xb):
            del state
            return user(params, xb)

        label = getattr(layer, "__name__", type(layer).__name__)
    elif isinstance(layer, str):
        features, label = _named_layer(net, layer, x[:1]), layer
    else:
        raise TypeError(
            f"`layer` must be a submodule name (str) or a function features(params, x) -> H, "
            f"got {type(layer).__name__}."
        )
    size = min(batch, x.shape[0])
    jitted = jax.jit(features)
    rows = []
    for start, stop in batch_slices(x.shape[0], size):
        out = jitted(net.params, net.state, pad_rows(x[start:stop], size))
        rows.append(np.asarray(out, dtype=np.float64).reshape(size, -1)[: stop - start])
    result = feature_rank_of(np.concatenate(rows), bias=bias, tol=tol)
    return dataclasses.replace(result, layer=label)
