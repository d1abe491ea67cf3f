"""`Net`: plain functions with frozen state, picking outputs, and errors that name the fix.

Kernels are compared with the dense jax.jacrev reference (tests/helpers.py, float64, rtol 1e-10;
the definition Θ = J Jᵀ, common practice). A picked output's kernel is also checked against its
definition: the rows and columns S of the full kernel, Θ_S = Θ[:, :, S, S].
"""

from __future__ import annotations

import functools

import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np
import pytest
from flax import nnx
from helpers import MLP, assert_close, check_modes, f64, reduce_mode, reference_full

import ntkcalc

T, D, H, V = 3, 4, 5, 4  # tokens, input features, hidden width, vocabulary


def seq_model(params, x):
    """(batch, T, D) → {"logits": (batch, T, V), "pooled": (batch, H)}."""
    h = jnp.tanh(x @ params["w"] + params["b"][None, None])
    return {"logits": h @ params["v"], "pooled": h.mean(axis=1)}


@functools.cache
def seq_case():
    k = jax.random.split(jax.random.key(0), 3)
    params = {"w": jax.random.normal(k[0], (D, H), jnp.float64),
              "b": jax.random.normal(k[1], (H,), jnp.float64),
              "v": jax.random.normal(k[2], (H, V), jnp.float64)}
    rng = np.random.default_rng(0)
    return params, rng.normal(size=(4, T, D)), rng.normal(size=(3, T, D))


def test_pick_item_and_index_matches_reference_and_definition():
    params, x1, x2 = seq_case()
    net = ntkcalc.Net(seq_model, params).select_outputs(item="logits", index=np.s_[-1, [0, 2]])
    # Reference 1: jax.jacrev of the function that returns exactly those outputs.
    direct = ntkcalc.Net(lambda p, x: seq_model(p, x)["logits"][:, -1, [0, 2]], params)
    np.testing.assert_array_equal(net(x1), direct(x1))
    check_modes(direct, x1, x2, modes=("full", "trace"))
    check_modes(net, x1, x2, modes=("full", "trace"))
    # Reference 2 (definition): rows and columns S of the kernel of all logits, flattened (T, V).
    full = reference_full(ntkcalc.Net(lambda p, x: seq_model(p, x)["logits"], params), x1)
    s = [(T - 1) * V + 0, (T - 1) * V + 2]
    assert_close(ntkcalc.ntk(net, x1, outputs="full", progress=False), full[:, :, s][:, :, :, s])


def test_pick_from_a_tuple_and_nested_path():
    params, x1, _ = seq_case()
    tup = ntkcalc.Net(lambda p, x: (seq_model(p, x)["pooled"], seq_model(p, x)), params)
    by_pos = tup.select_outputs(item=0)
    nested = tup.select_outputs(item=[1, "pooled"])
    want = reference_full(ntkcalc.Net(lambda p, x: seq_model(p, x)["pooled"], params), x1)
    assert_close(ntkcalc.ntk(by_pos, x1, progress=False), reduce_mode(want, "trace"))
    np.testing.assert_array_equal(nested(x1), by_pos(x1))
    # Picking twice composes: the second index applies to the first pick's output.
    twice = by_pos.select_outputs(index=[1, 3])
    np.testing.assert_array_equal(twice(x1), by_pos(x1)[:, [1, 3]])


def test_pick_errors_name_the_option():
    params, x1, _ = seq_case()
    net = ntkcalc.Net(seq_model, params)
    with pytest.raises(ValueError, match=r"`item`=\['scores'\]: the model's output is a dict with "
                                         r"keys \['logits', 'pooled'\], with no key 'scores'"):
        ntkcalc.ntk(net.select_outputs(item="scores"), x1, progress=False)
    with pytest.raises(ValueError, match=r"`index`=\(5,\) does not fit the model's per-example "
                                         r"output shape \(3, 4\)"):
        ntkcalc.ntk(net.select_outputs(item="logits", index=5), x1, progress=False)
    with pytest.raises(ValueError, match=r"the model returned 2 arrays.*net.select_outputs"):
        ntkcalc.ntk(net, x1, progress=False)
    with pytest.raises(TypeError, match="`index`=.* holds None"):
        net.select_outputs(index=(None, 0))
    with pytest.raises(ValueError, match="got neither `item` nor `index`"):
        net.select_outputs()
    with pytest.raises(TypeError, match=r"`item`=1\.5 holds 1\.5 \(float\)"):
        net.select_outputs(item=1.5)


def _normalized(params, state, x):
    return jnp.tanh((x - state["mean"][None]) / state["scale"][None] @ params["w"]) @ params["v"]


def test_plain_function_with_frozen_state():
    rng = np.random.default_rng(2)
    params = {"w": rng.normal(size=(3, 6)), "v": rng.normal(size=(6, 2))}
    state = {"mean": rng.normal(size=3), "scale": rng.uniform(1, 2, size=3)}
    net = ntkcalc.Net(_normalized, params, state=state)
    x1, x2 = rng.normal(size=(4, 3)), rng.normal(size=(2, 3))
    check_modes(net, x1, x2, modes=("full", "trace"))  # jax.jacrev reference: state not in J
    closed = ntkcalc.Net(lambda p, x: _normalized(p, state, x), params)
    assert_close(ntkcalc.ntk(net, x1, progress=False), ntkcalc.ntk(closed, x1, progress=False))
    moved = net.replace(state={**state, "mean": state["mean"] + 1.0})
    assert moved.call is net.call  # compiled kernels are shared
    want = reduce_mode(reference_full(moved, x1), "trace")
    assert_close(ntkcalc.ntk(moved, x1, progress=False), want)
    assert not np.allclose(moved(x1), net(x1))


# -- errors that name the fix (each failed before with an unrelated message) -------------------
class NeedsTrain(nn.Module):
    @nn.compact
    def __call__(self, x, train):
        h = nn.BatchNorm(use_running_average=not train)(nn.Dense(4)(x))
        return nn.Dense(2)(h)


class DropoutOnly(nn.Module):
    train: bool = False

    @nn.compact
    def __call__(self, x):
        return nn.Dense(2)(nn.Dropout(0.5, deterministic=not self.train)(x))


class Sows(nn.Module):
    @nn.compact
    def __call__(self, x):
        h = nn.tanh(nn.Dense(4)(x))
        self.sow("intermediates", "hidden", h)
        return nn.Dense(2)(h)


def test_linen_mutable_collections_are_dropped():
    # mutable= makes module.apply return (outputs, updated collections); the Net keeps outputs.
    x = np.random.default_rng(3).normal(size=(3, 5))
    variables = f64(Sows().init(jax.random.key(0), x))
    net = ntkcalc.Net.from_linen(Sows(), variables, mutable=["intermediates"])
    plain = ntkcalc.Net.from_linen(Sows(), variables)
    np.testing.assert_array_equal(net(x), plain(x))
    want = reduce_mode(reference_full(plain, x), "trace")  # jax.jacrev reference
    assert_close(ntkcalc.ntk(net, x, progress=False), want)


def test_linen_without_variables():
    with pytest.raises(TypeError, match=r"`variables` must be the dict of collections from "
                                        r"`module.init\(key, x\)`.*got NoneType"):
        ntkcalc.Net.from_linen(MLP(), None)


def test_linen_that_needs_train_or_a_mutable_collection():
    x = np.ones((2, 3))
    variables = f64(NeedsTrain().init(jax.random.key(0), x, train=False))
    with pytest.raises(TypeError, match=r"NeedsTrain.__call__ requires \['train'\], which "
                                        r"`Net.from_linen` was not given.*train=False"):
        ntkcalc.Net.from_linen(NeedsTrain(), variables)
    net = ntkcalc.Net.from_linen(NeedsTrain(), variables, train=True)
    with pytest.raises(ValueError, match=r"updates a variable collection.*batch_stats.*"
                                         r"train=False") as err:
        ntkcalc.ntk(net, x, progress=False)
    assert "does not fit" not in str(err.value)  # not blamed on the input shape
    drop = DropoutOnly(train=True)
    net = ntkcalc.Net.from_linen(drop, drop.init(jax.random.key(0), x))
    with pytest.raises(ValueError, match=r"asks for random numbers.*train=False"):
        ntkcalc.ntk(net, x, progress=False)
    net = ntkcalc.Net.from_linen(NeedsTrain(), {"params": variables["params"]}, train=False)
    with pytest.raises(ValueError, match=r"looks for a variable that `variables` lacks.*"
                                         r"module.init"):
        ntkcalc.ntk(net, x, progress=False)


def test_non_array_params_leaf():
    # Before: ufunc 'isfinite' not supported for the input types.
    with pytest.raises(TypeError, match=r"`params` leaf \['act'\] is a .*not an array.*"
                                        r"state="):
        ntkcalc.Net(lambda p, x: p["act"](x @ p["w"]), {"w": np.ones((2, 2)), "act": jnp.tanh})
    net = ntkcalc.Net(lambda p, x: x @ p["w"], {"w": np.ones((2, 2))})
    with pytest.raises(TypeError, match=r"`params` leaf \['w'\] is an abstract shape"):
        net.replace(params={"w": jax.ShapeDtypeStruct((2, 2), np.float64)})


def test_flax_models_where_a_net_belongs():
    x = np.ones((2, 5))
    module = MLP()
    with pytest.raises(TypeError, match=r"got MLP\. `MLP` is a flax linen module: wrap it with "
                                        r"its variables, `ntkcalc.Net.from_linen"):
        ntkcalc.ntk(module, x)
    with pytest.raises(TypeError, match=r"`apply` must be a function .*Net.from_linen"):
        ntkcalc.Net(module, module.init(jax.random.key(0), x))
    model = nnx.Linear(5, 2, rngs=nnx.Rngs(0))
    with pytest.raises(TypeError, match=r"`Linear` is a flax nnx module: wrap it with "
                                        r"`ntkcalc.Net.from_nnx\(model\)`"):
        ntkcalc.ntk(model, x)
    with pytest.raises(TypeError, match=r"`model` must be a flax nnx Module, got MLP.*from_linen"):
        ntkcalc.Net.from_nnx(module)


def test_repr_counts_in_the_right_number():
    one = ntkcalc.Net(lambda p, x: x * p, np.ones((), np.float64))
    assert repr(one) == "Net(net, 1 parameter leaf, 1 parameter, dtype float64)"
    two = ntkcalc.Net(lambda p, x: x @ p["w"] + p["b"],
                      {"w": np.ones((3, 2), np.float32), "b": np.zeros(2, np.float32)})
    assert repr(two) == "Net(net, 2 parameter leaves, 8 parameters, dtype float32)"
