"""The model wrapper every other part of ntkcalc consumes.

A `Net` is the pair (apply, params): ``apply(params, x) -> outputs`` with the batch on axis 0, and
the pytree ``params`` that the kernel differentiates. Anything else the model needs (batch-norm
statistics, a frozen embedding, the flax graph definition) is *state*: carried alongside, never
differentiated. Keeping state as an explicit argument rather than a closure lets the engine pass it
to compiled functions as data, so a Net with new parameters (a checkpoint) reuses the compiled
kernel of the old one.
"""

from __future__ import annotations

import dataclasses
import functools
import warnings
from collections.abc import Callable
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

PyTree = Any


def _call_plain(apply, params, state, x):
    del state
    return apply(params, x)


def _call_linen(module, trainable, apply_kwargs, params, state, x):
    variables = {**state, trainable: params}
    return module.apply(variables, x, **dict(apply_kwargs))


def _call_nnx(graphdef, params, state, x):
    from flax import nnx

    model = nnx.merge(graphdef, params, state)
    return model(x)


@dataclasses.dataclass(frozen=True, eq=False)
class Net:
    """A differentiable model: ``apply(params, x)`` with the batch on axis 0.

    Construct it with `Net(apply, params)` for any JAX function, `Net.from_linen` for a flax linen
    module, or `Net.from_nnx` for a flax nnx module. Calling ``net(x)`` evaluates the model at its
    own parameters. Outputs with extra axes, e.g. ``(batch, T, V)``, count as ``O = T·V`` outputs
    for the kernel.

    Fields:
        apply: ``apply(params, x) -> outputs``.
        params: the pytree the kernel differentiates.
        state: frozen data passed to ``call``, never differentiated (``None`` for plain functions).
        call: ``call(params, state, x) -> outputs``; the function the engine compiles. Two Nets that
            share ``call`` (e.g. ``net.replace(params=...)``) share compiled kernels.
    """

    call: Callable[[PyTree, PyTree, Any], Any]
    params: PyTree
    state: PyTree = None
    name: str = "net"

    def __init__(self, apply: Callable[[PyTree, Any], Any], params: PyTree, *, name: str = "net"):
        if not callable(apply):
            raise TypeError(
                "`apply` must be a function apply(params, x) -> outputs, got "
                f"{type(apply).__name__}."
            )
        call = functools.partial(_call_plain, apply)
        object.__setattr__(self, "call", call)
        object.__setattr__(self, "params", params)
        object.__setattr__(self, "state", None)
        object.__setattr__(self, "name", name)

    @classmethod
    def _make(cls, call, params, state, name) -> Net:
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
        ``module.apply`` on every call.
        """
        if not hasattr(module, "apply") or not hasattr(module, "init"):
            raise TypeError(
                f"`module` must be a flax linen Module, got {type(module).__name__}. "
                "For an nnx module use `Net.from_nnx(model)`."
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
                "For a linen module use `Net.from_linen(module, variables)`."
            )
        clone = nnx.clone(model)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DeprecationWarning)
            clone.eval()
        graphdef, params, state = nnx.split(clone, nnx.Param, ...)
        call = functools.partial(_call_nnx, graphdef)
        return cls._make(call, params, state, type(model).__name__)

    @classmethod
    def from_checkpoint(cls, path, *, module, **options) -> Net:
        """Load parameters saved with orbax-checkpoint or flax msgpack; see `load_checkpoint`.

        ``module`` is a linen module (with ``example=`` input or ``variables=`` template to check
        the structure) or an nnx model (abstract or constructed); ``options`` are
        `load_checkpoint`'s (``step``, ``item``, ``subtree``, ``trainable``, apply keywords).
        """
        from .checkpoint import load_checkpoint

        return load_checkpoint(path, module=module, **options)

    # -- use ---------------------------------------------------------------------------------
    def apply(self, params: PyTree, x) -> jax.Array:
        """``apply(params, x) -> outputs`` with this Net's frozen state."""
        return self.call(params, self.state, x)

    def __call__(self, x) -> jax.Array:
        return self.apply(self.params, x)

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
            f"Net({self.name}, {len(leaves)} parameter leaves, {self.num_params:,} parameters, "
            f"dtype {'/'.join(dtypes) or 'none'})"
        )
