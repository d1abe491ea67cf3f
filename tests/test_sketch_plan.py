"""The features plan against outside counts: XLA's own FLOP count of the compiled block step
(``jax.stages.Compiled.cost_analysis``), the block `ntk_features` really uses, and the public
exact-kernel planner `ntkcalc.plan` (tested against what the tile layer ran in
tests/test_tiles_plan.py)."""

from __future__ import annotations

import functools

import jax
import numpy as np
import pytest

import ntkcalc
from ntkcalc._sketch.block import compiled
from ntkcalc._sketch.features import memory_parts, setup
from tests.helpers import MLP, ZOO, f64


@functools.cache
def mlp_net():
    module = MLP(width=32, out=5)
    x = np.random.default_rng(0).normal(size=(48, 12))
    return ntkcalc.Net.from_linen(module, f64(module.init(jax.random.key(0), x[:1]))), x


def xla_flops(net, x, *, k, outputs, method="structured") -> float:
    """FLOPs XLA counts for the compiled features step of the whole batch x."""
    _, k, req, sketch, _, _ = setup(net, x, k=k, outputs=outputs, method=method)
    gen, run = compiled(sketch)
    key = jax.random.key(0)
    proj = gen(key, req.dtype) if method == "structured" else None
    xb = x.astype(req.dtype) if np.issubdtype(x.dtype, np.floating) else x
    cost = run.lower(req.diff, req.other, req.state, xb, proj, key).compile().cost_analysis()
    return float((cost[0] if isinstance(cost, list) else cost)["flops"])


@pytest.mark.parametrize("outputs", ["trace", "full", "logit-sum"])
def test_flops_match_xla_count_mlp(outputs):
    """The plan's FLOPs (per-leaf formulas of ntkcalc/_sketch/plan.py) are within 20% of XLA's
    count of the step it prices; measured 6-10% above it."""
    net, x = mlp_net()
    plan = ntkcalc.plan_features(net, x, k=256, outputs=outputs)
    assert plan.flops == pytest.approx(xla_flops(net, x, k=256, outputs=outputs), rel=0.2)


@pytest.mark.parametrize("name", ["cnn", "tokens", "shared-weight"])
def test_flops_match_xla_count_other_leaves(name):
    """Conv, embedding (a gather: no FLOPs on its input side) and dense/fallback leaves: within
    a factor 2 of XLA's count (XLA also counts the non-matmul work of small models)."""
    case = next(c for c in ZOO if c.name == name)
    net, x = case.make(), case.x(np.random.default_rng(0), 8)
    plan = ntkcalc.plan_features(net, x, k=128)
    ratio = plan.flops / xla_flops(net, x, k=128, outputs="trace")
    assert 0.5 <= ratio <= 2.0, ratio


def test_block_is_the_one_features_use():
    """The planned block and features size are what `ntk_features` then uses and returns."""
    net, x = mlp_net()
    _, _, req, sketch, acts, _ = setup(net, x, k=64, outputs="trace", method="structured")
    fixed, result, per = memory_parts(sketch, acts, req, n=x.shape[0], in_memory=True)
    budget = int(fixed + result + 10.5 * per)  # ten examples per block
    plan = ntkcalc.plan_features(net, x, k=64, memory=budget)
    f = ntkcalc.ntk_features(net, x, k=64, memory=budget, progress=False)
    assert plan.fits and plan.block == f.block and 8 <= f.block <= 10
    assert plan.features_bytes == f.features.nbytes
    assert plan.peak_bytes <= budget


def test_exact_plan_is_the_planners():
    """Beside the features: `ntkcalc.plan` for the same inputs, outputs and budget."""
    net, x = mlp_net()
    plan = ntkcalc.plan_features(net, x, k=64, memory="1GB")
    want = ntkcalc.plan(net, x, outputs="trace", memory="1GB")
    assert (plan.exact.method, plan.exact.block, plan.exact.shape) == (want.method, want.block,
                                                                       want.shape)
    assert plan.exact.flops == pytest.approx(want.flops)
    assert plan.exact_bytes == x.shape[0] ** 2 * 8 and plan.exact_fits
    assert plan.cheaper == ("exact" if plan.exact.seconds <= plan.seconds else "features")
    text = str(plan)
    assert "exact kernel" in text and f"cheaper: {plan.cheaper}" in text


def test_large_n_exact_does_not_fit_and_x_is_not_read():
    """A million examples (a zero-stride view: reading it would fail on memory or time): the
    exact kernel's 8 TB cannot fit 1 GB, the features written to a store can."""
    net, x = mlp_net()
    big = np.broadcast_to(x[:1], (1_000_000, x.shape[1]))
    plan = ntkcalc.plan_features(net, big, k=64, memory="1GB", to_store=True)
    assert plan.n == 1_000_000 and plan.fits and not plan.in_memory
    assert not plan.exact_fits and plan.cheaper == "features"
    assert plan.exact_bytes == 1e12 * 8
    assert "does NOT fit" in str(plan)
    small = ntkcalc.plan_features(net, big, k=64, memory="100MB")
    assert not small.fits  # the 512 MB of in-memory features exceed the budget


def test_jvp_method_costs_k_forward_products():
    """Method "jvp": k forward-mode products per example, more FLOPs than structured here."""
    net, x = mlp_net()
    jvp = ntkcalc.plan_features(net, x, k=32, method="jvp")
    structured = ntkcalc.plan_features(net, x, k=32)
    assert jvp.flops > structured.flops
    assert {leaf.projected for leaf in jvp.leaves} == {"jvp"}


@pytest.mark.parametrize("kwargs, match", [
    (dict(k=0), "`k`=0"),
    (dict(k=8, to_store="yes"), "`to_store`"),
    (dict(k=8, exact_method="fast"), "`exact_method`"),
    (dict(k=8, outputs="diagonal"), "`outputs`"),
])
def test_argument_errors(kwargs, match):
    net, x = mlp_net()
    with pytest.raises(ValueError, match=match):
        ntkcalc.plan_features(net, x, **kwargs)
