"""Write the notebooks of this folder from the cell sources below (stored without outputs).

    python notebooks/build.py

Each notebook starts with a parameter cell: ``SMALL`` (set by the environment variable
``NTKCALC_NOTEBOOK_SMALL=1``, as the test suite does) picks sizes that run in well under a minute.
"""

from __future__ import annotations

import pathlib
import textwrap

import nbformat

HERE = pathlib.Path(__file__).resolve().parent

SETUP = """\
import os

import jax

jax.config.update("jax_enable_x64", True)  # float64 kernels: small eigenvalues keep their digits

SMALL = os.environ.get("NTKCALC_NOTEBOOK_SMALL") == "1"  # the test suite's quick sizes"""

LAZY = [
    ("md", """
    # Is my network training lazily?

    A network trains *lazily* when gradient descent barely moves its neural tangent kernel: the
    network then behaves like its linearization at initialization, and everything the initial
    kernel predicts (training curves, test error, which examples are learnt first) holds for the
    trained network too. This notebook trains two MLPs of different widths on the built-in pump
    condition readings and asks of each:

    1. how far did the kernel move (kernel distance to initialization, at a few steps)?
    2. does the lazy-training forecast from the initial kernel track the observed loss?
    """),
    ("code", SETUP),
    ("code", """
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
    print(train)"""),
    ("md", """
    Two nnx MLPs in the standard parameterization, one narrow and one wide. Each is trained by
    full-batch gradient descent on `L = (1/N) Σ ½‖f(x) − y‖²`, the loss convention of `forecast`,
    at half of its own stability limit `2N/λ_max` (read off the initial kernel), so that the two
    runs are equally aggressive relative to their curvature.
    """),
    ("code", """
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
        losses, kernels = [], {}
        for t in range(steps + 1):
            losses.append(float(loss(params)))
            if t in watch:
                kernels[t] = ntkcalc.ntk(net.replace(params=params), x)
            params = step(params, state)  # plain SGD: the optimizer state never changes
        fc = forecast(k0, y, net(x), lr=lr, steps=steps)
        return {"lr": lr, "loss": np.array(losses), "forecast": fc, "kernels": kernels}


    steps = 150 if SMALL else 800
    watch = sorted({0, steps // 20, steps // 4, steps})
    widths = (16, 256) if SMALL else (32, 1024)
    runs = {w: train_and_watch(w, steps, watch) for w in widths}"""),
    ("md", """
    ## 1. How far did the kernel move?

    `kernel_distance(K0, Kt) = 1 − ⟨K0, Kt⟩ / (‖K0‖ ‖Kt‖)` is 0 for kernels equal up to scale.
    The alignment of the kernel with the labels tells *how* it moved: a kernel that learns the
    task aligns with `YYᵀ`.
    """),
    ("code", """
    for w, run in runs.items():
        k0 = run["kernels"][0]
        print(f"width {w:5d}, lr {run['lr']:.3g}")
        for t, k in run["kernels"].items():
            print(f"   step {t:4d}: distance {kernel_distance(k0, k):.1e}, "
                  f"alignment {alignment(k, y):.3f}")"""),
    ("md", """
    ## 2. Does the forecast from the initial kernel track the run?

    `Forecast.departure` is the largest relative gap between the observed and the forecast
    training loss; it warns above its tolerance (10% by default), which here would mean the run
    is not lazy.
    """),
    ("code", """
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
        gap = run["forecast"].departure(run["loss"], tolerance=np.inf)  # the gap, no warning
        verdict = "lazy" if gap < 0.1 else "NOT lazy: trust the trained network, not the forecast"
        print(f"width {w:5d}: largest gap {gap:.1%}  → {verdict}")"""),
    ("md", """
    **Reading.** The wide network's kernel barely moves and the forecast sits on its loss curve:
    for it, the initial kernel answers questions about training. The narrow network's kernel
    moves further (and aligns with the labels), so its forecast drifts off: analyse the kernels
    of its checkpoints instead, or make it wider or the learning rate smaller.
    """),
]

CHECKPOINT = [
    ("md", """
    # The kernel of a trained checkpoint, at dataset scale

    A training run saves checkpoints; the kernel of a checkpoint tells what the trained network
    has learnt to treat as similar. This notebook

    1. trains a linen MLP on the pump readings and saves an orbax checkpoint;
    2. loads it back with `ntkcalc.Net.from_checkpoint` (the checkpoint is matched leaf by leaf
       against the module before anything is computed);
    3. asks `ntkcalc.plan` what the kernel on the whole dataset costs and how it will be computed
       under a memory budget, then computes it, in total and per layer;
    4. looks at the spectrum and the kernel sorted by class.
    """),
    ("code", SETUP),
    ("code", """
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
            return nn.Dense(4, param_dtype=np.float64)(h)"""),
    ("md", "## 1. Train and save a checkpoint (Adam, mini-batches: any training will do)"),
    ("code", """
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
    print("saved", folder)"""),
    ("md", "## 2. Load it as a `Net`"),
    ("code", """
    net = ntkcalc.Net.from_checkpoint(folder, module=model, example=x[:1])
    net"""),
    ("md", """
    ## 3. Plan, then compute

    `ntkcalc.plan` shows, per parameter leaf, which method it takes (structured derivatives,
    Jacobian contraction or NTK-vector products), the FLOPs and bytes per example, the tile size
    chosen for the memory budget and an estimated time, without computing anything. The same
    `memory` budget goes to `ntkcalc.ntk`, which then computes the kernel tile by tile.
    """),
    ("code", """
    budget = "64MB" if SMALL else "512MB"
    print(ntkcalc.plan(net, x, memory=budget))"""),
    ("code", """
    k = ntkcalc.ntk(net, x, memory=budget)  # (N, N): trace over the 4 outputs
    by_layer = ntkcalc.ntk_by_layer(net, x, memory=budget)
    print(k.shape, k.dtype)
    for name, part in by_layer.items():
        print(f"{name}: {np.trace(part) / np.trace(k):.1%} of the trace")
    assert np.allclose(sum(by_layer.values()), k)"""),
    ("md", "## 4. Spectrum and structure"),
    ("code", """
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
    plt.show()"""),
    ("md", """
    **Reading.** After training, the blocks along the diagonal (pairs of pumps in the same
    condition) stand out: the trained network's kernel has learnt the task's structure. A
    condition number far above 1e12 (printed in the spectrum) would mean its smallest eigenvalues
    are rounding noise; use a ridge when solving with it.
    """),
]

PREDICT = [
    ("md", """
    # Predict the fit and the test error without training

    Before training a network, its kernel at initialization already tells, for lazy training:

    1. the training and test loss curves of full-batch gradient descent (`forecast`), and the
       largest learning rate that does not diverge;
    2. the test error of kernel ridge regression with that kernel, estimated from the training
       set alone by GCV, KARE and leave-one-out (`risk`), and the ridge to use.

    The last cells check both against what actually happens: a real training run and held-out
    pumps.
    """),
    ("code", SETUP),
    ("code", """
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
    f0, f0t = np.asarray(net(x)), np.asarray(net(xt))"""),
    ("md", """
    ## 1. The training curves, forecast

    The loss convention is `L = (1/N) Σ ½‖f(x) − y‖²` with one step `θ ← θ − lr ∇L`.
    """),
    ("code", """
    steps = 300 if SMALL else 1000
    n, _, o, _ = k.shape
    lam_max = np.linalg.eigvalsh(k.transpose(0, 2, 1, 3).reshape(n * o, -1))[-1]
    lr = n / lam_max  # half the stability limit 2N/λ_max
    fc = forecast(k, y, f0, lr=lr, steps=steps, k_test_train=kx, f0_test=f0t, y_test=yt)
    print(f"largest stable learning rate {fc.max_stable_lr:.3g}; using {lr:.3g}")
    print(f"after {steps} steps: train loss {fc.train_loss[-1]:.4f}, test loss "
          f"{fc.test_loss[-1]:.4f}, test accuracy {fc.test_accuracy[-1]:.1%}")"""),
    ("md", """
    ## 2. The test error of kernel ridge, estimated from the training set

    Ridges are on the scikit-learn `KernelRidge` axis, `(K + r·I) α = y`, with `K` the kernel
    traced over outputs.
    """),
    ("code", """
    kt = np.einsum("ijaa->ij", k)
    ktx = np.einsum("ijaa->ij", kx)
    ridges = np.mean(np.diag(kt)) * np.logspace(-6, 2, 33)
    est = risk(kt, y, ridges=ridges)
    r = est.best["gcv"]
    print(f"GCV picks ridge {r:.3g}; estimated test MSE {est.gcv[ridges == r][0]:.4f}")"""),
    ("md", "## 3. Check: train the network, and score kernel ridge on held-out pumps"),
    ("code", """
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
    left.set_ylabel("loss")
    left.legend()
    right.loglog(ridges, est.gcv, label="GCV")
    right.loglog(ridges, est.loo, label="leave-one-out")
    right.loglog(ridges, heldout, lw=2, label="held-out")
    right.axvline(r, color="grey", ls="--")
    right.set_xlabel("ridge r")
    right.set_ylabel("mean squared error per output")
    right.legend()
    plt.show()
    gap = fc.departure(np.array(observed), tolerance=np.inf)
    print(f"forecast vs run: largest train-loss gap {gap:.1%}"
          + ("" if gap < 0.1 else " — not lazy: the forecast does not describe this run"))
    print(f"kernel ridge at the GCV ridge: estimated {est.gcv[ridges == r][0]:.4f}, "
          f"held-out {heldout[ridges == r][0]:.4f}")"""),
    ("md", """
    **Reading.** When the gap is small the run is lazy and the forecast, made before training,
    already gave its curves. GCV (and KARE, the same number on this ridge axis) tracks the
    held-out curve and picks a ridge near its minimum, using no test data.
    """),
]

NOTEBOOKS = {
    "lazy_training.ipynb": LAZY,
    "checkpoint_kernel.ipynb": CHECKPOINT,
    "predict_without_training.ipynb": PREDICT,
}


def build(cells) -> nbformat.NotebookNode:
    nb = nbformat.v4.new_notebook()
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3",
                                 "language": "python"}
    nb.metadata["language_info"] = {"name": "python"}
    make = {"md": nbformat.v4.new_markdown_cell, "code": nbformat.v4.new_code_cell}
    nb.cells = [make[kind](textwrap.dedent(src).strip("\n")) for kind, src in cells]
    for i, cell in enumerate(nb.cells):
        cell.id = f"cell-{i}"
    return nb


def main() -> None:
    for name, cells in NOTEBOOKS.items():
        nbformat.write(build(cells), HERE / name)
        print("wrote", HERE / name)


if __name__ == "__main__":
    main()
