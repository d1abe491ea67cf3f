r"""NTK features: φ (N, k) with ``E[φ φᵀ] = Θ``, computed block by block in one pass over the data.

Exact kernels cost N² entries; the questions asked at dataset scale (top of the spectrum, label
alignment, kernel-regression error, kernel movement between checkpoints) need far fewer numbers.
`ntk_features` returns k random features per example (per example and output in ``"full"``), each
an independent seeded random projection of the example's Jacobian (see `projection`), so
``φ φᵀ`` is an unbiased estimate of the kernel whose error shrinks as 1/√k, and every analysis on
φ costs O(N k²) (see `analysis`). Related published methods: random projections of per-example
gradients (Park et al., "TRAK", ICML 2023, arXiv:2303.14186), Kronecker-structured gradient
projection (Choe et al. 2024, arXiv:2405.13954), NTK sketching (Zandieh et al., NeurIPS 2021,
arXiv:2106.07880).

Inputs may be any array with shape, dtype and slicing (numpy, a ``np.load(..., mmap_mode="r")``
memmap, a zarr array): only one block of examples is read at a time, the next while the current
one is computed.
"""

from __future__ import annotations

import concurrent.futures
import contextlib
import dataclasses
import math
import time
from typing import Literal, get_args

import jax
import numpy as np
from tqdm.auto import tqdm

from .._analysis._result import Result
from .._engine import cost as C
from .._engine import structured as st
from .._engine.options import check_choice
from .._engine.planner import prepare, traced
from .._engine.program import Program
from .._engine.rules.bias import fold_candidates, settle_folds
from .._engine.select import ParamFilter
from .._tiles.blocking import block_bounds, padded
from .._tiles.drive import check_store
from .._tiles.fingerprint import differences
from .._tiles.messages import NOT_A_STORE, STORE_INCOMPLETE, STORE_MISMATCH
from .._tiles.placement import barrier, process, share
from .._tiles.progress import logger
from .._tiles.store import check_writable, describe, locked
from .block import Sketch, compiled
from .store import FeatureStore, fingerprint, read_fingerprint

FeatureOutputs = Literal["trace", "logit-sum", "full"]
FeatureMethod = Literal["structured", "jvp"]
FEATURE_OUTPUTS: tuple[str, ...] = get_args(FeatureOutputs)
FEATURE_METHODS: tuple[str, ...] = get_args(FeatureMethod)

#: Largest block of examples per compiled step (larger blocks gain little on CPU).
MAX_BLOCK = 1024


@dataclasses.dataclass(frozen=True, repr=False)
class Features(Result):
    """Sketched NTK features of N examples.

    Fields:
        features: (N, k) for ``"trace"`` and ``"logit-sum"``, (N·O, k) for ``"full"`` (row
            ``i·O + a`` is example i, output a): a numpy array, or with ``store`` the zarr array
            on disk (slice it to read rows). ``features @ features.T`` estimates the kernel.
        k, seed: features per row and the seed of the projections (same seed and model
            structure: same projections, so features of two checkpoints are comparable).
        outputs, method: as requested; num_outputs: O; dtype: the features' dtype name.
        block: examples per compiled step; store: where the features are (None: in memory).
        computed, reused: blocks computed in this run and found complete in the store.
        seconds: wall time of this run's blocks.
    """

    features: object
    k: int
    seed: int
    outputs: str
    method: str
    num_outputs: int
    dtype: str
    block: int
    store: str | None = None
    computed: int = 0
    reused: int = 0
    seconds: float = 0.0

    @property
    def num_examples(self) -> int:
        rows = self.num_outputs if self.outputs == "full" else 1
        return self.features.shape[0] // rows


def _check_stream(x, name: str = "x"):
    """An array-like with shape, dtype and slicing, examples on axis 0; not read here."""
    if isinstance(x, jax.Array):
        x = np.asarray(x)
    if not all(hasattr(x, a) for a in ("shape", "dtype", "__getitem__")):
        try:
            x = np.asarray(x)
        except Exception as err:  # noqa: BLE001
            raise TypeError(f"`{name}` must be an array (numpy, memmap or zarr), got "
                            f"{type(x).__name__}.") from err
    if len(x.shape) == 0 or x.shape[0] == 0:
        raise ValueError(f"`{name}` has shape {tuple(x.shape)}: pass at least one example on "
                         "axis 0.")
    dt = np.dtype(x.dtype)
    if not (np.issubdtype(dt, np.integer) or np.issubdtype(dt, np.floating)
            or dt == np.bool_):
        raise TypeError(f"`{name}` has dtype {dt}: pass real numeric inputs.")
    return x


def _check_positive(name: str, value) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < 1:
        raise ValueError(f"`{name}`={value!r} must be a positive integer.")
    return int(value)


def _read(x, r0: int, r1: int, block: int, dtype) -> np.ndarray:
    xb = np.asarray(padded(x, r0, r1, block))
    if np.issubdtype(xb.dtype, np.floating):
        bad = ~np.isfinite(xb)
        if bad.any():
            where = tuple(int(i) for i in np.argwhere(bad)[0])
            raise ValueError(f"`x` holds a non-finite value at example {r0 + where[0]} (index "
                             f"{where[1:]} within it): remove or impute it first.")
        xb = xb.astype(dtype)
    return xb


def _sketch(req, *, k: int, outputs: str, method: str) -> tuple[Sketch, float, float]:
    """(the feature computation, activation elements and forward FLOPs per example)."""
    sel = req.selection
    prog_outputs = "logit-sum" if outputs == "logit-sum" else "full"
    base = Program(req.net.call, jax.tree_util.tree_structure(req.params), sel, prog_outputs,
                   req.num_outputs, "jacobian", ("dense",) * len(req.diff))
    fwd, acts, an = traced(req, base)
    kinds = ["unused" if an.unused[leaf] else "factored"
             if an.uses[leaf] and st.factorable(an.uses[leaf]) else "dense"
             for leaf in range(len(req.diff))]
    folds, kinds = settle_folds(fold_candidates(an.bias_of, sel.groups), kinds)
    prog = dataclasses.replace(base, method="structured", kinds=kinds, analysis=an, folds=folds)
    sketch = Sketch(prog, k, outputs != "full", method, tuple(sel.indices),
                    tuple(tuple(np.shape(d)) for d in req.diff))
    return sketch, acts, fwd


def example_bytes(sketch: Sketch, acts: float, isz: int) -> float:
    """Estimated working bytes per example of a block (activations, factors, projections)."""
    a, k = sketch.directions, sketch.k
    rows = sketch.rows_per_example
    total = (2 + 2 * a) * acts * isz + 3 * rows * k * isz
    if sketch.method == "jvp":
        return total + 3 * sketch.jvp_chunk * acts * isz
    an = sketch.program.analysis
    for leaf, spec in enumerate(sketch.projection_shapes()):
        if spec is None:
            continue
        if spec[0] == "factored":
            bsz, t, _, r = st.factored_sizes(an.uses[leaf][0])
            total += (bsz * t * (spec[2] + a * r) + bsz * t * k * (1 + (1 if sketch.mix else a))
                      ) * isz
        else:
            p = math.prod(spec[1])
            total += (a * p + a * p / max(1, spec[1][-1] if spec[1] else 1) * k) * isz
    return total


def memory_parts(sketch: Sketch, acts: float, req, *, n: int,
                 in_memory: bool) -> tuple[float, float, float]:
    """(fixed bytes: projections and JVP tangents, bytes of the features if held in memory,
    working bytes per example of a block)."""
    isz = C.itemsize(req.dtype)
    fixed = sketch.projection_elements() * isz
    if sketch.method == "jvp":
        fixed += 2 * sketch.jvp_chunk * sum(int(np.size(d)) for d in req.diff) * isz
    result = n * sketch.rows_per_example * sketch.k * isz if in_memory else 0
    return fixed, result, example_bytes(sketch, acts, isz)


def fit_block(fixed: float, result: float, per: float, *, n: int, budget: int) -> int:
    """Examples per compiled step for ``budget`` bytes (0: not even one fits), at most
    `MAX_BLOCK`, spread evenly over the blocks."""
    free = budget - fixed - result
    block = min(int(free // per), n, MAX_BLOCK) if free >= per else 0
    return math.ceil(n / math.ceil(n / block)) if block else 0


def _block(sketch, acts, req, *, n: int, budget: int, in_memory: bool, memory) -> int:
    fixed, result, per = memory_parts(sketch, acts, req, n=n, in_memory=in_memory)
    block = fit_block(fixed, result, per, n=n, budget=budget)
    if block < 1:
        raise MemoryError(
            f"`memory`={memory!r} ({C.format_bytes(budget)}) is too small: the projections take "
            f"{C.format_bytes(fixed)}"
            + (f", the in-memory features {C.format_bytes(result)}" if in_memory else "")
            + f" and one example about {C.format_bytes(per)}. Raise `memory`, lower `k`"
            + (", or pass `store=` to write the features to disk." if in_memory else ".")
        )
    return block


def setup(net, x, *, k, outputs: str, method: str, seed=0, params=None):
    """Validate a features request up front: (x, k, request, sketch, activation elements and
    forward FLOPs per example). Only two examples of ``x`` are read."""
    x = _check_stream(x)
    k = _check_positive("k", k)
    check_choice("outputs", outputs, FEATURE_OUTPUTS)
    check_choice("method", method, FEATURE_METHODS)
    if not isinstance(seed, int | np.integer) or isinstance(seed, bool) or seed < 0:
        raise ValueError(f"`seed`={seed!r} must be a non-negative integer.")
    req = prepare(net, np.asarray(x[:2]), outputs=outputs, params=params)
    sketch, acts, fwd = _sketch(req, k=k, outputs=outputs, method=method)
    return x, k, req, sketch, acts, fwd


def ntk_features(
    net,
    x,
    *,
    k: int,
    outputs: FeatureOutputs = "trace",
    seed: int = 0,
    method: FeatureMethod = "structured",
    params: ParamFilter = None,
    memory=None,
    store=None,
    progress: bool = True,
) -> Features:
    r"""Random features φ of the empirical NTK: ``E[φ φᵀ] = Θ``, in one pass over ``x``.

    Feature m of example i is ``Φ_i[m] / √k`` with ``Φ_i[m] = ⟨J_i, w_m⟩`` a seeded random
    projection of the example's Jacobian (``E[w_m w_mᵀ] = I``, independent over m), so
    ``E[φ_i · φ_j] = Θ_ij`` and ``Var(φ_i · φ_j) = Var(Φ_i[m] Φ_j[m]) / k`` (formula in
    docs/sketch.md; for a plain Gaussian projection ``(Θ_ii Θ_jj + Θ_ij²) / k``). The variance of
    every derived number is estimated by the analyses (`features_spectrum`, `features_ridge`,
    `features_alignment`, `features_distance`) from groups of features.

    Args:
        net: an `ntkcalc.Net`.
        x: inputs (N, ...): a numpy array, a memmap (``np.load(path, mmap_mode="r")``) or a zarr
            array; read one block at a time.
        k: features per row. Relative error of one kernel entry ≈ √(c/k) with c between 2 (plain
            Gaussian projection) and 8 (product projection, rank-one derivative); k = 2048 is
            the measured recommendation (docs/sketch.md: guidance, limits, measurements;
            `ntkcalc.plan_features` prices a k).
        outputs: ``"trace"`` (Σ_a Θ_aa: φ (N, k)), ``"logit-sum"`` (Θ of Σ_a f_a: φ (N, k)) or
            ``"full"`` (φ (N·O, k), row i·O + a: ``φ_(i,a) · φ_(j,b)`` estimates Θ_ab(x_i, x_j);
            its diagonal-in-outputs part gives the ``"diagonal"`` kernel).
        seed: seed of the projections; the same seed, model structure and parameter filter give
            the same projections, so features of two checkpoints are comparable (their
            difference is the kernel's, not the sketch's).
        method: ``"structured"`` (default: each dense, conv or embedding leaf projected through
            its factors (input h, cotangent g) as ``(sᵀh)(gᵀu)``, other leaves from their
            per-example derivative) or ``"jvp"`` (k forward-mode products along Gaussian
            tangents: any model, k times a forward pass per example).
        params: restrict Θ to some parameters (as in `ntkcalc.ntk`).
        memory: budget (bytes or e.g. ``"2GB"``; default half the memory available now) for the
            projections, one block's working memory and, without ``store``, the features.
        store: None (features in memory) or a directory path / URL / zarr store: features are
            written block by block (zarr v3, a checksum per block); a repeated call computes
            only missing or damaged blocks, and several JAX processes fill one store together.
        progress: show a progress bar over examples.

    Returns:
        `Features`. float32, or float64 when JAX x64 is enabled; matmuls at precision "highest".
    """
    if not isinstance(progress, bool):
        raise ValueError(f"`progress`={progress!r} must be True or False.")
    x, k, req, sketch, acts, _ = setup(net, x, k=k, outputs=outputs, method=method,
                                       seed=seed, params=params)
    store = check_store(store)
    index, count = process()
    if store is None and count > 1:
        raise ValueError(f"`store`=None with {count} JAX processes: pass store='features.zarr' "
                         "on a filesystem every process can reach.")
    n = int(x.shape[0])
    budget = C.parse_memory(memory)
    block = _block(sketch, acts, req, n=n, budget=budget, in_memory=store is None,
                   memory=memory)
    if store is not None:
        check_writable(store, tag=f"-p{index}")
    gen, run = compiled(sketch)
    key = jax.random.key(int(seed))
    with jax.default_matmul_precision("highest"):
        proj = gen(key, req.dtype) if method == "structured" else None
    rows = sketch.rows_per_example
    summary = dict(k=k, seed=int(seed), outputs=outputs, method=method,
                   num_outputs=req.num_outputs, dtype=np.dtype(req.dtype).name)

    def blocks(todo, emit, block):
        t0 = time.perf_counter()
        total = sum(r1 - r0 for _, r0, r1 in todo)
        where = f" (process {index + 1}/{count})" if count > 1 else ""
        with tqdm(total=total, desc=f"ntkcalc features{where}", unit="example",
                  disable=not progress, dynamic_ncols=True, delay=1.0) as bar, \
                concurrent.futures.ThreadPoolExecutor(1) as pool:
            nxt = pool.submit(_read, x, *todo[0][1:], block, req.dtype) if todo else None
            for pos, (i, r0, r1) in enumerate(todo):
                xb = nxt.result()
                if pos + 1 < len(todo):
                    nxt = pool.submit(_read, x, *todo[pos + 1][1:], block, req.dtype)
                with jax.default_matmul_precision("highest"):
                    phi = run(req.diff, req.other, req.state, xb, proj, key)
                emit(i, r0, np.asarray(phi)[: (r1 - r0) * rows])
                bar.update(r1 - r0)
        return time.perf_counter() - t0

    all_blocks = [(i, r0, r1) for i, (r0, r1) in enumerate(block_bounds(n, block))]
    if store is None:
        out = np.empty((n * rows, k), req.dtype)

        def keep(i, r0, values):
            out[r0 * rows:r0 * rows + values.shape[0]] = values

        seconds = blocks(all_blocks, keep, block)
        return Features(out, block=block, computed=len(all_blocks), seconds=seconds, **summary)

    # One process: the store is locked for the whole run (an independent process on the same
    # store waits, then reuses the blocks); several JAX processes: only creation is locked.
    with locked(store) if count == 1 else contextlib.nullcontext():
        return _into_store(store, req=req, x=x, sketch=sketch, seed=int(seed),
                           outputs=outputs, block=block, memory=memory, blocks=blocks,
                           summary=summary, process=(index, count))


def _into_store(store, *, req, x, sketch, seed, outputs, block, memory, blocks, summary,
                process) -> Features:
    """Create or resume the features store, compute this process's missing blocks into it."""
    index, count = process
    n, rows, k = int(x.shape[0]), sketch.rows_per_example, sketch.k
    location = describe(store)
    fp = fingerprint(req=req, x=x, sketch=sketch, seed=seed, outputs=outputs, block=block)
    if index == 0:
        with locked(store) if count > 1 else contextlib.nullcontext():
            stored = read_fingerprint(store)
            if stored is not None:
                block, fp = _adopt(stored, fp, location=location, memory=memory)
            FeatureStore.create(store, fp, n=n, rows=rows, k=k, block=block, dtype=req.dtype)
    barrier("ntkcalc-features-ready")
    stored = read_fingerprint(store)
    if stored is None:
        raise ValueError(NOT_A_STORE.format(store=location))
    block, fp = _adopt(stored, fp, location=location, memory=memory)
    fs = FeatureStore.open(store, rows)
    all_blocks = [(i, r0, r1) for i, (r0, r1) in enumerate(block_bounds(n, block))]
    mine = share(all_blocks, index, count)
    todo, repaired = fs.status(mine)
    logger.info("ntkcalc: features store %s: %d of %d blocks done, %d to compute (%d failed "
                "verification), blocks of %d examples", location, len(mine) - len(todo),
                len(mine), len(todo), repaired, block)
    seconds = blocks(todo, fs.write, block)
    barrier("ntkcalc-features-done")
    missing = len(all_blocks) - fs.count_done()
    if missing:
        raise RuntimeError(STORE_INCOMPLETE.format(store=location, missing=missing,
                                                   total=len(all_blocks)))
    return Features(fs.features, block=block, store=location, computed=len(todo),
                    reused=len(mine) - len(todo), seconds=seconds, **summary)


def _adopt(stored: dict, now: dict, *, location: str, memory) -> tuple[int, dict]:
    """(block, fingerprint) to resume ``stored``, or an error saying why it cannot."""
    diffs = differences(stored, now)
    hard = [d for d in diffs if d != "block"]
    if hard:
        raise ValueError(STORE_MISMATCH.format(
            store=location, fields=", ".join(hard),
            stored={f: stored.get(f) for f in hard}, now={f: now.get(f) for f in hard}))
    if "block" in diffs and stored["block"] > now["block"]:
        raise MemoryError(
            f"`store`={location!r} was written in blocks of {stored['block']} examples, but "
            f"`memory`={memory!r} fits only {now['block']}: resume with the `memory` of the "
            "first run (or more), or choose a new `store` path."
        )
    return int(stored["block"]), dict(now, block=int(stored["block"]))
