"""The public kernel functions: validate, plan, run the tiles, return arrays."""

from __future__ import annotations

import contextlib
from typing import Literal

import jax
import numpy as np

from ._engine.options import OUTPUTS_DOC, Method, Outputs, check_choice
from ._engine.planner import prepare
from ._engine.select import ParamFilter
from ._kind import KernelArray
from ._tiles.drive import compute

_SCALE_DOC = """\
        memory: budget for the computation's working memory (bytes or e.g. ``"2GB"``; default
            half the memory available now: host RAM on CPU, the device's own free memory on an
            accelerator). Tiles are planned by estimate to fit it together with the in-memory
            result (on CPU; on an accelerator the result is held on the host); when the result
            alone does not fit, the error says to pass ``store``; `ntkcalc.plan` shows the plan.
            Not a hard limit on the process: the JAX runtime (≈ 0.4 GB on CPU) comes on top
            and the estimate can be low at small budgets (docs/scale.md).
        store: None (kernel in memory), or a directory path / URL / zarr store where the kernel
            is written tile by tile as a zarr v3 array. Then a read-only `StoredKernel` view is
            returned (``np.asarray(view)`` loads it) and a call repeated with the same arguments
            computes only missing or damaged tiles; a store of a different kernel is refused.
            Required when several JAX processes run (``jax.distributed.initialize``): each
            computes its share of tiles into the same store.
        progress: show a progress bar over tiles (tqdm, terminal or notebook) once a run lasts
            over a second; log lines go to the ``logging`` logger ``"ntkcalc"`` either way.
        devices: JAX devices of this process to spread tiles over (default all local devices).
            Forced CPU devices share the same cores and measured no faster than one.
        spot_check: how many kernel entries to recompute independently once the kernel is done
            (0: off). Each is rebuilt from its definition with ``jax.jacrev`` of the model on
            its two examples alone (no vmap, blocking or structured rules) and compared; a
            mismatch raises RuntimeError. Catches a miscompiled or wrong kernel
            (docs/cautions.md) for about one Jacobian per distinct example.
        dtype: the precision of the computation. None follows JAX's x64 switch (float32
            unless ``jax_enable_x64`` is on). ``"float64"`` casts parameters, state and floating
            inputs to float64 and traces, compiles and runs this call under
            ``jax.enable_x64(True)`` only; the global switch is left as it was. Use it for
            small eigenvalues, ranks and ill-conditioned solves (float32 keeps about 7 digits;
            docs/cautions.md). ``"float32"`` computes in float32 even when x64 is on. A model
            that casts to a fixed dtype inside (e.g. ``nn.Dense(..., dtype=jnp.float32)``)
            still rounds there.
        plan: a `Plan` from `ntkcalc.plan` for this request (same net call, input shapes,
            dtype, outputs, params and groups; parameter values may differ), run exactly: its
            method, tiles, per-leaf representations and devices. ``memory``, ``method``,
            ``store`` and ``devices`` may be left out; given, they must agree with it."""

Precision = Literal["float32", "float64"]
PRECISIONS = ("float32", "float64")


def precision_scope(dtype: Precision | None):
    """The context a computation at ``dtype`` runs in: ``jax.enable_x64`` for this call only."""
    if dtype is None:
        return contextlib.nullcontext()
    check_choice("dtype", dtype, PRECISIONS)
    return jax.enable_x64(dtype == "float64")


def ntk(
    net,
    x1,
    x2=None,
    *,
    method: Method = "auto",
    outputs: Outputs = "trace",
    params: ParamFilter = None,
    memory=None,
    store=None,
    progress: bool = True,
    devices=None,
    spot_check: int = 0,
    dtype: Precision | None = None,
    plan=None,
):
    r"""The empirical neural tangent kernel Θ(x1, x2) = J(x1) J(x2)ᵀ of ``net`` at its parameters.

    J(x) = ∂f(x)/∂θ is the Jacobian of the outputs with respect to the (selected) parameters, so
    Θ[i, j, a, b] = Σ_p ∂f_a(x1_i)/∂θ_p · ∂f_b(x2_j)/∂θ_p.

    Args:
        net: an `ntkcalc.Net`.
        x1: inputs (N1, ...), examples on axis 0. Integer inputs (token ids) are data, never
            differentiated.
        x2: inputs (N2, ...) with x1's feature shape, or None for Θ(x1, x1) (symmetric: only
            tiles on and above the diagonal are computed).
        method: ``"auto"`` follows `ntkcalc.plan` (the cheapest estimate that fits ``memory``);
            ``"structured"`` (structured derivatives per layer), ``"jacobian"`` (Jacobian
            contraction), ``"jvp"`` (NTK-vector products). Novak, Sohl-Dickstein & Schoenholz,
            "Fast Finite Width Neural Tangent Kernel", ICML 2022, arXiv:2206.08720.
        outputs: what to return, each computed without building more than it returns:
{outputs_doc}
        params: restrict Θ to some parameters: a regular expression searched in dotted names
            (``"Dense_0"``, ``"kernel$"``) or a predicate on the name.
{scale_doc}

    Returns:
        `KernelArray` (a numpy array that remembers its kind: ``k.kind == outputs`` and
        ``k.num_outputs == O``, so analyses can refuse a kernel of the wrong kind) of the shape
        above, or a `StoredKernel` view of it with ``store``: float32, or float64 when JAX x64
        is enabled or ``dtype="float64"``. All matmuls run at precision "highest".
    """
    with precision_scope(dtype):
        req = prepare(net, x1, x2, outputs=outputs, method=method, params=params)
        kernels, _, _ = compute(req, outputs=outputs, memory=memory, method=method,
                                store=store, progress=progress, devices=devices,
                                spot_check=spot_check, plan=plan)
    return _tagged(kernels[0], outputs, req.num_outputs)


def ntk_by_layer(
    net,
    x1,
    x2=None,
    *,
    method: Method = "auto",
    outputs: Outputs = "trace",
    params: ParamFilter = None,
    memory=None,
    store=None,
    progress: bool = True,
    devices=None,
    spot_check: int = 0,
    depth: int = 1,
    dtype: Precision | None = None,
    plan=None,
) -> dict[str, np.ndarray]:
    """The kernel split by top-level parameter group: ``{group name: kernel}``.

    Groups are the first ``depth`` keys of each parameter's dotted path: ``depth=1`` gives
    ``"Dense_0"``, ``"encoder"``; ``depth=2`` splits an ``eqx.nn.MLP``'s ``"layers"`` into
    ``"layers.0"``, ``"layers.1"``, ... (a name with fewer keys is its own group). Their sum is
    ``ntk(net, x1, x2, ...)`` with the same options; computed in one pass. With ``store``
    the groups share one zarr array (groups, N1, N2, ...) and each value is a `StoredKernel` view.
    ``dtype`` as in `ntk` (``"float64"`` without the global x64 switch); ``plan`` a `Plan`
    made with ``ntkcalc.plan(..., by_layer=depth)`` (see `ntk`).
    """
    with precision_scope(dtype):
        req = prepare(net, x1, x2, outputs=outputs, method=method, params=params,
                      by_layer=depth)
        kernels, _, _ = compute(req, outputs=outputs, memory=memory, method=method,
                                store=store, progress=progress, devices=devices,
                                spot_check=spot_check, plan=plan)
    return {name: _tagged(k, outputs, req.num_outputs)
            for name, k in zip(req.selection.group_names, kernels, strict=True)}


def _tagged(kernel, outputs: str, num_outputs: int):
    """The kernel with its kind: a `KernelArray` in memory, a stored view told its kind."""
    if isinstance(kernel, np.ndarray):
        return KernelArray(kernel, kind=outputs, num_outputs=num_outputs)
    kernel.kind, kernel.num_outputs = outputs, num_outputs
    return kernel


_indented = "\n".join(" " * 12 + line for line in OUTPUTS_DOC.splitlines())
if ntk.__doc__:  # None under python -OO
    ntk.__doc__ = ntk.__doc__.format(outputs_doc=_indented, scale_doc=_SCALE_DOC)
