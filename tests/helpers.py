"""Shared test helpers: the dense reference kernel and a zoo of small models.

The reference is the recipe every structured or blocked method must reproduce: the whole-batch
Jacobian by `jax.jacrev`, contracted with an einsum, in float64 (common practice; it is the
definition Θ = J Jᵀ evaluated directly).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable

import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np
from flax import nnx

import ntkcalc

RTOL = 1e-10  # float64 kernels against the dense reference
# Pinned planner rates, for plans that must not depend on the machine (values of the order of a
# laptop CPU; invented, not measured).
FIXED_RATES = ntkcalc.Rates(
    matmul=5e10, stream=5e9, formation=((1, 1e9), (16, 1e10), (512, 4e10)), call=2e-5,
    accumulation=3e9, platform="cpu", device_kind="cpu", dtype="float64")


def reference_full(net: ntkcalc.Net, x1, x2=None, *, params=None, jit=False) -> np.ndarray:
    """Θ[i, j, a, b] from the whole-batch Jacobian (jax.jacrev) and an einsum, float64.

    ``jit`` compiles the jacrev as one program (same math; op-by-op dispatch of a vmapped model's
    Jacobian is several times slower on CPU)."""
    x2 = x1 if x2 is None else x2
    f = lambda p, x: net.apply(p, x).reshape(x.shape[0], -1)
    jac = jax.jit(jax.jacrev(f)) if jit else jax.jacrev(f)
    j1 = jax.tree_util.tree_leaves(jac(net.params, x1))
    j2 = jax.tree_util.tree_leaves(jac(net.params, x2))
    names = ntkcalc._engine.select.leaf_names(net.params)
    k = 0.0
    for name, a, b in zip(names, j1, j2, strict=True):
        if params is not None and not params(name):
            continue
        a = a.reshape(a.shape[0], a.shape[1], -1)
        b = b.reshape(b.shape[0], b.shape[1], -1)
        k = k + jnp.einsum("iap,jbp->ijab", a, b, precision="highest")
    return np.asarray(k)


def reduce_mode(full: np.ndarray, outputs: str) -> np.ndarray:
    """Each outputs mode from the full kernel, by its definition."""
    if outputs == "full":
        return full
    if outputs == "trace":
        return np.einsum("ijaa->ij", full)
    if outputs == "diagonal":
        return np.einsum("ijaa->ija", full)
    return full.sum((2, 3))  # logit-sum: Θ of Σ_a f_a


def assert_close(got, want, rtol=RTOL):
    got, want = np.asarray(got), np.asarray(want)
    assert got.shape == want.shape, (got.shape, want.shape)
    scale = np.max(np.abs(want))
    err = np.max(np.abs(got - want))
    assert err <= rtol * scale, f"max abs error {err:.3e} > {rtol:.0e} × {scale:.3e}"


def f64(tree):
    return jax.tree_util.tree_map(
        lambda a: a.astype(np.float64) if jnp.issubdtype(a.dtype, jnp.floating) else a, tree
    )


# -- the model zoo ------------------------------------------------------------------------------


class MLP(nn.Module):
    width: int = 12
    out: int = 3

    @nn.compact
    def __call__(self, x):
        x = nn.relu(nn.Dense(self.width)(x))
        x = nn.tanh(nn.Dense(self.width)(x))
        return nn.Dense(self.out)(x)


class CNN(nn.Module):
    @nn.compact
    def __call__(self, x):
        x = nn.relu(nn.Conv(4, (3, 3), strides=(2, 2))(x))
        x = nn.avg_pool(x, (2, 2), strides=(1, 1))
        x = nn.relu(nn.Conv(6, (3, 3), padding="VALID", kernel_dilation=(2, 1))(x))
        x = nn.max_pool(x, (2, 2), strides=(2, 2))
        x = nn.Conv(6, (2, 2), feature_group_count=6)(x)  # depthwise
        return nn.Dense(3)(x.reshape(x.shape[0], -1))


class ResBlockLinen(nn.Module):
    @nn.compact
    def __call__(self, x, train: bool = False):
        h = nn.Dense(8)(x)
        y = nn.BatchNorm(use_running_average=not train)(h)
        y = nn.relu(nn.Dense(8)(y))
        return nn.Dense(2)(h + y)


class ResBlockNNX(nnx.Module):
    def __init__(self, rngs):
        self.inp = nnx.Linear(5, 8, rngs=rngs)
        self.bn = nnx.BatchNorm(8, rngs=rngs)
        self.mid = nnx.Linear(8, 8, rngs=rngs)
        self.drop = nnx.Dropout(0.5, rngs=rngs)
        self.out = nnx.Linear(8, 2, rngs=rngs)

    def __call__(self, x):
        h = self.inp(x)
        y = nnx.relu(self.mid(self.bn(h)))
        return self.out(self.drop(h + y))


class AttentionBlock(nn.Module):
    """LayerNorm + multi-head self-attention + MLP on (batch, tokens, features)."""

    @nn.compact
    def __call__(self, x):
        h = nn.LayerNorm()(x)
        h = nn.MultiHeadDotProductAttention(num_heads=2, qkv_features=8)(h, h)
        x = x + h
        h = nn.LayerNorm()(x)
        h = nn.Dense(4)(nn.gelu(nn.Dense(8)(h)))
        return nn.Dense(2)(h.mean(axis=1))


class TokenModel(nn.Module):
    """Integer tokens → embedding → mean pool → dense: outputs (batch, T, V) flattened."""

    @nn.compact
    def __call__(self, tokens):
        e = nn.Embed(11, 6)(tokens)
        return nn.Dense(3)(nn.tanh(e))  # (batch, T, 3)


def shared_weight_apply(params, x):
    """One weight used twice in a forward pass (and once transposed)."""
    w = params["w"]
    h = jnp.tanh(x @ w + params["b"][None])
    h = jnp.tanh(h @ w.T)
    return h @ params["v"]


@dataclasses.dataclass
class Case:
    name: str
    make: Callable[[], ntkcalc.Net]
    x: Callable[[np.random.Generator, int], np.ndarray]


def _linen(module, x_example, **kwargs):
    variables = module.init(jax.random.key(0), x_example, **kwargs)
    if "batch_stats" in variables:  # non-trivial running statistics
        stats = jax.tree_util.tree_map(lambda s: s + 0.3, variables["batch_stats"])
        variables = {**variables, "batch_stats": stats}
    return ntkcalc.Net.from_linen(module, f64(variables), **kwargs)


def _nnx_res():
    model = ResBlockNNX(nnx.Rngs(0))
    model.bn.mean[...] = model.bn.mean[...] + 0.2
    return _nnx64(model)


def _nnx64(model):
    net = ntkcalc.Net.from_nnx(model)
    return net.replace(params=f64(net.params), state=f64(net.state))


def _shared():
    k = jax.random.split(jax.random.key(1), 3)
    params = {
        "w": jax.random.normal(k[0], (5, 5), jnp.float64) / 2,
        "b": jax.random.normal(k[1], (5,), jnp.float64),
        "v": jax.random.normal(k[2], (5, 2), jnp.float64),
    }
    return ntkcalc.Net(shared_weight_apply, params)


ZOO = [
    Case("mlp", lambda: _linen(MLP(), np.zeros((1, 5))), lambda r, n: r.normal(size=(n, 5))),
    Case("cnn", lambda: _linen(CNN(), np.zeros((1, 16, 16, 2))),
         lambda r, n: r.normal(size=(n, 16, 16, 2))),
    Case("resblock-linen", lambda: _linen(ResBlockLinen(), np.zeros((1, 5)), train=False),
         lambda r, n: r.normal(size=(n, 5))),
    Case("resblock-nnx", _nnx_res, lambda r, n: r.normal(size=(n, 5))),
    Case("attention", lambda: _linen(AttentionBlock(), np.zeros((1, 4, 6))),
         lambda r, n: r.normal(size=(n, 4, 6))),
    Case("tokens", lambda: _linen(TokenModel(), np.zeros((1, 4), np.int32)),
         lambda r, n: r.integers(0, 11, size=(n, 4)).astype(np.int32)),
    Case("shared-weight", _shared, lambda r, n: r.normal(size=(n, 5))),
]


def check_modes(net: ntkcalc.Net, x1, x2, *, modes=("full", "trace", "diagonal", "logit-sum"),
                method="auto", params=None):
    """``ntk`` of ``net`` in each outputs mode against the dense jax.jacrev reference (float64,
    rtol 1e-10): Θ(x1, x1) in every mode of ``modes``, Θ(x1, x2) in the first."""
    assert all(leaf.dtype == np.float64 for leaf in jax.tree_util.tree_leaves(net.params))
    r11 = reference_full(net, x1, params=params, jit=True)
    for outputs in modes:
        k = ntkcalc.ntk(net, x1, method=method, outputs=outputs, params=params, progress=False)
        assert np.asarray(k).dtype == np.float64
        assert_close(k, reduce_mode(r11, outputs))
    k12 = ntkcalc.ntk(net, x1, x2, method=method, outputs=modes[0], params=params,
                      progress=False)
    assert_close(k12, reduce_mode(reference_full(net, x1, x2, params=params, jit=True),
                                  modes[0]))


def save_steps(directory, params_by_step: dict) -> None:
    """Save ``{step: params}`` as an orbax ``CheckpointManager`` directory, each step's item
    ``{"params": params}`` (the layout of a flax linen training loop), synchronously."""
    import orbax.checkpoint as ocp

    options = ocp.CheckpointManagerOptions(max_to_keep=None, enable_async_checkpointing=False)
    with ocp.CheckpointManager(directory, options=options) as manager:
        for step, params in params_by_step.items():
            manager.save(step, args=ocp.args.StandardSave({"params": params}))
        manager.wait_until_finished()


def features_budget(net: ntkcalc.Net, x, *, k: int, examples: int) -> int:
    """A `memory` budget for `ntkcalc.ntk_features(..., store=...)` on ``x`` that fits blocks of
    ``examples`` examples (the projections plus ``examples + 0.5`` examples' working memory, by
    the features' own memory model), so a small run writes several blocks."""
    from ntkcalc._sketch import features as F

    _, _, req, sketch, acts, _ = F.setup(net, x, k=k, outputs="trace", method="structured")
    fixed, _, per = F.memory_parts(sketch, acts, req, n=x.shape[0], in_memory=False)
    return int(fixed + (examples + 0.5) * per)
