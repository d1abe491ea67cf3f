"""Cost model: FLOPs and bytes of each method from the shapes in the traced jaxpr.

Counts follow the cost analysis of Novak, Sohl-Dickstein & Schoenholz, "Fast Finite Width Neural
Tangent Kernel", ICML 2022, arXiv:2206.08720: a VJP or JVP costs about two forward passes; a
Jacobian contraction costs 2·A·P per pair of examples (A² for the full O×O kernel); a structured
dense layer costs 2·B·T²·(C + A·R) per pair. Estimates are for choosing, not for promising: the
plan prints them next to the measured machine rate they are converted with.
"""

from __future__ import annotations

import functools
import math
import time

import jax
import jax.numpy as jnp
import numpy as np

from .structured import CALLS, _sub_jaxpr


def forward_cost(closed) -> tuple[float, float]:
    """(FLOPs, activation elements) of one evaluation of a traced per-example function."""
    flops = 0.0
    acts = 0.0

    def walk(jaxpr):
        nonlocal flops, acts
        for eqn in jaxpr.eqns:
            name = eqn.primitive.name
            sub = _sub_jaxpr(eqn) if name in CALLS else None
            if sub is not None:
                walk(sub.jaxpr)
                continue
            out = sum(math.prod(v.aval.shape) for v in eqn.outvars if hasattr(v.aval, "shape"))
            acts += out
            if name == "dot_general":
                (lc, _), _ = eqn.params["dimension_numbers"]
                shape = eqn.invars[0].aval.shape
                flops += 2.0 * out * math.prod(shape[d] for d in lc)
            elif name == "conv_general_dilated":
                rhs = eqn.invars[1].aval.shape
                dn = eqn.params["dimension_numbers"]
                flops += 2.0 * out * math.prod(rhs) / rhs[dn.rhs_spec[0]]
            else:
                flops += out

    walk(closed.jaxpr)
    return flops, acts


def dense_pair_flops(a: int, p: int, outputs: str) -> float:
    """Contraction FLOPs per pair of examples for one dense leaf."""
    return 2.0 * p * (a * a if outputs == "full" else a)


# With several positions (T > 1) the factored contraction is a batched einsum over example pairs,
# which XLA on CPU runs far below matmul speed: measured ≈ 8× slower per FLOP than one large GEMM
# (conv layers of the benchmark CNN, docs/performance.md). Costs of such contractions are scaled
# by this factor so the planner compares time, not FLOPs.
BATCHED_CONTRACTION_PENALTY = 8.0


def factored_pair_flops(a: int, b: int, t: int, c: int, r: int, outputs: str) -> float:
    """Contraction FLOPs per pair of examples for one factored leaf: the input Gram, then the
    cheaper of (cotangent Gram, then combine) and (input Gram against one cotangent, then the
    other), as the einsum path optimiser will choose; scaled by `BATCHED_CONTRACTION_PENALTY`
    when there are several positions."""
    mode = a * a if outputs == "full" else a
    hh = 2.0 * b * t * t * c
    gram_first = 2.0 * b * t * t * r * mode + b * t * t * mode
    one_side_first = 2.0 * b * t * t * a * r + 2.0 * b * t * r * mode
    flops = hh + min(gram_first, one_side_first)
    return flops * (BATCHED_CONTRACTION_PENALTY if t > 1 else 1.0)


def factored_pair_elements(a: int, b: int, t: int, outputs: str) -> float:
    """Temporaries per pair of a factored contraction (the two Gram arrays)."""
    mode = a * a if outputs == "full" else (a if outputs == "diagonal" else 1)
    return b * t * t * (1 + mode)


@functools.lru_cache(maxsize=4)
def machine_rate(dtype_name: str = "float32") -> float:
    """Measured FLOP/s of a jitted 512×512 matmul on the default device (cached per process)."""
    n = 512
    x = jnp.ones((n, n), dtype=dtype_name)
    f = jax.jit(lambda a: jnp.dot(a, a, precision="highest"))
    f(x).block_until_ready()
    best = math.inf
    for _ in range(5):
        t0 = time.perf_counter()
        f(x).block_until_ready()
        best = min(best, time.perf_counter() - t0)
    return 2.0 * n**3 / max(best, 1e-9)


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
    if isinstance(memory, int | float) and not isinstance(memory, bool):
        if memory <= 0:
            raise ValueError(f"`memory`={memory!r} must be positive: a byte count or e.g. '2GB'.")
        return int(memory)
    if isinstance(memory, str):
        text = memory.strip().upper().replace(" ", "")
        num = text.rstrip("KMGTIB")
        unit = text[len(num):]
        try:
            value = float(num)
        except ValueError:
            value = None
        if value is not None and value > 0 and unit in _UNITS:
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
