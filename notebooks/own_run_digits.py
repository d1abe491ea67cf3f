# ---
# jupyter:
#   jupytext:
#     text_representation:
#       extension: .py
#       format_name: percent
#       format_version: '1.3'
#   kernelspec:
#     display_name: Python 3
#     language: python
#     name: python3
# ---

# %% [markdown]
# # Your own run, end to end: a network trained on digits
#
# The whole job on a run of your own. We train a small flax MLP on scikit-learn's handwritten
# digits with optax, saving orbax checkpoints as anyone would, and then hand the checkpoint
# directory to `ntkcalc.analyse_run`. It computes the kernel each answer needs and returns one
# result:
#
# 1. did the kernel move (drift over the checkpoints, which layers moved, the laziness verdict)?
# 2. if training had continued lazily from initialization, or from a later checkpoint, where
#    would it land (the forecast of the linearized model)?
# 3. what test error does kernel ridge promise, from the training set alone?
# 4. does the interpolation condition hold at each checkpoint (rank of the last hidden features
#    [H, 1] against the number of examples)?

# %%
import os
import tempfile

import jax

jax.config.update("jax_enable_x64", True)  # float64 kernels: rank and λ_min verdicts keep digits

SMALL = os.environ.get("NTKCALC_NOTEBOOK_SMALL") == "1"  # the test suite's quick sizes

# %%
# %matplotlib inline
import flax.linen as nn
import jax.numpy as jnp
import matplotlib.pyplot as plt
import numpy as np
import optax
import orbax.checkpoint as ocp
from sklearn.datasets import load_digits

import ntkcalc

digits = load_digits()
n_train, n_test = (150, 100) if SMALL else (600, 400)
order = np.random.default_rng(0).permutation(len(digits.target))
x = digits.data[order[:n_train]] / 16.0
labels = digits.target[order[:n_train]]
x_test = digits.data[order[n_train:n_train + n_test]] / 16.0
labels_test = digits.target[order[n_train:n_train + n_test]]
print(f"{n_train} training and {n_test} test digits, 64 pixels, 10 classes")

# %% [markdown]
# ## Train, as usual, with checkpoints
#
# Full-batch gradient descent on `L = (1/N) Σ ½‖f(x) − y‖²` with one-hot targets: the loss and
# step of `ntkcalc.forecast`, so the forecasts can be compared with the run itself. (For
# minibatch or adaptive optimizers pass `full_batch_gd=False`: the kernel answers stay, the
# forecast-vs-run gap is not computed.)

# %%
class MLP(nn.Module):
    width: int = 64 if SMALL else 512

    @nn.compact
    def __call__(self, x):
        h = nn.tanh(nn.Dense(self.width)(x))
        h = nn.tanh(nn.Dense(self.width)(h))
        return nn.Dense(10)(h)


model = MLP()
params = model.init(jax.random.key(0), jnp.asarray(x[:1]))["params"]
y = jnp.asarray(np.eye(10)[labels])

# The learning rate: half the stability limit 2N/λ_max of the initial (N·O, N·O) kernel, above
# which gradient descent diverges along the top eigenvector.
k0 = ntkcalc.ntk(ntkcalc.Net.from_linen(model, {"params": params}), x, outputs="full")
lr = 0.5 * 2 * len(x) / ntkcalc.spectrum(k0, top=1).eigenvalues[0]
steps = 150 if SMALL else 600
loss = jax.jit(lambda p: 0.5 * jnp.sum((model.apply({"params": p}, x) - y) ** 2) / len(x))
opt = optax.sgd(lr)
state, grad = opt.init(params), jax.jit(jax.grad(loss))
saved = sorted({0, steps // 10, steps // 3, steps})

ckpt_dir = os.path.join(tempfile.mkdtemp(), "checkpoints")
options = ocp.CheckpointManagerOptions(max_to_keep=None, enable_async_checkpointing=False)
losses = []
with ocp.CheckpointManager(ckpt_dir, options=options) as manager:
    for step in range(steps + 1):
        losses.append(float(loss(params)))
        if step in saved:
            manager.save(step, args=ocp.args.StandardSave({"params": params}))
        updates, state = opt.update(grad(params), state)
        params = optax.apply_updates(params, updates)
print(f"lr {lr:.3g}; train loss {losses[0]:.3f} → {losses[-1]:.3f}; checkpoints at {saved}")

# %% [markdown]
# ## Analyse the run
#
# One call. `forecast_from` picks the checkpoints to forecast from: the first (initialization)
# and a later one ("if training continued lazily from step t, where does it land?").

# %%
result = ntkcalc.analyse_run(
    ckpt_dir, x, labels, module=MLP, x_test=x_test, y_test=labels_test,
    lr=lr, full_batch_gd=True, forecast_from=[saved[0], saved[-2]],
)
print("verdict:", result.verdict)
print("kernels:", result.kinds)
for g in result.groups:
    print(f"  {g.group:10s} relative change {g.relative_change:.2%}"
          + ("  (moved)" if g.moved else ""))

# %%
fig = result.plot()
fig

# %% [markdown]
# ## Test error without a test set, and the interpolation check

# %%
for a in result.checkpoints:
    print(f"step {a.step:4d}: LOO {a.loo:.4f}, GCV {a.gcv:.4f} at ridge {a.ridge:.3g}; "
          f"kernel ridge on the test digits {a.test_mse_ridge:.4f} "
          f"(accuracy {a.test_accuracy_ridge:.1%}); kernel: {a.kernel}")
for step, r in zip(result.steps, result.feature_ranks):
    if r is not None:
        print(f"step {step:4d}: {r.verdict}")
for caution in result.cautions:
    print("caution:", caution)

# %% [markdown]
# **Reading.** The verdict says in one sentence whether the initial kernel still describes the
# trained network, with the numbers behind it (kernel change against its threshold and against
# the spread between initializations, and how far the training outputs left the linearized
# forecast). When it reads *lazy*, the forecast from initialization and the kernel-ridge test
# error are answers about this network; when it does not, use the kernels of the later
# checkpoints (the forecast from a later step) instead. `result.write("report")` writes the same
# as `report.html`, with every number it shows in `report.json` and the whole result in
# `result.json`.

# %%
html_path, json_path = result.write(os.path.join(tempfile.mkdtemp(), "report"))
print(html_path)
plt.close("all")
