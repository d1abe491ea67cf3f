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
# # Predict the fit and the test error without training
#
# Before training a network, its kernel at initialization already tells, for lazy training:
#
# 1. the training and test loss curves of full-batch gradient descent (`forecast`), and the
#    largest learning rate that does not diverge;
# 2. the test error of kernel ridge regression with that kernel, estimated from the training
#    set alone by GCV, KARE and leave-one-out (`risk`), and the ridge to use.
#
# The last cells check both against what actually happens: a real training run and held-out
# pumps.

# %%
import os

import jax

jax.config.update("jax_enable_x64", True)  # float64 kernels: small eigenvalues keep their digits

SMALL = os.environ.get("NTKCALC_NOTEBOOK_SMALL") == "1"  # the test suite's quick sizes

# %%
import flax.linen as nn
import jax.numpy as jnp
import matplotlib.pyplot as plt
import numpy as np
import optax

import ntkcalc
from ntkcalc import forecast, ridge_fit, risk
from ntkcalc import pump_readings

train, test = pump_readings(150 if SMALL else 500, 100 if SMALL else 400, seed=3)
x, y, xt, yt = train.x, train.one_hot, test.x, test.one_hot


class MLP(nn.Module):
    # tanh MLP in the NTK parameterization: N(0, 1) weights, pre-activations / √fan_in

    width: int = 512 if SMALL else 1024

    @nn.compact
    def __call__(self, h):
        for i, features in enumerate((self.width, self.width, 4)):
            w = self.param(f"w{i}", nn.initializers.normal(1.0), (h.shape[1], features),
                           np.float64)
            h = h @ w / np.sqrt(h.shape[1])
            h = jnp.tanh(h) if i < 2 else h
        return h


model = MLP()
net = ntkcalc.Net.from_linen(model, model.init(jax.random.key(0), x[:1]))
k = ntkcalc.ntk(net, x, outputs="full")       # (N, N, 4, 4), every output pair
kx = ntkcalc.ntk(net, xt, x, outputs="full")  # (M, N, 4, 4)
f0, f0t = np.asarray(net(x)), np.asarray(net(xt))

# %% [markdown]
# ## 1. The training curves, forecast
#
# The loss convention is `L = (1/N) Σ ½‖f(x) − y‖²` with one step `θ ← θ − lr ∇L`.

# %%
steps = 300 if SMALL else 1000
n, _, o, _ = k.shape
lam_max = np.linalg.eigvalsh(k.transpose(0, 2, 1, 3).reshape(n * o, -1))[-1]
lr = n / lam_max  # half the stability limit 2N/λ_max
fc = forecast(k, y, f0, lr=lr, steps=steps, k_test_train=kx, f0_test=f0t, y_test=yt)
print(f"largest stable learning rate {fc.max_stable_lr:.3g}; using {lr:.3g}")
print(f"after {steps} steps: train loss {fc.train_loss[-1]:.4f}, test loss "
      f"{fc.test_loss[-1]:.4f}, test accuracy {fc.test_accuracy[-1]:.1%}")

# %% [markdown]
# ## 2. The test error of kernel ridge, estimated from the training set
#
# Ridges are on the scikit-learn `KernelRidge` axis, `(K + r·I) α = y`, with `K` the kernel
# traced over outputs.

# %%
kt = np.einsum("ijaa->ij", k)
ktx = np.einsum("ijaa->ij", kx)
ridges = np.mean(np.diag(kt)) * np.logspace(-6, 2, 33)
est = risk(kt, y, ridges=ridges)
r = est.recommended  # GCV's choice, or LOO's when the two disagree (est.agree)
print(f"{est.recommended_by.upper()} picks ridge {r:.3g}; estimated test MSE "
      f"{getattr(est, est.recommended_by)[ridges == r][0]:.4f} (GCV and LOO agree: {est.agree})")

# %% [markdown]
# ## 3. Check: train the network, and score kernel ridge on held-out pumps

# %%
opt = optax.sgd(lr)
loss = jax.jit(lambda p, a, b: 0.5 * jnp.sum((net.apply(p, a) - b) ** 2) / len(a))
params, observed, observed_test = net.params, [], []
state = opt.init(params)
step = jax.jit(lambda p: optax.apply_updates(p, opt.update(jax.grad(loss)(p, x, y), state)[0]))
for t in range(steps + 1):
    observed.append(float(loss(params, x, y)))
    observed_test.append(float(loss(params, xt, yt)))
    params = step(params)

fits = ridge_fit(kt, y, ridge=ridges, k_test_train=ktx)
heldout = np.mean((fits.test_predictions - yt) ** 2, axis=(1, 2))

fig, (left, right) = plt.subplots(1, 2, figsize=(11, 3.8))
left.semilogy(observed, label="train, observed")
left.semilogy(fc.steps, fc.train_loss, "--", label="train, forecast")
left.semilogy(observed_test, label="test, observed")
left.semilogy(fc.steps, fc.test_loss, "--", label="test, forecast")
left.set_xlabel("step")
left.set_ylabel("loss (1/N) Σ ½‖f − y‖²")
left.legend()
right.loglog(ridges, est.gcv, label="GCV")
right.loglog(ridges, est.loo, label="leave-one-out")
right.loglog(ridges, heldout, lw=2, label="held-out")
right.axvline(r, color="grey", ls="--")
right.set_xlabel("ridge r")
right.set_ylabel("mean squared error per output")
right.legend()
plt.show()
gap = fc.departure(np.array(observed), tolerance=np.inf)  # from losses: a lower bound of the gap
print("forecast vs run:", ntkcalc.laziness(forecast_gap=gap).sentence)
print(f"kernel ridge at the chosen ridge: estimated "
      f"{getattr(est, est.recommended_by)[ridges == r][0]:.4f}, held-out {heldout[ridges == r][0]:.4f}")

# %% [markdown]
# **Reading.** When the gap is small the run is lazy and the forecast, made before training,
# already gave its curves. GCV (and KARE, the same number on this ridge axis) tracks the
# held-out curve and picks a ridge near its minimum, using no test data.
