"""The benchmark: ``python -m ntkcalc.bench`` (also ``ntkcalc bench``).

Every measurement runs in a fresh subprocess, so its peak RSS is its own. Each row times the
hand recipe users write today — ``jax.jit(jax.vmap(jax.jacrev(f)))`` over examples plus an
einsum — and each ntkcalc method on the same model and inputs, in float32 at matmul precision
"highest". ``seconds`` is the fastest of several compiled calls (5, 3 or 1 by the first call's
time), the same rule for every method and the recipe; ``first`` includes tracing and compilation.
Each ntkcalc row is also set against its *floor*: the plan's FLOP count at the matmul rate of
the plan's `Rates` (this machine's, kept per machine) plus its jitted calls at their fixed cost,
the fastest its chosen method could run here. Rows whose calls take milliseconds are timed over
many more calls (best of 200).

Rows: a tiny MLP 16-16-1 at N = 8 (the fixed cost of one call), the MLP 784-512-512-512-10
(0.93M parameters), a CNN with 3 conv layers (0.33M), a transformer encoder block on 16 tokens,
a CNN on 32×32×3 images (321,290), four encoder blocks as an nn.scan over layers, an LSTM over
32 steps, the dataset-scale rows of `ntkcalc._bench.scale` (``--scale``) and the
sketched-features rows of `ntkcalc._bench.sketch` (``--sketch``).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time

from ._subprocess import run_child

MODELS = {
    "tiny": "MLP 16-16-1 (relu, 289 params): the fixed cost of one call",
    "mlp": "MLP 784-512-512-512-10 (relu, 0.93M params)",
    "cnn": "CNN 3×conv3x3 stride 2 (64-128-192) + dense, 28×28×1 (0.33M params)",
    "transformer": "encoder block: embed 1000×64, 4-head attention, LayerNorm, MLP 256, 16 tokens",
    "cnn32": "CNN 32×32×3: 3×(conv3x3 SAME 32-64-64, relu, avg_pool 2) + dense 256 + 10 (321,290)",
    "scan-transformer": "4 encoder blocks as one nn.scan over layers: embed 1000×64, 4 heads, "
                        "MLP 256, 16 tokens",
    "lstm": "LSTM 64 over 32 steps of 8 features (nn.RNN) + dense 10",
}


def _model(name: str):
    import flax.linen as nn
    import jax
    import numpy as np

    import ntkcalc

    rng = np.random.default_rng(0)
    if name == "tiny":
        class Tiny(nn.Module):
            @nn.compact
            def __call__(self, x):
                return nn.Dense(1)(nn.relu(nn.Dense(16)(x)))

        module, x = Tiny(), rng.normal(size=(64, 16)).astype(np.float32)
    elif name == "mlp":
        class MLP(nn.Module):
            @nn.compact
            def __call__(self, x):
                for w in (512, 512, 512):
                    x = nn.relu(nn.Dense(w)(x))
                return nn.Dense(10)(x)

        module, x = MLP(), rng.normal(size=(4096, 784)).astype(np.float32)
    elif name == "cnn":
        class CNN(nn.Module):
            @nn.compact
            def __call__(self, x):
                for c in (64, 128, 192):
                    x = nn.relu(nn.Conv(c, (3, 3), strides=(2, 2))(x))
                return nn.Dense(10)(x.reshape(x.shape[0], -1))

        module, x = CNN(), rng.normal(size=(256, 28, 28, 1)).astype(np.float32)
    elif name == "transformer":
        class Encoder(nn.Module):
            @nn.compact
            def __call__(self, tokens):
                h = nn.Embed(1000, 64)(tokens)
                a = nn.MultiHeadDotProductAttention(num_heads=4)(nn.LayerNorm()(h))
                h = h + a
                h = h + nn.Dense(64)(nn.gelu(nn.Dense(256)(nn.LayerNorm()(h))))
                return nn.Dense(10)(h.mean(axis=1))

        module, x = Encoder(), rng.integers(0, 1000, size=(256, 16)).astype(np.int32)
    elif name == "cnn32":
        class CNN32(nn.Module):
            @nn.compact
            def __call__(self, x):
                for c in (32, 64, 64):
                    x = nn.relu(nn.Conv(c, (3, 3), padding="SAME")(x))
                    x = nn.avg_pool(x, (2, 2), strides=(2, 2))
                x = nn.relu(nn.Dense(256)(x.reshape(x.shape[0], -1)))
                return nn.Dense(10)(x)

        module, x = CNN32(), rng.normal(size=(256, 32, 32, 3)).astype(np.float32)
    elif name == "scan-transformer":
        class Block(nn.Module):
            @nn.compact
            def __call__(self, h, _):
                h = h + nn.MultiHeadDotProductAttention(num_heads=4)(nn.LayerNorm()(h))
                h = h + nn.Dense(64)(nn.gelu(nn.Dense(256)(nn.LayerNorm()(h))))
                return h, None

        class ScanEncoder(nn.Module):
            @nn.compact
            def __call__(self, tokens):
                h = nn.Embed(1000, 64)(tokens)
                layers = nn.scan(Block, variable_axes={"params": 0},
                                 split_rngs={"params": True}, length=4)
                h, _ = layers()(h, None)
                return nn.Dense(10)(h.mean(axis=1))

        module, x = ScanEncoder(), rng.integers(0, 1000, size=(256, 16)).astype(np.int32)
    elif name == "lstm":
        class LSTM(nn.Module):
            @nn.compact
            def __call__(self, x):
                return nn.Dense(10)(nn.RNN(nn.LSTMCell(64))(x)[:, -1])

        module, x = LSTM(), rng.normal(size=(256, 32, 8)).astype(np.float32)
    else:
        raise ValueError(f"unknown benchmark model {name!r}: use one of {sorted(MODELS)}")
    variables = module.init(jax.random.key(0), x[:1])
    return ntkcalc.Net.from_linen(module, variables), x


def _recipe(net, outputs: str):
    """The hand recipe: per-example Jacobians by vmap(jacrev), then an einsum per leaf."""
    import jax
    import jax.numpy as jnp

    f = lambda p, x: net.apply(p, x[None]).reshape(-1)
    jac = jax.vmap(jax.jacrev(f), (None, 0))
    spec = {"full": "iap,jbp->ijab", "trace": "iap,jap->ij"}[outputs]

    @jax.jit
    def kernel(params, x):
        leaves = jax.tree_util.tree_leaves(jac(params, x))
        return sum(jnp.einsum(spec, j.reshape(j.shape[0], j.shape[1], -1),
                              j.reshape(j.shape[0], j.shape[1], -1), precision="highest")
                   for j in leaves)

    return lambda x: kernel(net.params, x)


def _timed(fn):
    """(first call, fastest of several further calls, result): compile once, then time the
    fastest of 200 calls for rows whose first call took under 0.1 s, of 5 under 5 s, of 3 under
    20 s, else of 1."""
    import jax

    t0 = time.perf_counter()
    out = jax.block_until_ready(fn())
    first = time.perf_counter() - t0
    best = float("inf")
    for _ in range(200 if first < 0.1 else 5 if first < 5 else 3 if first < 20 else 1):
        t0 = time.perf_counter()
        out = jax.block_until_ready(fn())
        best = min(best, time.perf_counter() - t0)
    return first, best, out


def _child(spec: dict) -> dict:
    import resource

    import jax

    import ntkcalc

    jax.config.update("jax_default_matmul_precision", "highest")
    net, x = _model(spec["model"])
    x = x[: spec["n"]]
    if "eigen" in spec:
        return eigen_child(net, x, spec["method"], spec["eigen"])
    out: dict = {}
    if spec["method"] == "recipe":
        fn = _recipe(net, spec["outputs"])
        first, second, _ = _timed(lambda: fn(x))
    else:
        plan = ntkcalc.plan(net, x, outputs=spec["outputs"], method=spec["method"],
                            memory=spec.get("memory"))
        # The floor: the plan's FLOPs at its rates' matmul rate plus its jitted calls at their
        # fixed cost, the limit of its method here.
        out.update(planned=plan.method, estimate_s=plan.seconds, flops=plan.flops,
                   block=plan.block, calls=plan.calls, call_s=plan.rates.call,
                   floor_s=plan.flops / plan.rates.matmul + plan.calls * plan.rates.call,
                   rates=plan.rates.source)
        first, second, _ = _timed(lambda: ntkcalc.ntk(
            net, x, outputs=spec["outputs"], method=spec["method"], memory=spec.get("memory"),
            progress=False))
        out["matmul_flops_per_s"] = plan.rates.matmul
    out.update(first=first, seconds=second,
               peak_rss_gb=resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e6)
    return out


def spawn(module: str, spec: dict, *, devices: int | None = None, timeout: float = 3600) -> dict:
    """Run ``module``'s child entry point on ``spec`` in a fresh process; its JSON answer."""
    return run_child(module, ["--child", json.dumps(spec)], devices=devices, timeout=timeout)


ROWS = [
    # (model, N, outputs, methods to time, notes)
    ("tiny", 8, "trace", ("recipe", "auto")),
    ("mlp", 64, "full", ("recipe", "jacobian", "jvp", "structured", "auto")),
    ("mlp", 128, "full", ("recipe", "jacobian", "structured", "auto")),
    ("mlp", 128, "trace", ("recipe", "jacobian", "structured", "auto")),
    ("cnn", 32, "full", ("recipe", "jacobian", "structured", "auto")),
    ("transformer", 32, "trace", ("recipe", "jacobian", "structured", "auto")),
    ("mlp", 1024, "trace", ("structured", "auto")),
    ("cnn32", 32, "full", ("recipe", "jacobian", "structured", "auto")),
    ("cnn32", 128, "trace", ("recipe", "structured", "auto")),
    ("scan-transformer", 64, "trace", ("recipe", "jacobian", "structured", "auto")),
    ("lstm", 64, "trace", ("recipe", "jacobian", "structured", "auto")),
]
QUICK = [
    ("tiny", 8, "trace", ("recipe", "auto")),
    ("mlp", 64, "full", ("recipe", "structured", "auto")),
    ("cnn", 16, "full", ("recipe", "structured", "auto")),
]


def run(rows, *, log=print) -> list[dict]:
    table = []
    for model, n, outputs, methods in rows:
        for method in methods:
            spec = {"model": model, "n": n, "outputs": outputs, "method": method}
            res = spawn("ntkcalc.bench", spec)
            row = {"model": model, "N": n, "outputs": outputs, "method": method, **res}
            table.append(row)
            log(_format_row(row))
    return table


def jacobian_memory_row(*, log=print) -> dict:
    """'jacobian' on the MLP trace kernel at N=512 within a 4 GB budget (the recipe's Jacobians
    alone would need 512·10·932,362·4 B ≈ 19 GB)."""
    spec = {"model": "mlp", "n": 512, "outputs": "trace", "method": "jacobian", "memory": "4GB"}
    res = spawn("ntkcalc.bench", spec)
    row = {"model": "mlp", "N": 512, "outputs": "trace", "method": "jacobian (memory=4GB)", **res}
    log(_format_row(row))
    return row


def eigen_child(net, x, method: str, top: int) -> dict:
    """Top ``top`` eigenvalues of the trace kernel: scipy ``eigsh`` (ARPACK Lanczos, tol 1e-6:
    float32 products carry ~1e-7 relative error) on `ntk_operator` with ``method``, or the dense
    kernel from `ntk` plus ``numpy.linalg.eigh`` ("dense"). ``seconds`` includes building the
    operator (its factors) or the kernel; ``rel_err``: largest relative difference of the
    eigenvalues from the dense ones."""
    import resource

    import numpy as np
    import scipy.sparse.linalg as spla

    import ntkcalc

    t0 = time.perf_counter()
    dense = np.linalg.eigh(np.asarray(ntkcalc.ntk(net, x, progress=False), np.float64))[0]
    dense_s = time.perf_counter() - t0
    out = {"seconds": dense_s, "first": dense_s}
    if method != "dense":
        t0 = time.perf_counter()
        op = ntkcalc.ntk_operator(net, x, method=method)
        vals = spla.eigsh(op, k=top, which="LA", tol=1e-6, return_eigenvectors=False)
        out = {"seconds": time.perf_counter() - t0, "matvecs": op.matvecs}
        out["first"] = out["seconds"]
        top_dense = dense[::-1][:top]
        out["rel_err"] = float(np.max(np.abs(np.sort(vals)[::-1] - top_dense) / top_dense))
    out["peak_rss_gb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e6
    return out


def eigen_rows(*, n: int = 2000, top: int = 10, log=print) -> list[dict]:
    """Top-10 eigenvalues of the benchmark MLP's trace kernel at N = 2,000: matrix-free by
    products and by factors, against the dense kernel plus eigh."""
    table = []
    for method in ("dense", "factors", "products"):
        res = spawn("ntkcalc.bench", {"model": "mlp", "n": n, "outputs": "trace",
                                      "method": method, "eigen": top})
        row = {"model": "mlp", "N": n, "outputs": "trace", "method": f"eigsh top-{top} "
               f"{method}" if method != "dense" else f"ntk + eigh top-{top}", **res}
        table.append(row)
        log(_format_row(row) + (f" matvecs={res['matvecs']} rel_err={res['rel_err']:.1e}"
                                if "matvecs" in res else ""))
    return table


def _seconds(t: float) -> str:
    return f"{t:9.3f} s " if t >= 0.01 else f"{1e3 * t:9.3f} ms"


def _format_row(r: dict) -> str:
    extra = f" planned={r['planned']}" if "planned" in r else ""
    if "floor_s" in r:
        extra += f" {r['seconds'] / r['floor_s']:.2f}× floor ({_seconds(r['floor_s']).strip()})"
    return (f"{r['model']:<12} N={r['N']:<5} {r['outputs']:<6} {r['method']:<22} "
            f"{_seconds(r['seconds'])}  (first {r['first']:.2f} s)  peak "
            f"{r['peak_rss_gb']:.2f} GB" + extra)


def summarize(table: list[dict]) -> list[str]:
    """Ratios against the recipe and against the fastest explicit method, per row."""
    lines = []
    keys = sorted({(r["model"], r["N"], r["outputs"]) for r in table},
                  key=lambda k: (k[0], k[1], k[2]))
    for key in keys:
        rows = {r["method"]: r for r in table if (r["model"], r["N"], r["outputs"]) == key}
        auto = rows.get("auto")
        if auto is None:
            continue
        parts = [f"{key[0]} N={key[1]} {key[2]}: auto ({auto.get('planned')}) "
                 f"{_seconds(auto['seconds']).strip()}, "
                 f"{auto['seconds'] / auto['floor_s']:.2f}× its floor"]
        if "recipe" in rows and key[0] != "tiny":
            parts.append(f"{rows['recipe']['seconds'] / auto['seconds']:.1f}× faster than the "
                         "recipe")
        explicit = [r for m, r in rows.items() if m in ("jacobian", "jvp", "structured")]
        if explicit:
            best = min(explicit, key=lambda r: r["seconds"])
            parts.append(f"{auto['seconds'] / best['seconds']:.2f}× the fastest explicit "
                         f"({best['method']})")
        if key[0] == "tiny" and "recipe" in rows:
            extra = auto["seconds"] - rows["recipe"]["seconds"]
            parts.append(f"per call {1e3 * auto['seconds']:.3f} ms against the recipe's "
                         f"{1e3 * rows['recipe']['seconds']:.3f} ms: {1e3 * extra:+.3f} ms "
                         "(goal: within 1 ms)")
        if key == ("mlp", 1024, "trace"):
            achieved = auto["flops"] / auto["seconds"]
            parts.append(f"contraction {achieved / 1e9:.1f} GFLOP/s = "
                         f"{100 * achieved / auto['matmul_flops_per_s']:.0f}% of a jitted matmul "
                         f"({auto['matmul_flops_per_s'] / 1e9:.1f} GFLOP/s)")
        lines.append("; ".join(parts))
    return lines


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    if argv[:1] == ["--child"]:
        print(json.dumps(_child(json.loads(argv[1]))))
        return 0
    parser = argparse.ArgumentParser(
        prog="ntkcalc bench", description=(__doc__ or "").split("\n\n")[0],
        epilog="example:\n  ntkcalc bench --quick\n  ntkcalc bench --model cnn\n"
               "  ntkcalc bench --scale --json out.json",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true", help="two small rows only")
    parser.add_argument("--scale", action="store_true",
                        help="also run the dataset-scale rows (memory budget, store, devices)")
    parser.add_argument("--sketch", action="store_true",
                        help="also run the sketched-features rows (accuracy against the exact "
                             "kernel at N=4000, throughput at N=100,000 from a memmap)")
    parser.add_argument("--eigen", action="store_true",
                        help="only the matrix-free rows: top-10 eigenvalues of the MLP trace "
                             "kernel at N=2000 by ntk_operator (factors, products) and dense")
    parser.add_argument("--model", action="append", choices=sorted(MODELS),
                        help="only the rows of this model (repeatable)")
    parser.add_argument("--json", help="write every row to this JSON file")
    args = parser.parse_args(argv)
    import platform

    print(f"ntkcalc bench on {platform.machine()} {os.cpu_count()} CPU cores, "
          f"python {platform.python_version()}")
    if args.eigen:
        eigen_rows()
        return 0
    rows = QUICK if args.quick else ROWS
    if args.model:
        rows = [r for r in rows if r[0] in args.model]
    table = run(rows)
    if not args.quick and not args.model:
        table.append(jacobian_memory_row())
    if args.scale:
        from ._bench import scale as bench_scale

        for r in bench_scale.memory_budget() + bench_scale.device_throughput():
            print(r)
            table.append(r)
    if args.sketch:
        from ._bench import sketch as bench_sketch

        table += bench_sketch.rows()
    print()
    for line in summarize(table):
        print(line)
    if args.json:
        with open(args.json, "w") as f:
            json.dump(table, f, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
