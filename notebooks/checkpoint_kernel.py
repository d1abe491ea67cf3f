# ---
# jupyter:
#   jupytext:
#     text_representation:
#       extension: .py
#       format_name: percent
#       format_version: '1.3'
#       jupytext_version: 1.19.6
#   kernelspec:
#     display_name: Python 3
#     language: python
#     name: python3
# ---

# %% [markdown]
# # The kernel of a trained checkpoint, at dataset scale
#
# A training run saves checkpoints; the kernel of a checkpoint tells what the trained network
# has learnt to treat as similar. This notebook
#
# 1. trains a linen MLP on the pump readings and saves an orbax checkpoint;
# 2. loads it back with `ntkcalc.Net.from_checkpoint` (the checkpoint is matched leaf by leaf
#    against the module before anything is computed);
# 3. asks `ntkcalc.plan` what the kernel on the whole dataset costs and how it will be computed
#    under a memory budget, then computes it, in total and per layer;
# 4. looks at the spectrum and the kernel sorted by class.

# %%
import os

import jax

jax.config.update("jax_enable_x64", True)  # float64 kernels: small eigenvalues keep their digits

SMALL = os.environ.get("NTKCALC_NOTEBOOK_SMALL") == "1"  # the test suite's quick sizes

# %%
import pathlib
import tempfile

import flax.linen as nn
import matplotlib.pyplot as plt
import numpy as np
import optax
import orbax.checkpoint as ocp

import ntkcalc
from ntkcalc import spectrum
from ntkcalc import pump_readings

n = 300 if SMALL else 3000
train, _ = pump_readings(n, 1, seed=2)
x, y = train.x, train.one_hot


class MLP(nn.Module):
    @nn.compact
    def __call__(self, h):
        h = nn.relu(nn.Dense(128, param_dtype=np.float64)(h))
        h = nn.relu(nn.Dense(128, param_dtype=np.float64)(h))
        return nn.Dense(4, param_dtype=np.float64)(h)


# %% [markdown]
# ## 1. Train and save a checkpoint (Adam, mini-batches: any training will do)

# %%
model = MLP()
params = model.init(jax.random.key(0), x[:1])["params"]
opt = optax.adam(3e-3)
state = opt.init(params)


@jax.jit
def update(params, state, xb, yb):
    loss = lambda p: optax.softmax_cross_entropy(model.apply({"params": p}, xb), yb).mean()
    grads = jax.grad(loss)(params)
    updates, state = opt.update(grads, state, params)
    return optax.apply_updates(params, updates), state


rng = np.random.default_rng(0)
for epoch in range(5 if SMALL else 20):
    for idx in np.array_split(rng.permutation(n), max(1, n // 100)):
        params, state = update(params, state, x[idx], y[idx])

folder = pathlib.Path(tempfile.mkdtemp()) / "checkpoint"
checkpointer = ocp.StandardCheckpointer()
checkpointer.save(folder, {"params": params})
checkpointer.wait_until_finished()
print("saved", folder)

# %% [markdown]
# ## 2. Load it as a `Net`

# %%
net = ntkcalc.Net.from_checkpoint(folder, module=model, example=x[:1])
net

# %% [markdown]
# ## 3. Plan, then compute
#
# `ntkcalc.plan` shows, per parameter leaf, which method it takes (structured derivatives,
# Jacobian contraction or NTK-vector products), the FLOPs and bytes per example, the tile size
# chosen for the memory budget and an estimated time, without computing anything. The same
# `memory` budget goes to `ntkcalc.ntk`, which then computes the kernel tile by tile.

# %%
budget = "64MB" if SMALL else "512MB"
print(ntkcalc.plan(net, x, memory=budget))

# %%
k = ntkcalc.ntk(net, x, memory=budget)  # (N, N): trace over the 4 outputs
by_layer = ntkcalc.ntk_by_layer(net, x, memory=budget)
print(k.shape, k.dtype)
for name, part in by_layer.items():
    print(f"{name}: {np.trace(part) / np.trace(k):.1%} of the trace")
assert np.allclose(sum(by_layer.values()), k)

# %% [markdown]
# ## 4. Spectrum and structure

# %%
spec = spectrum(k)
print(spec)
order = np.argsort(train.labels, kind="stable")
fig, (left, right) = plt.subplots(1, 2, figsize=(11, 4.2))
ranks = np.arange(1, len(spec.eigenvalues) + 1)
left.loglog(ranks, np.clip(spec.eigenvalues, 1e-300, None), ".")
left.set_xlabel("rank i")
left.set_ylabel("eigenvalue λ_i")
left.set_title(f"spectrum: decay exponent {spec.decay_exponent:.2f}")
im = right.imshow(k[np.ix_(order, order)], cmap="viridis")
edges = np.cumsum(np.bincount(train.labels))[:-1]
for e in edges:
    right.axhline(e, color="w", lw=0.7)
    right.axvline(e, color="w", lw=0.7)
right.set_title("kernel, examples sorted by condition: " + ", ".join(train.class_names))
fig.colorbar(im, ax=right)
plt.show()

# %% [markdown]
# **Reading.** After training, the blocks along the diagonal (pairs of pumps in the same
# condition) stand out: the trained network's kernel has learnt the task's structure. A
# condition number far above 1e12 (printed in the spectrum) would mean its smallest eigenvalues
# are rounding noise; use a ridge when solving with it.
