"""Expressivity: can a linear readout of a layer's features interpolate the dataset?

A readout ``f = H w + b`` on features H (n × width) of n examples fits every target vector exactly
iff ``[H, 1]`` has rank n (row rank = n; needs width + 1 >= n). This is the interpolation condition
behind memorization results for over-parameterized networks (e.g. Zhang, Bengio, Hardt, Recht &
Vinyals, ICLR 2017; Nguyen & Hein, ICML 2018 on wide layers). By default H is what the model's
final linear readout reads: the post-activation features of the last hidden layer, found in the
traced model (`readout`). Rank is numerical: its tolerance and whether the verdict holds at the
features' precision follow the one rule of `rank`. Beside it, λ_min of the NTK Gram over the same
examples: gradient descent on the squared loss converges linearly when it is positive (Du, Zhai,
Poczos & Singh, ICLR 2019, arXiv:1810.02054). The condition holds for *generic* weights; checking
it on several random initializations (`feature_rank_over_inits`) gives the fraction that pass.
"""

from __future__ import annotations

import dataclasses
import functools
from collections.abc import Callable
from typing import Literal

import jax
import numpy as np
import scipy.linalg

from .._adapters import net as _net
from .._engine.checks import as_compute, check_net
from .._engine.options import check_choice
from .._kernel import Precision, ntk, precision_scope
from . import _checks
from ._batches import batch_slices, pad_rows
from ._result import Result
from .rank import precision_of, rank_verdict
from .readout import readout_features
from .spectrum import Spectrum, spectrum

LAYER_NOT_FOUND = (
    "`layer`={layer!r} is not a submodule of the network. Available layers: {names}. Name a "
    "submodule by its path with '/' (e.g. 'block/Dense_0'), use the default 'readout' (the "
    "input of the final linear layer), or pass a function features(params, x) -> H."
)

#: Layer classes (flax linen and nnx) whose output is affine in their input: a pre-activation.
AFFINE_LAYERS = frozenset({"Dense", "DenseGeneral", "Linear", "LinearGeneral", "Einsum", "Conv",
                           "ConvTranspose", "Embed"})

NtkGram = Literal["auto", "full", "none"]
#: ``ntk_gram="auto"`` computes the (N·O, N·O) NTK Gram up to this many rows (≈ 34 MB float64).
AUTO_GRAM_ROWS = 2048

FULL = "full rank: a linear readout of these features can fit any targets on these examples"
DEFICIENT = (
    "not full rank ({rank} of {n}): a linear readout of these features cannot fit every target"
)
TOO_NARROW = (
    "full rank is impossible: {what} has {width} features{plus} < n = {n} examples, so a linear "
    "readout cannot fit every target (widen the layer or use at most {width_b} examples)"
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
        tol: the tolerance (default ``σ_max·max(n, columns)·ε`` with ε of ``precision``, the
            NumPy ``matrix_rank`` convention).
        margin: ``sigma_min / tol``; full rank iff > 1, and a margin near 1 means the verdict
            hangs on the tolerance.
        bias: whether the ones column was appended.
        layer: the layer name (``"readout"``, a submodule path, a function's name), or None.
        precision: the dtype the features were computed in, whose ε sets the tolerance.
        reliable: whether the rank verdict holds at that precision (no counted singular value
            within 10× the tolerance; the rule in ``ntkcalc/_analysis/rank.py``).
        caution: why not, in words (also raised as a RuntimeWarning); else None.
        verdict: the answer in one sentence: full rank, not full rank, or impossible because
            the layer has fewer features (+1 with bias) than examples.
        features: which features were measured, in words (e.g. the readout's post-activation
            input, or a submodule's output as it returns it).
        ntk_lambda_min: λ_min of the NTK Gram (N·O, N·O) over the same examples (``"full"``
            kernel; ``spectrum``), or None when not computed.
        ntk_spectrum: that Gram's `Spectrum` (rank, condition number, reliability), or None.
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
    precision: str = "float64"
    reliable: bool = True
    caution: str | None = None
    verdict: str = ""
    features: str = "given features"
    ntk_lambda_min: float | None = None
    ntk_spectrum: Spectrum | None = None


def feature_rank_of(
    h, *, bias: bool = True, tol: float | None = None, precision: str | None = None
) -> FeatureRank:
    """Numerical rank of ``[H, 1]`` for features ``h`` of shape (n, ...) (flattened to (n, w)).

    Singular values by LAPACK in float64 (``scipy.linalg.svdvals``); the tolerance
    ``σ_max·max(n, w)·ε`` uses ε of the precision the features were computed in (their dtype,
    or ``precision`` when they were upcast), and the verdict says when that precision cannot
    settle it (``reliable``, ``caution``, a RuntimeWarning).

    Args:
        h: (n, ...) features, one row per example.
        bias: append a ones column (the readout's bias).
        tol: absolute rank tolerance instead of the default.
        precision: the dtype ``h`` was computed in (``"float32"``, ``"float64"``), when it
            differs from ``h.dtype``.
    """
    dtype = precision_of(h, precision)
    return _rank_of(h, bias=bias, tol=tol, dtype=dtype, label="the features", stacklevel=4)


def _rank_of(h, *, bias, tol, dtype, label, stacklevel) -> FeatureRank:
    h = _checks.finite_array("h", h)
    if h.ndim < 2 or h.shape[0] == 0:
        raise ValueError(f"`h` must be (n, width) features with n >= 1, got shape {h.shape}.")
    if tol is not None:
        tol = float(_checks.nonnegative("tol", tol))
    h = h.reshape(h.shape[0], -1)
    width = h.shape[1]
    if bias:
        h = np.concatenate([h, np.ones((h.shape[0], 1))], axis=1)
    n, w = h.shape
    s = scipy.linalg.svdvals(h, check_finite=False)
    v = rank_verdict(s, size=n, shape=(n, w), precision=dtype, tol=tol,
                     what=f"feature rank of {label}", stacklevel=stacklevel)
    sigma_min = float(s[n - 1]) if w >= n else 0.0
    margin = sigma_min / v.tol if v.tol > 0 else (np.inf if sigma_min > 0 else 0.0)
    if w < n:
        verdict = TOO_NARROW.format(what=label, width=width,
                                    plus=" + 1" if bias else "", n=n, width_b=w)
    else:
        verdict = FULL if v.full_rank else DEFICIENT.format(rank=v.rank, n=n)
    return FeatureRank(
        num_examples=n, num_features=w, rank=v.rank, full_rank=v.full_rank,
        sigma_max=float(s[0]), sigma_min=sigma_min, tol=v.tol, margin=float(margin), bias=bias,
        precision=v.precision, reliable=v.reliable, caution=v.caution, verdict=verdict,
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


def _linen_classes(module, variables, x1, apply_kwargs) -> dict[str, str]:
    """``{submodule path: class name}`` of the submodules a linen call runs."""
    from flax import linen as nn

    found = {}

    def record(f, args, kwargs, context):
        if context.method_name == "__call__" and context.module.path:
            found["/".join(map(str, context.module.path))] = type(context.module).__name__
        return f(*args, **kwargs)

    with nn.intercept_methods(record):
        module.apply(variables, x1, **dict(apply_kwargs))
    return found


def _nnx_classes(graphdef, params, state) -> dict[str, str]:
    """``{attribute path: class name}`` of an nnx model's submodules (on a fresh copy)."""
    from flax import nnx

    model = nnx.merge(graphdef, params, state)
    return {"/".join(map(str, path)): type(node).__name__
            for path, node in nnx.iter_graph(model) if path and isinstance(node, nnx.Module)}


def _named_layer(net, layer: str, x1, params, state) -> tuple[Callable, str]:
    """``features(params, state, x)`` for the submodule named ``layer``, and its class name."""
    call = net.call
    func = getattr(call, "func", None)
    if func is _net._call_linen:
        module, trainable, apply_kwargs = call.args
        variables = {**state, trainable: params}
        _, inter = module.apply(variables, x1, capture_intermediates=True,
                                mutable=["intermediates"], **dict(apply_kwargs))
        names = _tree_names(inter["intermediates"])
        make = functools.partial(_linen_features, module, trainable, apply_kwargs)
        classes = functools.partial(_linen_classes, module, variables, x1, apply_kwargs)
    elif func is _net._call_nnx:
        (graphdef,) = call.args
        classes = functools.partial(_nnx_classes, graphdef, params, state)
        flat = _nnx_intermediates(graphdef, params, state, x1)
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
    return functools.partial(make, names[layer]), classes().get(layer, "module")


def feature_rank(
    net,
    x,
    *,
    layer: str | Callable = "readout",
    bias: bool = True,
    tol: float | None = None,
    batch: int = 1024,
    dtype: Precision | None = None,
    ntk_gram: NtkGram = "auto",
) -> FeatureRank:
    """The interpolation check: numerical rank of ``[H, 1]`` over the dataset ``x``, with λ_min of
    the NTK Gram beside it.

    Args:
        net: an `ntkcalc.Net`.
        x: (n, ...) inputs.
        layer: which features H:

            - ``"readout"`` (default): the input of the model's final linear readout
              (``f = H W + b`` up to a fixed scale, found in the traced model): the
              post-activation features of the last hidden layer.
            - a submodule name: that submodule's output *as it returns it*: for linen the
              ``__call__`` output recorded by ``capture_intermediates`` (e.g. "Dense_1",
              "block/Dense_0"), for nnx its attribute path (e.g. "linear1", "layers/0"),
              captured with ``nnx.capture`` on a fresh copy of the model. A ``Dense``/``Linear``
              submodule returns its pre-activation ``x W + b``, not the features after the
              nonlinearity. Linen names submodules in the order they are *constructed*: in
              ``nn.Dense(4)(nn.tanh(nn.Dense(256)(x)))`` the readout ``Dense(4)`` is
              ``"Dense_0"`` and the hidden layer ``"Dense_1"``. The result's ``features``
              names the submodule's class and says when its output is affine (pre-activation).
            - a function ``features(params, x) -> H`` (batch on axis 0).
        bias: append a ones column (the readout's bias).
        tol: rank tolerance (default ``σ_max·max(n, columns)·ε``, ε of the features' dtype).
        batch: examples per forward pass (the last batch is padded), so large n fits memory;
            the features themselves (n × width float64) must fit.
        dtype: compute features (and the NTK Gram) in ``"float64"`` without JAX's global x64
            switch, or ``"float32"``; None follows the switch (see `ntkcalc.ntk`). float32
            features carry rounding near 1e-7 of σ_max: small singular values are unreliable.
        ntk_gram: ``"full"`` computes the (N·O, N·O) NTK Gram with `ntkcalc.ntk` (outputs
            ``"full"``) and reports its λ_min and `Spectrum`; ``"none"`` skips it; ``"auto"``
            (default) computes it when N·O <= 2048 (a kernel of that size costs seconds on a
            laptop for small networks; larger ones can take much longer than the features).

    Returns:
        `FeatureRank` with ``layer``, ``features``, ``precision``, ``reliable``, ``verdict`` and,
        when computed, ``ntk_lambda_min`` and ``ntk_spectrum``.
    """
    net = check_net(net)
    batch = _checks.positive_int("batch", batch)
    x = _checks.examples("x", x)
    check_choice("ntk_gram", ntk_gram, ("auto", "full", "none"))
    if not (callable(layer) or isinstance(layer, str)):
        raise TypeError(
            f"`layer` must be 'readout', a submodule name (str) or a function "
            f"features(params, x) -> H, got {type(layer).__name__}."
        )
    with precision_scope(dtype):
        cast = _cast(dtype)
        params, state, xc = cast(net.params), cast(net.state), cast(x)
        features, label, described = _features_of(net, layer, params, state, xc[:1])
        size = min(batch, x.shape[0])
        jitted = jax.jit(features)
        rows, out_dtype = [], None
        for start, stop in batch_slices(x.shape[0], size):
            out = jitted(params, state, pad_rows(xc[start:stop], size))
            out_dtype = out.dtype
            rows.append(np.asarray(out, dtype=np.float64).reshape(size, -1)[: stop - start])
    result = _rank_of(np.concatenate(rows), bias=bias, tol=tol, dtype=precision_of(
        None, out_dtype), label=described, stacklevel=4)
    gram = _ntk_spectrum(net, x, ntk_gram, dtype)
    return dataclasses.replace(
        result, layer=label, features=described,
        ntk_lambda_min=None if gram is None else gram.lambda_min, ntk_spectrum=gram,
    )


def _cast(dtype: Precision | None):
    """Cast floating leaves to ``dtype`` (identity for None: the model's own dtypes)."""
    if dtype is None:
        return lambda tree: tree
    return functools.partial(as_compute, dtype=np.dtype(dtype))


def _features_of(net, layer, params, state, x1):
    """(features(params, state, xb), label, description) for a ``layer`` argument."""
    if callable(layer):
        user = layer

        def features(params, state, xb):
            del state
            return user(params, xb)

        name = getattr(layer, "__name__", type(layer).__name__)
        return features, name, f"the output of function {name}"
    if layer == "readout":
        return (readout_features(net.replace(params=params, state=state), x1[0]), "readout",
                "the input of the final linear readout (post-activation features)")
    features, cls = _named_layer(net, layer, x1, params, state)
    if cls in AFFINE_LAYERS:
        return features, layer, (f"the output of submodule {layer!r}, a {cls} layer: its affine "
                                 "pre-activation output, before any nonlinearity")
    return features, layer, f"the output of submodule {layer!r} ({cls}) as it returns it"


def _ntk_spectrum(net, x, mode: str, dtype) -> Spectrum | None:
    """The `Spectrum` of the full (N·O, N·O) NTK Gram, or None when ``mode`` skips it."""
    if mode == "none":
        return None
    if mode == "auto":
        with precision_scope(dtype):
            rows = x.shape[0] * _net_outputs(net, x[:1])
        if rows > AUTO_GRAM_ROWS:
            return None
    k = ntk(net, x, outputs="full", progress=False, dtype=dtype)
    return spectrum(k)


def _net_outputs(net, x1) -> int:
    out = jax.eval_shape(net.call, net.params, net.state, jax.ShapeDtypeStruct(
        x1.shape, x1.dtype))
    return int(np.prod(out.shape[1:], dtype=np.int64))


@dataclasses.dataclass(frozen=True, repr=False)
class FeatureRankSample(Result):
    """The interpolation check over several random initializations.

    Fields:
        num_inits: how many initializations were drawn.
        fraction_full_rank: the fraction whose ``[H, 1]`` has full rank n.
        fraction_reliable: the fraction whose verdict holds at its precision.
        ranks: (num_inits,) numerical ranks.
        full_rank: (num_inits,) verdicts.
        ntk_lambda_min: (num_inits,) λ_min of each NTK Gram, or None when not computed.
        results: the `FeatureRank` of each initialization.
        seed: the seed of ``jax.random.PRNGKey`` whose splits were passed to ``init``.
    """

    num_inits: int
    fraction_full_rank: float
    fraction_reliable: float
    ranks: np.ndarray
    full_rank: np.ndarray
    ntk_lambda_min: np.ndarray | None
    results: tuple[FeatureRank, ...]
    seed: int


def feature_rank_over_inits(
    init: Callable,
    x,
    *,
    num_inits: int = 8,
    seed: int = 0,
    layer: str | Callable = "readout",
    bias: bool = True,
    tol: float | None = None,
    batch: int = 1024,
    dtype: Precision | None = None,
    ntk_gram: NtkGram = "none",
) -> FeatureRankSample:
    """`feature_rank` at ``num_inits`` random initializations; the fraction that pass.

    The interpolation condition holds for generic weights, so it is checked by sampling them:
    a fraction near 1 says the architecture can fit any targets on these examples from a random
    start; a fraction near 0, that it cannot (e.g. a layer narrower than n − 1).

    Args:
        init: ``init(key) -> Net``: a fresh model from a ``jax.random`` key, e.g.
            ``lambda key: ntkcalc.Net.from_linen(module, module.init(key, x[:1]))``.
        x: (n, ...) inputs.
        num_inits: how many keys (splits of ``jax.random.PRNGKey(seed)``).
        seed: the root seed.
        layer, bias, tol, batch, dtype, ntk_gram: as in `feature_rank` (``ntk_gram`` defaults
            to ``"none"`` here: one NTK Gram per initialization costs more than the features).

    Returns:
        `FeatureRankSample`.
    """
    if not callable(init):
        raise TypeError(
            f"`init` must be a function init(key) -> ntkcalc.Net, got {type(init).__name__}. "
            "For a linen module: `lambda key: ntkcalc.Net.from_linen(module, "
            "module.init(key, x[:1]))`."
        )
    num_inits = _checks.positive_int("num_inits", num_inits)
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer):
        raise TypeError(f"`seed` must be an integer, got {seed!r}.")
    results = []
    for key in jax.random.split(jax.random.PRNGKey(int(seed)), num_inits):
        net = init(key)
        if not isinstance(net, _net.Net):
            raise TypeError(
                f"`init(key)` must return an ntkcalc.Net, got {type(net).__name__}. Wrap the "
                "initialized model, e.g. `ntkcalc.Net.from_linen(module, module.init(key, x))`."
            )
        results.append(feature_rank(net, x, layer=layer, bias=bias, tol=tol, batch=batch,
                                    dtype=dtype, ntk_gram=ntk_gram))
    lams = [r.ntk_lambda_min for r in results]
    return FeatureRankSample(
        num_inits=num_inits,
        fraction_full_rank=float(np.mean([r.full_rank for r in results])),
        fraction_reliable=float(np.mean([r.reliable for r in results])),
        ranks=np.array([r.rank for r in results]),
        full_rank=np.array([r.full_rank for r in results]),
        ntk_lambda_min=None if any(v is None for v in lams) else np.array(lams),
        results=tuple(results), seed=int(seed),
    )
