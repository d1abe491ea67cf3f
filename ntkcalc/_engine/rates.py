"""Machine rates: what converts a plan's FLOPs, bytes and calls into seconds.

The planner's time estimate (`planner.choose`) is

    seconds = FLOPs / matmul + bytes moved / stream + formation FLOPs / formation(t)
              + jitted calls × call,

so the same request can pick a different method on a different machine. The rates are an
explicit, frozen input (`Rates`): measured by default (`measure_rates`) and kept per machine in a
small JSON file so that a new process does not measure again (`default_rates`), or given, so that
a plan can be reproduced and pinned (``ntkcalc.plan(..., rates=Rates(...))``).

The file is ``$XDG_CACHE_HOME/ntkcalc/rates.json`` (``~/.cache`` without XDG_CACHE_HOME); the
environment variable ``NTKCALC_RATES_FILE`` names another path, or turns the file off when set to
``""``/``"off"`` (then the rates are measured once per process). An entry is keyed by platform,
device kind, CPU model and count, JAX version and dtype; a damaged or older file is measured again
and rewritten.
"""

from __future__ import annotations

import dataclasses
import functools
import json
import math
import os
import platform
import tempfile
import time

import jax
import jax.numpy as jnp
import numpy as np
from jax import lax

#: Version of the rates file's layout; a file of another version is measured again.
FILE_VERSION = 2
#: Inner sizes at which the formation rate is measured (powers of two up to `FORMATION_CAP`).
FORMATION_CAP = 512
FORMATION_SIZES = tuple(1 << k for k in range(int(math.log2(FORMATION_CAP)) + 1))
ENV_FILE = "NTKCALC_RATES_FILE"


@dataclasses.dataclass(frozen=True)
class Rates:
    """Rates of one machine (one device kind, one dtype) that a plan's estimate is made at.

    Fields:
        matmul: FLOP/s of a jitted 512×512 matmul at precision "highest".
        stream: bytes/s (read + written) of a jitted elementwise op on 2²⁴ elements, larger than
            caches: the speed of memory-bound work (factors written, Gram temporaries streamed).
        formation: ((t, FLOP/s), ...) of forming dense derivatives from factors, a batched GEMM
            (32 × (1280 × t) @ (t × 64)) per inner size t (positions); short inner dimensions run
            far below ``matmul``. Sizes are powers of two up to 512 (see `formation_at`).
        call: seconds of the fixed cost of one jitted call (dispatch, arguments, and fetching a
            tiny result to the host): what each factor or tile step costs whatever its FLOPs.
        accumulation: entries/s at which a reverse pass accumulates the cotangent of a
            loop-constant weight over the steps of a scan (`structured.loop_accumulation`):
            memory-bound work the matmul rate does not price.
        platform, device_kind, dtype: what they were measured on ("cpu", "gpu", ...;
            ``jax.Device.device_kind``; "float32" or "float64").
        source: where they came from: "measured", "file <path>" or "given".

    Common practice (roofline model): time ≈ max/sum of compute at peak FLOP/s and traffic at
    memory bandwidth; Williams, Waterman & Patterson, "Roofline", CACM 2009. The per-call term is
    JAX's dispatch overhead, measured here rather than taken from a table.
    """

    matmul: float
    stream: float
    formation: tuple[tuple[int, float], ...]
    call: float
    accumulation: float
    platform: str = "cpu"
    device_kind: str = "cpu"
    dtype: str = "float32"
    source: str = "given"

    def __post_init__(self):
        for name in ("matmul", "stream", "accumulation"):
            value = getattr(self, name)
            if not (isinstance(value, int | float) and math.isfinite(value) and value > 0):
                raise ValueError(f"`Rates.{name}`={value!r} must be a positive, finite rate.")
        if not (isinstance(self.call, int | float) and math.isfinite(self.call)
                and self.call >= 0):
            raise ValueError(f"`Rates.call`={self.call!r} must be a finite number of seconds "
                             "≥ 0 (the fixed cost of one jitted call).")
        try:
            pairs = tuple((int(t), float(r)) for t, r in self.formation)
        except (TypeError, ValueError):
            pairs = ()
        if not pairs or any(t < 1 or not (math.isfinite(r) and r > 0) for t, r in pairs):
            raise ValueError(
                f"`Rates.formation`={self.formation!r} must be a non-empty tuple of (inner size "
                "≥ 1, FLOP/s > 0) pairs, e.g. ((1, 2e9), (512, 5e10)).")
        object.__setattr__(self, "formation", tuple(sorted(pairs)))

    def formation_at(self, inner: int) -> float:
        """FLOP/s of forming derivatives with inner dimension ``inner``: ``inner`` is rounded up
        to a power of two (at most 512) and the rate of the nearest measured size at or above it
        is used (the largest one beyond it)."""
        t = min(FORMATION_CAP, 1 << max(0, math.ceil(math.log2(max(1, inner)))))
        for size, rate in self.formation:
            if size >= t:
                return rate
        return self.formation[-1][1]

    def describe(self) -> str:
        """One line: the rates and where they came from."""
        return (f"{self.matmul / 1e9:.3g} GFLOP/s matmul, {self.stream / 1e9:.3g} GB/s "
                f"streaming, {self.call * 1e3:.3g} ms per call, {self.accumulation / 1e9:.3g} G "
                f"scan accumulations/s ({self.device_label}, {self.dtype}; {self.source})")

    @property
    def device_label(self) -> str:
        """The platform, and the device kind where it says more: ``"cpu"``, ``"gpu H200"``."""
        same = self.device_kind.lower() == self.platform.lower()
        return self.platform if same else f"{self.platform} {self.device_kind}"

    def as_dict(self) -> dict:
        return {f.name: getattr(self, f.name) for f in dataclasses.fields(self)
                if f.name != "source"}


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


def _call_seconds(dtype: str, repeats: int = 20) -> float:
    """Fastest of ``repeats`` jitted calls on 8 small arguments, their result fetched to the host:
    what one factor or tile step costs beyond its FLOPs (dispatch, argument handling, the
    device-to-host copy of a tiny tile)."""
    args = [jnp.ones(8, dtype=dtype) for _ in range(8)]
    f = jax.jit(lambda *a: sum(a))
    np.asarray(f(*args))
    best = math.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        np.asarray(f(*args))
        best = min(best, time.perf_counter() - t0)
    return best


def _accumulation_rate(dtype: str) -> float:
    """Entries/s of the gradient of a 16-step scan of ``tanh(x_t @ W)``, W 64×64, vmapped over
    256 examples, per accumulated entry and step: each step adds an outer product into W's
    cotangent accumulator."""
    b, c, s = 256, 64, 16
    w = jnp.full((c, c), 0.01, dtype)

    def f(w, xs):
        return lax.scan(lambda acc, x_t: (acc + jnp.tanh(x_t @ w).sum(), None),
                        jnp.zeros((), w.dtype), xs)[0]

    grads = jax.vmap(jax.grad(f), (None, 0))
    xs = jnp.ones((b, s, c), dtype)
    return b * c * c * s / _best_seconds(lambda x: grads(w, x), xs, 3)


def _device(device):
    return jax.devices()[0] if device is None else device


def measure_rates(*, dtype: str = "float32", device=None) -> Rates:
    """Measure `Rates` on ``device`` (default: JAX's default device) in ``dtype`` (about 1–2 s).

    matmul: 2·512³ FLOPs of ``jnp.dot`` at precision "highest"; stream: 2·2²⁴·itemsize bytes of
    ``u * 2``; formation: the batched GEMM of `Rates.formation` at every power-of-two inner size
    up to 512; call: a jitted sum of 8 arguments of 8 elements, fetched to the host;
    accumulation: the gradient of a 16-step scan (`Rates.accumulation`). Each is the fastest of
    a few timed calls after a warm-up (compilation excluded).
    """
    dev = _device(device)
    if dtype == "float64" and not jax.config.jax_enable_x64:
        raise ValueError("`dtype`='float64' rates need float64 arrays: measure under "
                         "jax.enable_x64(True), or pass dtype='float32'.")
    with jax.default_device(dev):
        n = 512
        x = jnp.ones((n, n), dtype=dtype)
        matmul = 2.0 * n**3 / _best_seconds(lambda a: jnp.dot(a, a, precision="highest"), x, 5)
        m = 1 << 24
        y = jnp.arange(m, dtype=dtype)
        stream = 2.0 * m * y.dtype.itemsize / _best_seconds(lambda u: u * 2, y, 3)
        formation = []
        for t in FORMATION_SIZES:
            g = jnp.ones((32, 1280, t), dtype=dtype)
            h = jnp.ones((32, t, 64), dtype=dtype)
            seconds = _best_seconds(lambda u, h=h: jnp.matmul(u, h, precision="highest"), g, 3)
            formation.append((t, 2.0 * 32 * 1280 * t * 64 / seconds))
        call = _call_seconds(dtype)
        accumulation = _accumulation_rate(dtype)
    return Rates(matmul, stream, tuple(formation), call, accumulation, dev.platform,
                 dev.device_kind, dtype, "measured")


def rates_file() -> str | None:
    """The path of the per-machine rates file, or None when it is turned off."""
    env = os.environ.get(ENV_FILE)
    if env is not None:
        return None if env.strip().lower() in ("", "off", "none", "0") else env
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return os.path.join(base, "ntkcalc", "rates.json")


def machine_key(dtype: str, device=None) -> str:
    """The file key of this machine's rates: platform, device kind, CPU model and count, JAX
    version and dtype (rates measured on another machine or JAX are not reused)."""
    dev = _device(device)
    return "|".join([dev.platform, dev.device_kind, _cpu_model(), str(os.cpu_count()),
                     f"jax {jax.__version__}", dtype])


@functools.cache
def _cpu_model() -> str:
    try:
        with open("/proc/cpuinfo") as f:
            for line in f:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def _read(path: str) -> dict:
    """The file's entries, or {} when it is missing, damaged or of another version."""
    try:
        with open(path) as f:
            data = json.load(f)
    except (OSError, ValueError):
        return {}
    if not isinstance(data, dict) or data.get("version") != FILE_VERSION or not isinstance(
            data.get("rates"), dict):
        return {}
    return data["rates"]


def _from_entry(entry, source: str) -> Rates | None:
    try:
        return Rates(**{**entry, "source": source})
    except (TypeError, ValueError):
        return None


def _write(path: str, entries: dict) -> None:
    """Write the file atomically (a temporary file renamed over it); a failure is ignored:
    the rates are then measured again by the next process."""
    try:
        os.makedirs(os.path.dirname(os.path.abspath(path)), exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=os.path.dirname(os.path.abspath(path)), suffix=".tmp")
        with os.fdopen(fd, "w") as f:
            json.dump({"version": FILE_VERSION, "rates": entries}, f, indent=1)
        os.replace(tmp, path)
    except OSError:
        pass


_KEPT: dict = {}


def default_rates(dtype: str = "float32", *, device=None, file: bool = True) -> Rates:
    """This machine's rates: kept in this process, else read from the rates file, else measured
    (`measure_rates`) and written there. ``file=False`` (or ``NTKCALC_RATES_FILE=off``) neither
    reads nor writes the file."""
    key = machine_key(dtype, device)
    path = rates_file() if file else None
    if (key, path) in _KEPT:
        return _KEPT[(key, path)]
    entries = _read(path) if path else {}
    found = _from_entry(entries.get(key), f"file {path}") if key in entries else None
    if found is None:
        found = measure_rates(dtype=dtype, device=device)
        if path:
            _write(path, {**_read(path), key: found.as_dict()})
            found = dataclasses.replace(found, source=f"measured, kept in {path}")
    _KEPT[(key, path)] = found
    return found


def check_rates(rates) -> Rates:
    """``rates`` if it is a `Rates`, else ValueError saying what to pass."""
    if not isinstance(rates, Rates):
        raise ValueError(
            f"`rates`={rates!r} is not an ntkcalc Rates: pass Rates(matmul=..., stream=..., "
            "formation=((t, FLOP/s), ...), call=..., accumulation=...), measure_rates(), or None "
            "for this machine's rates.")
    return rates
