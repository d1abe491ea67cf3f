"""Up-front validation of a kernel request: every error names the argument, what it received,
and what to do. The model runs only at abstract shapes, plus one forward pass of at most four
examples that checks they do not interact within a batch (`check_independent`)."""

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


def check_flag(name: str, value) -> bool:
    """``value`` if it is True or False, else a ValueError naming the argument."""
    if not isinstance(value, bool | np.bool_):
        raise ValueError(f"`{name}`={value!r} must be True or False.")
    return bool(value)


def check_net(net) -> Net:
    if not isinstance(net, Net):
        raise TypeError(
            f"`net` must be an ntkcalc.Net, got {type(net).__name__}. {constructor_hint(net)}"
        )
    return net


def check_finite_tree(tree, what: str) -> None:
    """Raise if a leaf of ``tree`` is complex, not an array, or holds NaN or Inf, naming the leaf
    (and the index of the first non-finite value)."""
    names = leaf_names(tree)
    for name, leaf in zip(names, jax.tree_util.tree_leaves(tree), strict=True):
        dtype = getattr(leaf, "dtype", None)
        if dtype is None:
            try:
                dtype = np.asarray(leaf).dtype
            except Exception:  # noqa: BLE001 - any object numpy cannot convert
                dtype = np.dtype(object)
        if dtype == np.dtype(object):
            raise TypeError(
                f"`{what}` leaf {name!r} is a {type(leaf).__name__}, not an array: parameters "
                "and state must be arrays (or numbers). Convert it with jnp.asarray, or keep it "
                "out of the pytree (e.g. in the `apply` closure)."
            )
        if jnp.issubdtype(dtype, jnp.complexfloating):
            raise TypeError(
                f"`{what}` leaf {name!r} has complex dtype {dtype}: the kernel is defined for real "
                "parameters and states (an imaginary part would be dropped). Store the real and "
                "imaginary parts as two real leaves."
            )
        if not jnp.issubdtype(dtype, jnp.inexact):
            continue
        arr = np.asarray(leaf)
        if not np.all(np.isfinite(arr)):
            bad = tuple(int(i) for i in np.argwhere(~np.isfinite(arr))[0])
            raise ValueError(
                f"`{what}` leaf {name!r} holds a non-finite value {arr[bad]} at index {bad}: "
                "a kernel of a model with NaN/Inf parameters or state (e.g. batch statistics) is "
                "meaningless. Check the checkpoint or the training run that produced it."
            )


def check_inputs(x, name: str) -> np.ndarray:
    """A non-empty batch (axis 0 = examples) of real, finite values."""
    if x is None:
        raise TypeError(
            f"`{name}` is None: pass a batch of examples (an array with the examples on axis 0)."
        )
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
    if np.issubdtype(x.dtype, np.complexfloating):
        raise TypeError(
            f"`{name}` has complex dtype {x.dtype}: the kernel is defined for real inputs (the "
            "imaginary part would be dropped). Pass real and imaginary parts as separate features."
        )
    if not (jnp.issubdtype(x.dtype, jnp.number) or x.dtype == np.bool_):
        raise TypeError(f"`{name}` has dtype {x.dtype}: pass numeric inputs.")
    if jnp.issubdtype(x.dtype, jnp.inexact) and not np.all(np.isfinite(x)):
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


def _signature(net: Net, params, state, x: np.ndarray) -> tuple:
    """What a model's output shape and batch behaviour depend on: its function, the structure,
    shapes and dtypes of parameters and state, and the input's feature shape and dtype."""
    return (net.call, jax.tree_util.tree_structure((params, state)),
            tuple((np.shape(v), str(getattr(v, "dtype", None) or np.asarray(v).dtype))
                  for v in jax.tree_util.tree_leaves((params, state))),
            x.shape[1:], str(x.dtype))


def _remembered(cache: dict, key, make):
    if key not in cache:
        if len(cache) > 64:
            cache.pop(next(iter(cache)))
        cache[key] = make()
    return cache[key]


def output_size(net: Net, params, state, x: np.ndarray, name: str) -> int:
    """Number of outputs O per example, checking that the model accepts ``x`` and keeps the batch
    on axis 0 (by abstract evaluation at batch sizes 1 and 2: no compute). Remembered per
    (model function, parameter and state shapes, input shape): repeated calls skip the tracing."""
    return _remembered(_OUTPUT_SIZES, _signature(net, params, state, x),
                       lambda: _output_size(net, params, state, x, name))


def _first_line(err: BaseException) -> str:
    line = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
    return line.rstrip(".")


def _output_size(net: Net, params, state, x: np.ndarray, name: str) -> int:
    sizes = {}
    for b in (1, 2):
        spec = jax.ShapeDtypeStruct((b,) + x.shape[1:], x.dtype)
        try:
            out = jax.eval_shape(net.call, params, state, spec)
        except NetCallError:  # the Net's configuration, not the inputs: its message says what to do
            raise
        except jax.errors.JAXTypeError as err:  # a traced value turned into a concrete one
            raise TypeError(
                f"`net` cannot be traced by JAX: calling it on a batch of {b} raised "
                f"{type(err).__name__}: {_first_line(err)}. ntkcalc runs the model under jax.jit "
                "and jax.vmap: write it with jax.numpy, without numpy calls or Python `if` on "
                "array values (use jnp.where or jax.lax.cond)."
            ) from err
        except Exception as err:  # noqa: BLE001
            if type(err).__module__.startswith("ntkcalc."):
                raise  # the Net's own wiring failed, and its message says what to change
            raise ValueError(
                f"`{name}` with feature shape {x.shape[1:]} and dtype {x.dtype} does not fit the "
                f"model: calling it on a batch of {b} raised {type(err).__name__}: "
                f"{_first_line(err)}. Pass inputs shaped like the model's training data, with "
                "examples on axis 0 (if they are, the model itself fails: fix the error above)."
            ) from err
        leaves = jax.tree_util.tree_leaves(out)
        if len(leaves) != 1:
            raise ValueError(
                f"the model returned {len(leaves)} arrays; the kernel needs a single output array "
                "with the batch on axis 0. Pick one with `net.select_outputs(item=...)` (a dict "
                "key or tuple position)."
            )
        if leaves[0] is not out:
            where = leaf_names(out)[0]
            raise TypeError(
                f"the model returned a {type(out).__name__} holding one array ({where!r}); the "
                "kernel needs the array itself. Wrap `apply` to return it, e.g. "
                f"`lambda p, x: apply(p, x){_path_code(out)}`."
            )
        sizes[b] = leaves[0].shape
    s1, s2 = sizes[1], sizes[2]
    if len(s1) == 0 or s1[0] != 1 or s2[0] != 2 or s1[1:] != s2[1:]:
        raise ValueError(
            f"the model's outputs are not batched on axis 0: a batch of 1 gave shape {s1} and a "
            f"batch of 2 gave {s2}. Make `apply(params, x)` return (batch, ...) outputs."
        )
    _check_output_dtype(np.dtype(leaves[0].dtype))
    return int(np.prod(s1[1:], dtype=np.int64))


def _path_code(out) -> str:
    """Python indexing that reaches the single leaf of ``out`` (e.g. ``["logits"]``)."""
    (path, _), = jax.tree_util.tree_flatten_with_path(out)[0]
    parts = []
    for key in path:
        if isinstance(key, jax.tree_util.DictKey):
            parts.append(f"[{key.key!r}]")
        elif isinstance(key, jax.tree_util.SequenceKey):
            parts.append(f"[{key.idx}]")
        elif isinstance(key, jax.tree_util.GetAttrKey):
            parts.append(f".{key.name}")
        else:
            parts.append(f"[{key}]")
    return "".join(parts)


def _check_output_dtype(dtype: np.dtype) -> None:
    if jnp.issubdtype(dtype, jnp.complexfloating) or not jnp.issubdtype(dtype, jnp.floating):
        raise TypeError(
            f"the model's outputs have dtype {dtype}: the kernel needs real floating outputs "
            "that depend differentiably on the parameters."
        )
    if dtype.itemsize < 4:
        raise TypeError(
            f"the model's outputs have dtype {dtype}: the model computes in reduced precision "
            f"(about {int(np.finfo(dtype).precision)} significant digits), and so would its "
            "derivatives. Make it compute in float32 (flax layers: dtype=jnp.float32, "
            "param_dtype=jnp.float32; or remove the cast); ntkcalc never lowers precision silently."
        )


_INDEPENDENT: dict = {}

#: Examples evaluated together and one at a time by `check_independent`.
PROBE_EXAMPLES = 4


def check_independent(net: Net, params, state, x1: np.ndarray, x2: np.ndarray | None) -> None:
    """Raise if the model's output for one example depends on the other examples of its batch.

    The kernel is computed from the model evaluated one example at a time (vmapped), so a model
    whose examples interact within a batch — batch statistics (BatchNorm in training mode),
    ``x - x.mean(0)``, attention across the batch axis — would silently get the kernel of a
    different, per-example function. Up to `PROBE_EXAMPLES` examples are evaluated as one batch
    and one at a time; outputs differing by more than √ε of their scale (ε: the dtype's machine
    epsilon) are reported. Remembered per model function and shapes, like `output_size`.
    """
    probe = x1[:PROBE_EXAMPLES]
    if probe.shape[0] < 2 and x2 is not None:
        probe = np.concatenate([probe, x2[: PROBE_EXAMPLES - 1]], axis=0)
    if probe.shape[0] < 2:
        return  # a single example cannot interact with others
    key = (*_signature(net, params, state, x1), probe.shape[0])
    _remembered(_INDEPENDENT, key, lambda: _check_independent(net, params, state, probe))


def _check_independent(net: Net, params, state, probe: np.ndarray) -> bool:
    with jax.default_matmul_precision("highest"):
        together = np.asarray(net.call(params, state, jnp.asarray(probe)))
        alone = np.asarray(jax.vmap(lambda x: net.call(params, state, x[None])[0])(
            jnp.asarray(probe)))
    if not (np.all(np.isfinite(together)) and np.all(np.isfinite(alone))):
        return True  # non-finite outputs are reported per tile, naming the examples
    scale = max(float(np.max(np.abs(together))), float(np.max(np.abs(alone))),
                float(np.finfo(together.dtype).tiny))
    gap = float(np.max(np.abs(together - alone)))
    if gap > np.sqrt(np.finfo(together.dtype).eps) * scale:
        raise ValueError(
            f"`net` mixes the examples of a batch: on {probe.shape[0]} inputs its outputs as one "
            f"batch differ from its outputs one example at a time by up to {gap:.3g} (outputs up "
            f"to {scale:.3g}). The kernel is defined per example, and ntkcalc evaluates examples "
            "one at a time, so it would return the kernel of a different function. Evaluate "
            "batch statistics in inference mode (BatchNorm use_running_average=True, or "
            "`train=False`), or compute statistics outside the model and pass them as state."
        )
    return True
