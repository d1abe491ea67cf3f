"""Dataset-scale benchmarks: peak memory against the budget, a large kernel into a store, and tile
throughput on 1, 2 and 4 forced CPU devices.

Each function returns rows ``{model, N, method, outputs, seconds, peak_rss_gb, notes}`` for
``python -m ntkcalc.bench``. Every measurement runs in a fresh subprocess (``python -m
ntkcalc._bench.scale <json>``) so peak RSS is that run's alone and XLA flags apply; the child
runs in float32 (JAX's default) with the library's "highest" matmul precision.

Model: MLP 784-512-512-512-10 (tanh), 932,362 parameters, N(0, 1/fan_in) weights, Gaussian inputs.
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
import sys
import tempfile
import time

from .._subprocess import run_child

MODEL = "MLP 784-512-512-512-10"
WIDTHS = (784, 512, 512, 512, 10)


def _net(seed: int = 0):
    import jax
    import jax.numpy as jnp

    import ntkcalc

    keys = jax.random.split(jax.random.key(seed), len(WIDTHS) - 1)
    params = [
        {"w": jax.random.normal(k, (a, b), jnp.float32) / math.sqrt(a),
         "b": jnp.zeros((b,), jnp.float32)}
        for k, a, b in zip(keys, WIDTHS[:-1], WIDTHS[1:], strict=True)
    ]

    def apply(p, x):
        for layer in p[:-1]:
            x = jnp.tanh(x @ layer["w"] + layer["b"])
        return x @ p[-1]["w"] + p[-1]["b"]

    return ntkcalc.Net(apply, params)


def _inputs(n: int, seed: int = 1):
    import numpy as np

    return np.random.default_rng(seed).normal(size=(n, WIDTHS[0])).astype(np.float32)


def _child(spec: dict) -> dict:
    """Run one measurement in this process; returns what the parent reports, with this
    process's own peak RSS (getrusage RUSAGE_SELF at the end)."""
    import resource

    out = _measure(spec)
    out["self_peak_rss_gb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e6
    return out


def _measure(spec: dict) -> dict:
    import resource

    import ntkcalc
    from ntkcalc._engine.planner import prepare
    from ntkcalc._tiles.plan import plan_request

    net, x = _net(), _inputs(spec["n"])
    base_rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e6  # KB → GB
    if spec["kind"] == "throughput":
        import jax

        from ntkcalc._tiles.run import iter_tiles

        req = prepare(net, x, outputs=spec["outputs"])
        plan = plan_request(req, outputs=spec["outputs"], memory="8GB", method="auto")
        plan = dataclasses.replace(plan, block=spec["block"], cache_factors=True)
        devs = jax.local_devices()[: spec["use"]]
        for _ in iter_tiles(plan, req, devices=devs):  # compile on every device
            pass
        times = []
        for _ in range(spec.get("repeats", 3)):
            t0 = time.perf_counter()
            count = sum(1 for _ in iter_tiles(plan, req, devices=devs))
            times.append(time.perf_counter() - t0)
        return {"seconds": min(times), "all_seconds": times, "tiles": count,
                "method": plan.method, "base_rss_gb": base_rss}
    req = prepare(net, x, outputs=spec["outputs"])
    plan = plan_request(req, outputs=spec["outputs"], memory=spec["memory"], method="auto",
                        store=spec.get("store"))
    result = plan.reserved
    t0 = time.perf_counter()
    k = ntkcalc.ntk(net, x, outputs=spec["outputs"], memory=spec["memory"],
                    store=spec.get("store"), progress=False)
    seconds = time.perf_counter() - t0
    info = getattr(k, "info", None)
    return {"seconds": seconds, "method": plan.method, "block": plan.block,
            "estimate_gb": (plan.peak_bytes + result) / 1e9, "base_rss_gb": base_rss,
            "tiles": None if info is None else info.tiles}


def _spawn(spec: dict, *, devices: int | None = None, timeout: float = 3600) -> dict:
    """Run `_child` in a subprocess; its peak RSS (GB) is the child's own getrusage, checked
    against getrusage(RUSAGE_CHILDREN) here when that grew."""
    import resource

    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    out = run_child(__name__, [json.dumps(spec)], devices=devices, timeout=timeout)
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    # RUSAGE_CHILDREN is the largest of any child so far: a check only when it grew.
    if peak > before and abs(peak / 1e6 - out["self_peak_rss_gb"]) > 0.01:
        raise RuntimeError(f"peak RSS disagree: {peak / 1e6} GB vs {out['self_peak_rss_gb']} GB")
    out["peak_rss_gb"] = out["self_peak_rss_gb"]
    return out


def _row(n, method, outputs, seconds, peak, notes) -> dict:
    return {"model": MODEL, "N": n, "method": method, "outputs": outputs,
            "seconds": round(seconds, 2), "peak_rss_gb": None if peak is None else round(peak, 3),
            "notes": notes}


def memory_budget(n: int = 4096, memory: str = "1.5GB") -> list[dict]:
    """(a) Peak RSS of an in-memory trace kernel under ``memory`` (target ≤ 1.9 GB at 1.5GB)."""
    out = _spawn({"kind": "kernel", "n": n, "outputs": "trace", "memory": memory})
    notes = (f"memory={memory}; planner peak estimate {out['estimate_gb']:.2f} GB (tiles of "
             f"{out['block']}, with the result); RSS after imports and model "
             f"{out['base_rss_gb']:.2f} GB; peak RSS includes the JAX runtime and compiled code")
    return [_row(n, out["method"], "trace", out["seconds"], out["peak_rss_gb"], notes)]


def store_scale(n: int = 20000, *, full: bool = False, measured_n: int = 8192,
                memory: str = "4GB") -> list[dict]:
    """(b) A trace kernel into a store. ``full=True`` runs N=``n`` (long); otherwise N=
    ``measured_n`` is run and the time for ``n`` and the largest N in 10 minutes extrapolated
    as time ∝ N² (pairs dominate; factor work is linear and the measured seconds include
    compilation, so this overestimates time, the more so the smaller ``measured_n``)."""
    size = n if full else measured_n
    with tempfile.TemporaryDirectory() as d:
        out = _spawn({"kind": "kernel", "n": size, "outputs": "trace", "memory": memory,
                      "store": os.path.join(d, "k.zarr")})
    rows = [_row(size, out["method"], "trace", out["seconds"], out["peak_rss_gb"],
                 f"measured into a zarr store, memory={memory}, {out['tiles']} tiles of "
                 f"{out['block']}; seconds include compilation")]
    if not full:
        t = out["seconds"] * (n / size) ** 2
        n10 = int(size * math.sqrt(600 / out["seconds"]))
        rows.append(_row(n, out["method"], "trace", t, None,
                         f"EXTRAPOLATED from N={size} as time ∝ N² (not measured; compile "
                         "included, so pessimistic); largest N "
                         f"in 10 minutes ≈ {n10} (extrapolated)"))
    return rows


def device_throughput(n: int = 2048, block: int = 256,
                      counts: tuple[int, ...] = (1, 2, 4)) -> list[dict]:
    """(c) Tiles per second on 1, 2 and 4 forced CPU devices (same tiles; compile excluded; best
    of 3 passes: single passes on a shared 2-core VM vary by ±20%)."""
    rows = []
    for c in counts:
        out = _spawn({"kind": "throughput", "n": n, "outputs": "trace", "block": block,
                      "use": c}, devices=c)
        rows.append(_row(n, out["method"], "trace", out["seconds"], out["peak_rss_gb"],
                         f"{c} forced CPU device(s): {out['tiles']} tiles of {block}, "
                         f"{out['tiles'] / out['seconds']:.2f} tiles/s (best of "
                         f"{len(out['all_seconds'])} compiled passes: "
                         f"{', '.join(f'{t:.2f}' for t in out['all_seconds'])} s)"))
    return rows


def main(argv: list[str]) -> None:
    print(json.dumps(_child(json.loads(argv[0]))))


if __name__ == "__main__":
    main(sys.argv[1:])
