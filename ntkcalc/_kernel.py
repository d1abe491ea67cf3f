"""The public kernel functions: validate, plan, run the tiles, return numpy arrays."""

from __future__ import annotations

import numpy as np

from ._engine.options import OUTPUTS_DOC, Method, Outputs
from ._engine.planner import plan_request, prepare
from ._engine.select import ParamFilter
from ._tiles.run import assemble


def ntk(
    net,
    x1,
    x2=None,
    *,
    method: Method = "auto",
    outputs: Outputs = "trace",
    params: ParamFilter = None,
    memory=None,
) -> np.ndarray:
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
        memory: peak-memory budget (bytes or e.g. ``"2GB"``; default half the available memory).

    Returns:
        numpy array of the shape above: float32, or float64 when JAX x64 is enabled. All matmuls
        run at precision "highest".
    """
    req = prepare(net, x1, x2, outputs=outputs, method=method, params=params)
    plan = plan_request(req, outputs=outputs, memory=memory, method=method)
    return assemble(plan, req)[0]


def ntk_by_layer(
    net,
    x1,
    x2=None,
    *,
    method: Method = "auto",
    outputs: Outputs = "trace",
    params: ParamFilter = None,
    memory=None,
) -> dict[str, np.ndarray]:
    """The kernel split by top-level parameter group: ``{group name: kernel}``.

    Groups are the first key of each parameter's path (``"Dense_0"``, ``"encoder"``, ...). Their
    sum is ``ntk(net, x1, x2, ...)`` with the same options; computed in one pass.
    """
    req = prepare(net, x1, x2, outputs=outputs, method=method, params=params, by_layer=True)
    plan = plan_request(req, outputs=outputs, memory=memory, method=method)
    kernels = assemble(plan, req)
    return {name: kernels[g] for g, name in enumerate(plan.group_names)}


_indented = "\n".join(" " * 12 + line for line in OUTPUTS_DOC.splitlines())
ntk.__doc__ = ntk.__doc__.format(outputs_doc=_indented)
