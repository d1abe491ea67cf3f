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
# # Is my network training lazily?
#
# A network trains *lazily* when gradient descent barely moves its neural tangent kernel: the
# network then behaves like its linearization at initialization, and everything the initial
# kernel predicts (training curves, test error, which examples are learnt first) holds for the
# trained network too. This notebook trains two MLPs of different widths on the built-in pump
# condition readings and asks of each:
#
# 1. how far did the kernel move (kernel distance to initialization, at a few steps)?
# 2. does the lazy-training forecast from the initial kernel track the observed loss?

# %%
import os

import jax

jax.config.update("jax_enable_x64", True)  # float64 kernels: small eigenvalues keep their digits

SMALL = os.environ.get("NTKCALC_NOTEBOOK_SMALL") == "1"  # the test suite's quick sizes

# %%
import jax.numpy as jnp
import matplotlib.pyplot as plt
import numpy as np
import optax
from flax import nnx

import ntkcalc
from ntkcalc import alignment, forecast, kernel_distance
from ntkcalc import pump_readings

train, test = pump_readings(120 if SMALL else 400, 60 if SMALL else 200, seed=1)
x, y = train.x, train.one_hot
print(train)


# %% [markdown]
# Two nnx MLPs in the standard parameterization, one narrow and one wide. Each is trained by
# full-batch gradient descent on `L = (1/N) Σ ½‖f(x) − y‖²`, the loss convention of `forecast`,
# at half of its own stability limit `2N/λ_max` (read off the initial kernel), so that the two
# runs are equally aggressive relative to their curvature.

# %%
class MLP(nnx.Module):
    def __init__(self, width, *, rngs):
        self.l1 = nnx.Linear(x.shape[1], width, param_dtype=np.float64, rngs=rngs)
        self.l2 = nnx.Linear(width, width, param_dtype=np.float64, rngs=rngs)
        self.out = nnx.Linear(width, y.shape[1], param_dtype=np.float64, rngs=rngs)

    def __call__(self, h):
        return self.out(nnx.tanh(self.l2(nnx.tanh(self.l1(h)))))


def stable_lr(k_full):
    # 2N / λ_max of the (N·O, N·O) kernel: gradient descent diverges above it
    n, _, o, _ = k_full.shape
    return 2 * n / np.linalg.eigvalsh(k_full.transpose(0, 2, 1, 3).reshape(n * o, -1))[-1]


def train_and_watch(width, steps, watch):
    net = ntkcalc.Net.from_nnx(MLP(width, rngs=nnx.Rngs(0)))
    k0 = ntkcalc.ntk(net, x, outputs="full")
    lr = 0.5 * stable_lr(k0)
    opt = optax.sgd(lr)
    loss = jax.jit(lambda p: 0.5 * jnp.sum((net.apply(p, x) - y) ** 2) / len(x))
    step = jax.jit(lambda p, s: optax.apply_updates(
        p, opt.update(jax.grad(loss)(p), s, p)[0]))
    params, state = net.params, opt.init(net.params)
    losses, outputs, kernels = [], [], {}
    for t in range(steps + 1):
        losses.append(float(loss(params)))
        outputs.append(np.asarray(net.apply(params, x)))
        if t in watch:
            kernels[t] = ntkcalc.ntk(net.replace(params=params), x)
        params = step(params, state)  # plain SGD: the optimizer state never changes
    fc = forecast(k0, y, net(x), lr=lr, steps=steps)
    return {"lr": lr, "loss": np.array(losses), "outputs": np.stack(outputs), "forecast": fc,
            "kernels": kernels}


steps = 150 if SMALL else 800
watch = sorted({0, steps // 20, steps // 4, steps})
widths = (16, 256) if SMALL else (32, 1024)
runs = {w: train_and_watch(w, steps, watch) for w in widths}

# %% [markdown]
# ## 1. How far did the kernel move?
#
# `kernel_distance(K0, Kt) = 1 − ⟨K0, Kt⟩ / (‖K0‖ ‖Kt‖)` is 0 for kernels equal up to scale.
# The alignment of the kernel with the labels tells *how* it moved: a kernel that learns the
# task aligns with `YYᵀ`.

# %%
for w, run in runs.items():
    k0 = run["kernels"][0]
    print(f"width {w:5d}, lr {run['lr']:.3g}")
    for t, k in run["kernels"].items():
        print(f"   step {t:4d}: distance {kernel_distance(k0, k):.1e}, "
              f"alignment {alignment(k, y):.3f}")

# %% [markdown]
# ## 2. Does the forecast from the initial kernel track the run?
#
# `Forecast.departure` is the largest gap between the observed and the forecast training
# outputs, relative to the initial residual `‖f_0 − y‖`; `ntkcalc.laziness` turns it and the
# kernel distances into the one verdict the library uses everywhere (thresholds: 10% on the gap,
# 5% on the kernel's change).

# %%
fig, axes = plt.subplots(1, len(runs), figsize=(10, 3.5), sharey=True)
for ax, (w, run) in zip(axes, runs.items()):
    fc = run["forecast"]
    ax.semilogy(run["loss"], label="observed")
    ax.semilogy(fc.steps, fc.train_loss, "--", label="forecast from the initial kernel")
    ax.set_title(f"width {w}")
    ax.set_xlabel("step")
    ax.grid(alpha=0.3)
axes[0].set_ylabel("train loss (1/N) Σ ½‖f − y‖²")
axes[0].legend()
plt.show()

for w, run in runs.items():
    gap = run["forecast"].departure(run["outputs"], tolerance=np.inf)  # the gap, no warning
    k0 = run["kernels"][0]
    moved = [kernel_distance(k0, run["kernels"][t]) for t in watch]
    verdict = ntkcalc.laziness(distance=moved, steps=watch, forecast_gap=gap)
    print(f"width {w:5d}: {verdict.sentence}")

# %% [markdown]
# **Reading.** The wide network's kernel barely moves and the forecast sits on its loss curve:
# for it, the initial kernel answers questions about training. The narrow network's kernel
# moves further (and aligns with the labels), so its forecast drifts off: analyse the kernels
# of its checkpoints instead, or make it wider or the learning rate smaller.
