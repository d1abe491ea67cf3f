"""The features a model's final linear readout reads, found in its traced jaxpr.

A model ``f(x) = a · (H(x) W) + b`` (any bias, any scale or sign, reshapes, dtype casts and
selections of outputs after the product) has a final linear readout W, and H(x) — the operand of
that last ``dot_general`` that depends on the input — is the post-activation feature vector of the
last hidden layer. Those are the features of the interpolation condition rank [H, 1] = n.

The per-example function is traced once (as the kernel engine traces it), the output is followed
backwards through ops that keep it a linear function of the readout's product, into nested calls,
to the ``dot_general`` with exactly one input-dependent operand. Its per-example H is read on the
forward pass by the engine's probe evaluation (`structured.eval_with_probes`).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
from jax.extend import core as jcore

from .._engine import structured as st

#: Ops after the readout's product that keep f a linear readout of H: shape and dtype changes.
RESHAPING = frozenset(
    {"reshape", "squeeze", "expand_dims", "convert_element_type", "copy", "copy_p", "transpose",
     "neg", "reduce_precision"}
)
#: Ops that pick entries of their first operand (outputs chosen by ``Net.select_outputs``): a
#: readout of some outputs is the readout with some columns of W.
SELECTING = frozenset({"slice", "dynamic_slice", "gather", "rev"})
#: Binary ops that keep it linear when their other operand does not depend on the input
#: (a bias, a fixed scale); for ``div`` only with the input-dependent operand on top.
AFFINE = frozenset({"add", "sub", "mul", "div", "add_any"})

NO_READOUT = (
    "found no final linear readout in the model to take features from: {why}. The default "
    "`layer=\"readout\"` takes the input H of the last linear layer (output = H W + b, up to a "
    "fixed scale). Pass `layer` as a submodule name or a function features(params, x) -> H."
)


class NoReadout(ValueError):
    """The model's output is not a linear readout of one input-dependent operand."""


def _dependence(jaxpr, deps_in) -> dict:
    """Which variables of ``jaxpr`` depend on its inputs marked True (calls: any input counts)."""
    dep = {v: bool(d) for v, d in zip(jaxpr.invars, deps_in, strict=True)}
    for eqn in jaxpr.eqns:
        d = any(dep.get(v, False) for v in eqn.invars if isinstance(v, jcore.Var))
        for o in eqn.outvars:
            dep[o] = d
    return dep


def _find(jaxpr, var, dep: dict, prefix: tuple[int, ...]) -> tuple[tuple[int, ...], int]:
    """(equation path, operand index) of the readout ``dot_general`` that produces ``var``."""
    producers = {o: (i, e) for i, e in enumerate(jaxpr.eqns) for o in e.outvars}
    while True:
        if not isinstance(var, jcore.Var) or var not in producers:
            raise NoReadout(NO_READOUT.format(why="the output does not depend on the input "
                                              "through a linear layer"))
        i, eqn = producers[var]
        name = eqn.primitive.name
        live = [(k, v) for k, v in enumerate(eqn.invars)
                if isinstance(v, jcore.Var) and dep.get(v, False)]
        if name == "dot_general":
            if len(live) != 1:
                raise NoReadout(NO_READOUT.format(
                    why="the last product multiplies two input-dependent values (attention-like)"))
            return prefix + (i,), live[0][0]
        if name in RESHAPING and len(live) == 1:
            var = live[0][1]
        elif name in SELECTING and len(live) == 1 and live[0][0] == 0:
            var = live[0][1]
        elif name in AFFINE and len(live) == 1 and not (name == "div" and live[0][0] == 1):
            var = live[0][1]
        elif name in st.CALLS and (sub := st._sub_jaxpr(eqn)) is not None:
            inner = _dependence(sub.jaxpr, [isinstance(v, jcore.Var) and dep.get(v, False)
                                            for v in eqn.invars])
            return _find(sub.jaxpr, sub.jaxpr.outvars[eqn.outvars.index(var)], inner,
                         prefix + (i,))
        else:
            why = (f"the output comes from `{name}` applied to "
                   f"{'two input-dependent values' if len(live) > 1 else 'the features'}")
            raise NoReadout(NO_READOUT.format(why=why))


def readout_features(net, x_example):
    """``features(params, state, xb) -> (b, width)``: the readout's input H for each example.

    Args:
        net: an `ntkcalc.Net`.
        x_example: one example (feature shape), in the dtype the features will be computed at.

    Raises:
        NoReadout (a ValueError) naming why, when the output is not a linear readout of one
        input-dependent operand, or when the readout is applied per position (H has more than
        one row per example: pass ``layer`` explicitly then).
    """
    leaves, treedef = jax.tree_util.tree_flatten(net.params)
    state_leaves, state_def = jax.tree_util.tree_flatten(net.state)

    def example(leaves, state_leaves, x):
        params = jax.tree_util.tree_unflatten(treedef, leaves)
        state = jax.tree_util.tree_unflatten(state_def, state_leaves)
        return net.call(params, state, x[None]).reshape(-1)

    closed = st.trace_example(example, (leaves, state_leaves, x_example))
    num_in = len(closed.jaxpr.invars)
    dep = _dependence(closed.jaxpr, [k == num_in - 1 for k in range(num_in)])
    path, operand = _find(closed.jaxpr, closed.jaxpr.outvars[0], dep, ())
    eqn = _equation(closed.jaxpr, path)
    h_aval, y_aval = eqn.invars[operand].aval, eqn.outvars[0].aval
    (lhs_contract, rhs_contract), _ = eqn.params["dimension_numbers"]
    contracted = tuple(lhs_contract if operand == 0 else rhs_contract)
    free = [d for d in range(h_aval.ndim) if d not in contracted]
    if any(h_aval.shape[d] != 1 for d in free):
        raise NoReadout(NO_READOUT.format(
            why=f"the last linear layer reads features of shape {tuple(h_aval.shape)} per "
                "example and is applied per position, so no single feature row per example "
                "exists"))
    analysis = st.analyze(closed, 0)
    probes = {path: jnp.zeros(y_aval.shape, y_aval.dtype)}

    def one(params, state, x):
        args = [*jax.tree_util.tree_leaves(params), *jax.tree_util.tree_leaves(state), x]
        _, caps = st.eval_with_probes(analysis, args, probes)
        return caps[path][operand].reshape(-1)

    def features(params, state, xb):
        return jax.vmap(lambda x: one(params, state, x))(xb)

    return features


def _equation(jaxpr, path):
    for i in path[:-1]:
        jaxpr = st._sub_jaxpr(jaxpr.eqns[i]).jaxpr
    return jaxpr.eqns[path[-1]]
