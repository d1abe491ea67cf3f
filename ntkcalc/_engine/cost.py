"""Cost model: FLOPs and bytes of each method from the shapes in the traced jaxpr.

Counts follow the cost analysis of Novak, Sohl-Dickstein & Schoenholz, "Fast Finite Width Neural
Tangent Kernel", ICML 2022, arXiv:2206.08720: a VJP or JVP costs about two forward passes; a
Jacobian contraction costs 2·A·P per pair of examples (A² for the full O×O kernel); a structured
dense layer costs 2·B·T²·(C + A·R) per pair. Time is FLOPs over a measured matmul rate plus bytes
moved (factors written and read, Gram temporaries) over a measured streaming rate. Estimates are
for choosing, not for promising: the plan prints them next to the rates they are converted with.
"""

from __future__ import annotations

import functools
import math
import time

import jax
import jax.numpy as jnp
import numpy as np
from jax import lax

from . import rules
from .structured import CALLS, _sub_jaxpr


def forward_cost(closed) -> tuple[float, float]:
    """(FLOPs, activation elements) of one evaluation of a traced per-example function: each
    primitive's FLOPs from its rule (`rules.forward_flops`), a scan body times its length."""
    flops = 0.0
    acts = 0.0

    def walk(jaxpr, times):  # times: how often each equation runs (scan steps)
        nonlocal flops, acts
        for eqn in jaxpr.eqns:
            name = eqn.primitive.name
            sub = _sub_jaxpr(eqn) if name in CALLS or name == "scan" else None
            if sub is not None:
                walk(sub.jaxpr, times * (eqn.params["length"] if name == "scan" else 1))
                continue
            acts += times * sum(
                math.prod(v.aval.shape) for v in eqn.outvars if hasattr(v.aval, "shape"))
            flops += times * rules.forward_flops(eqn)

    walk(closed.jaxpr, 1)
    return flops, acts


def dense_pair_flops(a: int, p: int, outputs: str) -> float:
    """Contraction FLOPs per pair of examples for one dense leaf."""
    return 2.0 * p * (a * a if outputs == "full" else a)


def factored_pair_flops(a: int, b: int, t: int, c: int, r: int, outputs: str) -> float:
    """Contraction FLOPs per pair of examples for one factored leaf, in the order `contract`
    runs it: the input Gram (2·B·T²·C; pass c=0 for looked-up rows, whose Gram is a
    comparison), the cotangent Gram (2·B·T²·R·A, A² for the full kernel), and their product
    summed over positions. The memory traffic of the Gram temporaries is priced separately
    (`factored_pair_elements`, `stream_rate`)."""
    directions = a * a if outputs == "full" else a
    return 2.0 * b * t * t * (c + r * directions) + factored_pair_elements(a, b, t, outputs)


def formation_flops(a: int, b: int, t: int, c: int, r: int) -> float:
    """FLOPs of one example's dense derivative from its factors,
    ``J[a, B, R, C] = Σ_t g[a, B, t, R] h[B, t, C]``: a batched matmul, 2·A·B·T·C·R (a matmul
    (m, k) @ (k, n) is 2·m·n·k FLOPs, common practice)."""
    return 2.0 * a * b * t * c * r


def factored_pair_elements(a: int, b: int, t: int, outputs: str) -> float:
    """Temporaries per pair of a factored contraction (the two Gram arrays)."""
    mode = a * a if outputs == "full" else (a if outputs == "diagonal" else 1)
    return b * t * t * (1 + mode)


def _best_seconds(f, x, repeats: int) -> float:
    """Fastest of ``repeats`` timed calls of the jitted ``f(x)``, after one warm-up call."""
    f = jax.jit(f)
    f(x).block_until_ready()
    best = math.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        f(x).block_until_ready()
        best = min(best, time.perf_counter() - t0)
    return max(best, 1e-9)


@functools.lru_cache(maxsize=4)
def machine_rate(dtype_name: str = "float32") -> float:
    """Measured FLOP/s of a jitted 512×512 matmul on the default device (cached per process)."""
    n = 512
    x = jnp.ones((n, n), dtype=dtype_name)
    return 2.0 * n**3 / _best_seconds(lambda a: jnp.dot(a, a, precision="highest"), x, 5)


@functools.lru_cache(maxsize=4)
def stream_rate(dtype_name: str = "float32") -> float:
    """Measured bytes/s (read + written) of a jitted elementwise op on 2²⁴ elements, larger than
    caches: the speed of memory-bound work (writing factors, re-laying them out, streaming Gram
    temporaries), cached per process."""
    n = 1 << 24
    x = jnp.arange(n, dtype=dtype_name)
    return 2.0 * n * x.dtype.itemsize / _best_seconds(lambda u: u * 2, x, 3)


@functools.lru_cache(maxsize=32)
def formation_rate(inner: int, dtype_name: str = "float32") -> float:
    """Measured FLOP/s of forming dense derivatives from factors: a batched GEMM
    (32 × (1280 × t) @ (t × 64)) whose inner dimension t is the number of positions. Short inner
    dimensions run far below `machine_rate`. ``inner`` is rounded up to a power of two (≤ 512)
    so that few sizes are ever measured; cached per process."""
    t = min(512, 1 << max(0, math.ceil(math.log2(max(1, inner)))))
    g = jnp.ones((32, 1280, t), dtype=dtype_name)
    h = jnp.ones((32, t, 64), dtype=dtype_name)
    f = lambda u: jnp.matmul(u, h, precision="highest")
    return 2.0 * 32 * 1280 * t * 64 / _best_seconds(f, g, 3)


@functools.lru_cache(maxsize=4)
def scan_accumulation_rate(dtype_name: str = "float32") -> float:
    """Measured entries/s at which a reverse pass accumulates the cotangent of a loop-constant
    weight over the steps of a scan (see `structured.loop_accumulation`): the gradient of a
    16-step scan of ``tanh(x_t @ W)``, W 64×64, vmapped over 256 examples, per accumulated entry
    and step. Each step adds an outer product into the accumulator, memory-bound work that the
    matmul rate does not price; cached per process."""
    b, c, s = 256, 64, 16
    w = jnp.full((c, c), 0.01, dtype_name)

    def f(w, xs):
        return lax.scan(lambda acc, x_t: (acc + jnp.tanh(x_t @ w).sum(), None),
                        jnp.zeros((), w.dtype), xs)[0]

    grads = jax.vmap(jax.grad(f), (None, 0))
    xs = jnp.ones((b, s, c), dtype_name)
    return b * c * c * s / _best_seconds(lambda x: grads(w, x), xs, 3)


def available_memory() -> int:
    """Bytes of memory available to this process (host RAM; the first device's where known)."""
    dev = jax.devices()[0]
    if dev.platform != "cpu":
        stats = dev.memory_stats() or {}
        if "bytes_limit" in stats:
            return int(stats["bytes_limit"] - stats.get("bytes_in_use", 0))
    try:
        import psutil

        return int(psutil.virtual_memory().available)
    except ImportError:  # pragma: no cover - psutil is a test dependency only
        import os

        return int(os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE"))


def itemsize(dtype) -> int:
    return np.dtype(dtype).itemsize


_UNITS = {"": 1, "B": 1, "KB": 10**3, "MB": 10**6, "GB": 10**9, "TB": 10**12,
          "KIB": 2**10, "MIB": 2**20, "GIB": 2**30, "TIB": 2**40}
DEFAULT_MEMORY_FRACTION = 0.5


def parse_memory(memory) -> int:
    """Bytes from ``None`` (half the available memory), an int, or a string like ``"1.5GB"``."""
    if memory is None:
        return int(DEFAULT_MEMORY_FRACTION * available_memory())
    if isinstance(memory, int | float | np.integer | np.floating) and not isinstance(
            memory, bool | np.bool_):
        if not math.isfinite(memory) or memory <= 0:
            raise ValueError(f"`memory`={memory!r} must be a positive, finite byte count or a "
                             "string such as '2GB'.")
        return int(memory)
    if isinstance(memory, str):
        text = memory.strip().upper().replace(" ", "")
        num = text.rstrip("KMGTIB")
        unit = text[len(num):]
        try:
            value = float(num)
        except ValueError:
            value = None
        if value is not None and math.isfinite(value) and value > 0 and unit in _UNITS:
            return int(value * _UNITS[unit])
    raise ValueError(
        f"`memory`={memory!r} is not a memory size: pass bytes as an int or a string such as "
        "'2GB', '512MB' or '1.5GiB'."
    )


def format_bytes(n: float) -> str:
    for unit in ("B", "KB", "MB", "GB", "TB"):
        if abs(n) < 1000 or unit == "TB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.3g} {unit}"
        n /= 1000
    return f"{n:.3g} TB"  # pragma: no cover


def format_flops(n: float) -> str:
    for unit in ("", "K", "M", "G", "T", "P"):
        if abs(n) < 1000 or unit == "P":
            return f"{n:.3g} {unit}FLOP"
        n /= 1000
    return f"{n:.3g} PFLOP"  # pragma: no cover
