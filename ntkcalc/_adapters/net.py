"""The model wrapper every other part of ntkcalc consumes.

A `Net` is the pair (apply, params): ``apply(params, x) -> outputs`` with the batch on axis 0, and
the pytree ``params`` that the kernel differentiates. Anything else the model needs (batch-norm
statistics, a frozen embedding, the flax graph definition) is *state*: carried alongside, never
differentiated. Keeping state as an explicit argument rather than a closure lets the engine pass it
to compiled functions as data, so a Net with new parameters (a checkpoint) reuses the compiled
kernel of the old one.

Constructors per model library live beside this file: flax linen and nnx here, equinox in
``equinox.py``, haiku in ``haiku.py``; picking one output of a dict/tuple-valued model and a
subset of its output axes in ``outputs.py``.
"""

from __future__ import annotations

import dataclasses
import functools
import inspect
import numbers
import warnings
from collections.abc import Callable, Mapping
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from .._words import counted
from .checkpoint import restore
from .equinox import equinox_parts
from .errors import NetCallError, constructor_hint, model_kind
from .haiku import haiku_parts
from .outputs import Item, picking

PyTree = Any

EVAL_MODE = (
    "The kernel is of a fixed function of the parameters, so run the module in eval mode: pass "
    "its eval switch to `Net.from_linen(module, variables, train=False)` (or "
    "`deterministic=True`, `use_running_average=True`, whatever the module's `__call__` takes); "
    "these keywords go to `module.apply` on every call."
)


def _call_plain(apply, params, state, x):
    del state
    return apply(params, x)


def _call_with_state(apply, params, state, x):
    return apply(params, state, x)


def _call_linen(module, trainable, apply_kwargs, params, state, x):
    from flax import errors

    variables = {**state, trainable: params}
    kwargs = dict(apply_kwargs)
    try:
        out = module.apply(variables, x, **kwargs)
        # With `mutable`, apply returns (outputs, updated collections): the update is dropped.
        return out[0] if kwargs.get("mutable", False) else out
    except errors.ModifyScopeVariableError as err:
        raise NetCallError(
            f"{type(module).__name__} updates a variable collection when called this way "
            f"({str(err).split(' (https')[0]}): the Net's apply keywords "
            f"{dict(apply_kwargs)} leave it in training mode. {EVAL_MODE}"
        ) from None
    except errors.InvalidRngError as err:
        raise NetCallError(
            f"{type(module).__name__} asks for random numbers when called this way "
            f"({str(err).split(' (https')[0]}), e.g. Dropout in training mode. {EVAL_MODE}"
        ) from None
    except (errors.ScopeCollectionNotFound, errors.ScopeVariableNotFoundError,
            errors.ScopeParamNotFoundError) as err:
        raise NetCallError(
            f"{type(module).__name__} looks for a variable that `variables` lacks "
            f"({str(err).split(' (https')[0]}). Pass the whole dict from `module.init(key, x)` "
            f"to `Net.from_linen`; it has collections {sorted([trainable, *state])}."
        ) from None


def _required_call_arguments(module, apply_kwargs: dict) -> list[str]:
    """Arguments of ``module.__call__`` after the input that have no default and were not given."""
    try:
        sig = inspect.signature(module.__call__)
    except (TypeError, ValueError):
        return []
    required = [p.name for p in sig.parameters.values() if p.default is p.empty
                and p.kind not in (p.VAR_POSITIONAL, p.VAR_KEYWORD)]
    return [n for n in required[1:] if n not in apply_kwargs]


def _check_params(params, what: str = "params") -> None:
    """Every leaf of ``params`` must be an array or a number: the kernel differentiates arrays."""
    leaves, _ = jax.tree_util.tree_flatten_with_path(params)
    for path, leaf in leaves:
        if isinstance(leaf, jax.ShapeDtypeStruct):
            problem = "an abstract shape (jax.ShapeDtypeStruct), not an array"
        elif isinstance(leaf, np.ndarray | np.generic | jax.Array | numbers.Number):
            continue
        else:
            problem = f"a {type(leaf).__name__}, not an array"
        name = jax.tree_util.keystr(path) or "<root>"
        hint = constructor_hint(params) if model_kind(params) else (
            "Move it into `state=` (`Net(apply, params, state=...)`, apply(params, state, x)) "
            "or close over it in `apply`."
        )
        raise TypeError(f"`{what}` leaf {name} is {problem}: the kernel differentiates arrays. "
                        f"{hint}")


def _call_nnx(graphdef, params, state, x):
    from flax import nnx

    model = nnx.merge(graphdef, params, state)
    return model(x)


@dataclasses.dataclass(frozen=True, eq=False)
class Net:
    """A differentiable model: ``apply(params, x)`` with the batch on axis 0.

    Construct it with `Net(apply, params)` for any JAX function (``Net(apply, params,
    state=...)`` for ``apply(params, state, x)`` with frozen state), `Net.from_linen` for a flax
    linen module, `Net.from_nnx` for a flax nnx module, `Net.from_equinox` for an equinox module
    or `Net.from_haiku` for a haiku transform. Calling ``net(x)`` evaluates the model at its own
    parameters. Outputs with extra axes, e.g. ``(batch, T, V)``, count as ``O = T·V`` outputs
    for the kernel; `Net.select_outputs` picks one output of a dict/tuple-valued model and a
    subset of its output axes.

    Fields:
        params: the pytree the kernel differentiates; every leaf an array.
        state: frozen data passed to ``call``, never differentiated (``None`` for a plain
            function without state).
        call: ``call(params, state, x) -> outputs``; the function the engine compiles. Two Nets that
            share ``call`` (e.g. ``net.replace(params=...)``) share compiled kernels.
        name: a label for reprs and reports.
    """

    call: Callable[[PyTree, PyTree, Any], Any]
    params: PyTree
    state: PyTree = None
    name: str = "net"

    def __init__(self, apply: Callable[..., Any], params: PyTree, *, state: PyTree = None,
                 name: str = "net"):
        # An equinox module may be a function (eqx.filter_jit, eqx.Partial); flax and haiku
        # models are never apply(params, x).
        if model_kind(apply) in ("linen", "nnx", "haiku") or not callable(apply):
            form = "apply(params, x)" if state is None else "apply(params, state, x)"
            raise TypeError(
                f"`apply` must be a function {form} -> outputs, got {type(apply).__name__}. "
                + constructor_hint(apply)
            )
        call = functools.partial(_call_plain if state is None else _call_with_state, apply)
        _check_params(params)
        object.__setattr__(self, "call", call)
        object.__setattr__(self, "params", params)
        object.__setattr__(self, "state", state)
        object.__setattr__(self, "name", name)

    @classmethod
    def _make(cls, call, params, state, name) -> Net:
        _check_params(params)
        net = object.__new__(cls)
        object.__setattr__(net, "call", call)
        object.__setattr__(net, "params", params)
        object.__setattr__(net, "state", state)
        object.__setattr__(net, "name", name)
        return net

    # -- constructors ------------------------------------------------------------------------
    @classmethod
    def from_linen(
        cls, module, variables: dict, *, trainable: str = "params", **apply_kwargs
    ) -> Net:
        """Wrap a flax linen module and its variables.

        The ``trainable`` collection is differentiated; every other collection (``batch_stats``,
        ...) is frozen state. ``apply_kwargs`` (e.g. ``train=False``) are passed to
        ``module.apply`` on every call; with ``mutable=`` (e.g. ``["intermediates"]`` for values
        the module sows) the updated collections ``module.apply`` returns are discarded.
        """
        if model_kind(module) != "linen":
            raise TypeError(
                f"`module` must be a flax linen Module, got {type(module).__name__}. "
                + constructor_hint(module)
            )
        if not isinstance(variables, Mapping):
            raise TypeError(
                f"`variables` must be the dict of collections from `module.init(key, x)` "
                f"(e.g. {{'params': ...}}), got {type(variables).__name__}. Pass the variables "
                "the module was initialized or trained with."
            )
        missing = _required_call_arguments(module, apply_kwargs)
        if missing:
            raise TypeError(
                f"{type(module).__name__}.__call__ requires {missing}, which `Net.from_linen` "
                f"was not given. {EVAL_MODE}"
            )
        variables = dict(variables)
        if trainable not in variables:
            raise ValueError(
                f"`trainable`={trainable!r} is not a collection of `variables`, which has "
                f"{sorted(variables)}. Pass the name of the collection to differentiate."
            )
        params = variables.pop(trainable)
        call = functools.partial(
            _call_linen, module, trainable, tuple(sorted(apply_kwargs.items()))
        )
        return cls._make(call, params, variables, type(module).__name__)

    @classmethod
    def from_nnx(cls, model) -> Net:
        """Wrap a flax nnx module, evaluated in eval mode.

        ``nnx.Param`` variables are differentiated; all other state (batch statistics, rng
        counters, ...) is frozen. The kernel sees the model with ``deterministic=True`` and
        ``use_running_average=True`` (Dropout off, BatchNorm running averages); the caller's model
        is not modified.
        """
        from flax import nnx

        if not isinstance(model, nnx.Module):
            raise TypeError(
                f"`model` must be a flax nnx Module, got {type(model).__name__}. "
                + constructor_hint(model)
            )
        clone = nnx.clone(model)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DeprecationWarning)
            clone.eval()
        graphdef, params, state = nnx.split(clone, nnx.Param, ...)
        call = functools.partial(_call_nnx, graphdef)
        return cls._make(call, params, state, type(model).__name__)

    @classmethod
    def from_equinox(cls, model, state=None, *, batched: bool = False, inference: bool = True,
                     **call_kwargs) -> Net:
        """Wrap an equinox module (and the ``eqx.nn.State`` of a stateful one).

        The model's inexact (floating) arrays are differentiated (``eqx.is_inexact_array``); its
        other arrays and ``state`` are frozen data, and the rest (functions, sizes) is static.
        ``model(x)``, or ``model(x, state) -> (output, state)`` with ``state``, maps one example
        and is vmapped over the batch (``batched=True``: the model takes the whole batch). With
        ``inference`` (default) the model runs under ``eqx.nn.inference_mode`` (Dropout off,
        BatchNorm running statistics); the caller's model is not modified, and the updated
        state a stateful model returns is discarded. ``call_kwargs`` (e.g. ``key=``) are passed
        to the model on every call. ``net.state`` is ``(frozen arrays, state)``. A later
        checkpoint of the same model reuses the compiled kernels through
        ``net.replace(params=eqx.filter(trained, eqx.is_inexact_array))``.
        """
        return cls._make(*equinox_parts(model, state, batched=batched, inference=inference,
                                        **call_kwargs))

    @classmethod
    def from_haiku(cls, transformed, params, state=None, *, rng=None, **apply_kwargs) -> Net:
        """Wrap a haiku ``hk.transform`` / ``hk.transform_with_state`` function and its params.

        ``params`` is differentiated; ``state`` (required for ``transform_with_state``, e.g.
        BatchNorm moving averages) is frozen and the updated state ``apply`` returns is
        discarded. ``rng`` is None, an int seed or a PRNG key passed to ``apply`` on every call
        (fixed, so the Net is one deterministic function). ``apply_kwargs`` (e.g.
        ``is_training=False``) are passed to ``apply`` on every call.
        """
        return cls._make(*haiku_parts(transformed, params, state, rng=rng, **apply_kwargs))

    @classmethod
    def from_checkpoint(cls, path, *, module, **options) -> Net:
        """Load parameters saved with orbax-checkpoint or flax msgpack; see `load_checkpoint`.

        ``module`` is a linen module (with ``example=`` input or ``variables=`` template to check
        the structure) or an nnx model (abstract or constructed); ``options`` are
        `load_checkpoint`'s (``step``, ``item``, ``subtree``, ``trainable``, apply keywords).
        """
        return load_checkpoint(path, module=module, **options)

    # -- use ---------------------------------------------------------------------------------
    def apply(self, params: PyTree, x) -> jax.Array:
        """``apply(params, x) -> outputs`` with this Net's frozen state."""
        return self.call(params, self.state, x)

    def __call__(self, x) -> jax.Array:
        return self.apply(self.params, x)

    def select_outputs(self, *, item: Item = None, index=None) -> Net:
        """This Net with the kernel taken of one output of the model, or part of it.

        ``item`` picks from a model that returns a dict or tuple: a key (``"logits"``), a
        position (``0``), or a list of them for nested outputs. ``index`` is an index
        expression over each example's output axes (the batch axis is kept): ``[3, 7]`` for two
        classes, ``np.s_[-1, :]`` for the last token position of (batch, T, V) outputs. The
        choice is applied inside ``call``, so every method and outputs mode sees only the
        chosen outputs: Θ_S(x1, x2) = J_S(x1) J_S(x2)ᵀ with f_S = f[item][:, index], i.e. the
        rows and columns S of the full kernel. The new Net compiles its own kernels; its
        ``replace`` shares them.
        """
        return Net._make(picking(self.call, item, index), self.params, self.state, self.name)

    def replace(self, *, params: PyTree | None = None, state: PyTree | None = None) -> Net:
        """A Net with new parameters or state and the same compiled computations."""
        return Net._make(
            self.call,
            self.params if params is None else params,
            self.state if state is None else state,
            self.name,
        )

    @property
    def num_params(self) -> int:
        """Number of scalar parameters."""
        return int(sum(np.size(leaf) for leaf in jax.tree_util.tree_leaves(self.params)))

    def __repr__(self) -> str:
        leaves = jax.tree_util.tree_leaves(self.params)
        dtypes = sorted({str(jnp.asarray(leaf).dtype) for leaf in leaves}) if leaves else []
        return (
            f"Net({self.name}, {counted(len(leaves), 'parameter leaf', 'parameter leaves')}, "
            f"{counted(self.num_params, 'parameter')}, "
            f"dtype {'/'.join(dtypes) or 'none'})"
        )


def load_checkpoint(
    path,
    *,
    module,
    example=None,
    variables: PyTree = None,
    step: int | None = None,
    item: str | None = None,
    subtree: str | None = None,
    trainable: str = "params",
    **apply_kwargs,
) -> Net:
    """A `Net` with parameters read from an orbax checkpoint or flax msgpack bytes.

    Args:
        path: an orbax checkpoint directory, a ``CheckpointManager`` directory (or one of its step
            directories), or a msgpack file; relative paths are taken from the working directory.
            Pickle files are refused.
        module: a flax linen module, or an nnx model (constructed, or abstract from
            ``nnx.eval_shape``) whose state is replaced by the checkpoint's.
        example: linen only: an example input batch; the variables' structure comes from
            ``module.init`` on it (shapes only, nothing is computed).
        variables: linen only: a variables template (arrays or ``jax.ShapeDtypeStruct``) instead
            of ``example``.
        step: the step to load from a ``CheckpointManager`` directory (default: the latest).
        item: the item to load when a step holds several (e.g. ``"state"``).
        subtree: a ``"/"``-separated key path to the part of the checkpoint that holds the
            variables, e.g. ``"params"`` for a saved train state.
        trainable: linen only: the collection to differentiate (as in `Net.from_linen`).
        apply_kwargs: linen only: passed to ``module.apply`` (and ``module.init``).

    A checkpoint of the ``trainable`` collection alone (``variables["params"]``) is accepted for
    a module with no other collections; for nnx, a checkpoint without the rng state keeps the
    template's rng state when the template is concrete.

    Raises:
        ValueError: for a pickle file, or a checkpoint that does not match the module; the message
            lists the first differing paths.
    """
    restored = restore(path, module=module, example=example, variables=variables, step=step,
                       item=item, subtree=subtree, trainable=trainable, apply_kwargs=apply_kwargs)
    if model_kind(module) == "nnx":
        return Net.from_nnx(restored)
    return Net.from_linen(module, restored, trainable=trainable, **apply_kwargs)
