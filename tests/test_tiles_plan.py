"""The plan of the whole request (`_tiles/plan.py`): ``ntkcalc.plan`` takes the budget, the
result's reservation, the store and the devices, and `ntk(..., plan=p)` runs exactly ``p``.

References: what the tile layer actually ran (spied on `drive.assemble` / `drive.iter_tiles`),
the dense float64 kernel of `helpers.reference_full` (whole-batch jax.jacrev + einsum, 1e-10
relative), and the fingerprinted store. Rates are pinned (`FIXED`) wherever a plan must be
reproducible.
"""

from __future__ import annotations

import functools

import numpy as np
import pytest
from helpers import FIXED_RATES as FIXED
from helpers import ZOO, assert_close, reduce_mode, reference_full
from test_engine_planner import mlp

import ntkcalc
from ntkcalc._engine import cost as C
from ntkcalc._engine import rates as R
from ntkcalc._engine.planner import prepare
from ntkcalc._tiles import drive
from ntkcalc._tiles import plan as planning
from ntkcalc._tiles.plan import plan_request, result_bytes


@functools.cache
def cnn():
    case = next(c for c in ZOO if c.name == "cnn")
    net = case.make()
    x = case.x(np.random.default_rng(8), 6)
    return net, x, reference_full(net, x)


def _spy(monkeypatch):
    """Record (plan, devices) of every run the tile layer is handed."""
    ran = []
    real_assemble, real_iter = drive.assemble, drive.iter_tiles

    def assemble(plan, req, **kw):
        ran.append((plan, kw.get("devices")))
        return real_assemble(plan, req, **kw)

    def iter_tiles(plan, req, todo=None, **kw):
        ran.append((plan, kw.get("devices")))
        return real_iter(plan, req, todo, **kw)

    monkeypatch.setattr(drive, "assemble", assemble)
    monkeypatch.setattr(drive, "iter_tiles", iter_tiles)
    return ran


def _same(planned, ran):
    assert (ran.method, ran.block, ran.cache_factors) == (
        planned.method, planned.block, planned.cache_factors)
    assert ran.representations == planned.representations
    assert ran.program == planned.program
    assert tuple(ran.devices) == tuple(planned.devices)


# "24MB" and 524288: the budgets where plan and ntk used to disagree; "200KB": the result
# (40·40·3·3·8 B = 115 KB) takes most of it, so tiles shrink; None: the default budget.
BUDGETS = ["24MB", 524288, None, "200KB", "60KB"]


@pytest.mark.parametrize("memory", BUDGETS, ids=str)
def test_plan_equals_what_ntk_ran(monkeypatch, memory):
    net, x, ref = mlp()
    ran = _spy(monkeypatch)
    try:
        planned = ntkcalc.plan(net, x, outputs="full", memory=memory)
    except MemoryError as e:  # refused by plan: refused by ntk with the same message
        with pytest.raises(MemoryError) as err:
            ntkcalc.ntk(net, x, outputs="full", memory=memory, progress=False)
        assert str(err.value) == str(e) and not ran
        return
    got = ntkcalc.ntk(net, x, outputs="full", memory=memory, progress=False)
    ((done, devices),) = ran
    _same(planned, done)
    assert planned.reserved == result_bytes(prepare(net, x, outputs="full"), "full")
    assert planned.working <= planned.memory - planned.reserved
    assert planned.peak_bytes <= planned.working
    assert_close(got, ref)  # direct jax.jacrev reference, 1e-10 relative


def test_reservation_shrinks_tiles_as_ntk_runs(monkeypatch):
    # 200 KB with 115 KB of result: the plan itself shows the smaller tiles ntk runs.
    net, x, _ = mlp()
    in_memory = ntkcalc.plan(net, x, outputs="full", memory="200KB")
    req = prepare(net, x, outputs="full")
    stored = plan_request(req, outputs="full", memory="200KB", method="auto", store="k.zarr")
    assert stored.reserved == 0 and in_memory.reserved > 0
    assert in_memory.block < stored.block
    assert "115 KB reserved" in str(in_memory)
    # A caller that never builds the kernel (the matrix-free operator) reserves nothing.
    with pytest.raises(MemoryError, match="alone exceeds"):
        plan_request(req, outputs="full", memory="60KB", method="auto")
    free = plan_request(req, outputs="full", memory="60KB", method="auto", reserve=False)
    assert free.reserved == 0 and free.store is None


def test_plan_with_store_is_what_ran_and_adopts_the_store(monkeypatch, tmp_path):
    net, x, ref = mlp()
    store = tmp_path / "k.zarr"
    ran = _spy(monkeypatch)
    p = ntkcalc.plan(net, x, outputs="full", memory="60KB", store=store)
    view = ntkcalc.ntk(net, x, outputs="full", memory="60KB", store=store, progress=False)
    _same(p, ran[-1][0])
    assert p.store == str(store) and p.reserved == 0
    assert_close(np.asarray(view), ref)
    # A larger budget resumes in the store's tiles: the plan shows them, ntk(plan=p) reuses all.
    again = ntkcalc.plan(net, x, outputs="full", memory="2GB", store=store)
    assert again.block == p.block
    view = ntkcalc.ntk(net, x, outputs="full", store=store, plan=again, progress=False)
    assert view.info.computed == 0 and view.info.reused == view.info.tiles
    _same(again, ran[-1][0])
    with pytest.raises(MemoryError, match="was written in tiles of"):
        ntkcalc.plan(net, x, outputs="full", memory="20KB", store=store)
    # Another kernel in the store is refused by the plan itself, even right after a plan of the
    # same shapes (scaled parameters: the store's record names the parameters).
    import jax

    scaled = net.replace(params=jax.tree_util.tree_map(lambda v: 2.0 * v, net.params))
    with pytest.raises(ValueError, match="holds a different kernel: params"):
        ntkcalc.plan(scaled, x, outputs="full", memory="2GB", store=store)


@pytest.mark.parametrize("by_layer", [False, True])
def test_ntk_with_plan_equals_ntk_and_reference(monkeypatch, by_layer):
    net, x, ref = cnn()
    if not by_layer:
        p = ntkcalc.plan(net, x, outputs="diagonal", memory="3MB", rates=FIXED)
        ran = _spy(monkeypatch)
        got = ntkcalc.ntk(net, x, outputs="diagonal", plan=p, progress=False)
        _same(p, ran[0][0])
        assert_close(got, ntkcalc.ntk(net, x, outputs="diagonal", memory="3MB", progress=False))
        assert_close(got, reduce_mode(ref, "diagonal"))  # jax.jacrev reference, 1e-10
        return
    p = ntkcalc.plan(net, x, outputs="trace", by_layer=True, rates=FIXED)
    got = ntkcalc.ntk_by_layer(net, x, plan=p, progress=False)
    assert list(got) == list(p.group_names)
    assert_close(sum(got.values()), reduce_mode(ref, "trace"))  # groups sum to Θ (definition)


def test_pinned_rates_reproduce_the_plan():
    net, x, _ = cnn()
    p1 = ntkcalc.plan(net, x, outputs="full", rates=FIXED, memory="50MB")
    planning._PLANS.clear()  # planned again from scratch, not the kept plan
    p2 = ntkcalc.plan(net, x, outputs="full", rates=FIXED, memory="50MB")
    assert p2 is not p1 and ntkcalc.plan(net, x, outputs="full", rates=FIXED,
                                         memory="50MB") is p2  # a repeated request: kept
    assert (p1.method, p1.block, p1.representations, p1.seconds, p1.estimates) == (
        p2.method, p2.block, p2.representations, p2.seconds, p2.estimates)
    assert p1.rates is FIXED and p1.rate == FIXED.matmul and p1.stream == FIXED.stream
    with pytest.raises(ValueError, match="`rates`=3 is not an ntkcalc Rates"):
        ntkcalc.plan(net, x, rates=3)
    with pytest.raises(ValueError, match="`Rates.matmul`=-1"):
        R.Rates(matmul=-1, stream=1e9, formation=((1, 1e9),), call=0.0, accumulation=1e9)
    with pytest.raises(ValueError, match="`Rates.formation`"):
        R.Rates(matmul=1e9, stream=1e9, formation=(), call=0.0, accumulation=1e9)


def test_mismatched_plan_is_refused(tmp_path):
    net, x, _ = mlp()
    p = ntkcalc.plan(net, x, outputs="full", memory="1MB", rates=FIXED)
    cases = [
        (dict(x1=x[:20]), "x1 shape: plan \\(40, 5\\), now \\(20, 5\\)"),
        (dict(outputs="trace"), "outputs: plan 'full', now 'trace'"),
        (dict(params="Dense_0"), "parameters: plan"),
        (dict(memory="2MB"), "`memory`='2MB' disagrees with `plan`"),
        (dict(method="jvp"), "`method`='jvp' disagrees with `plan`, which runs"),
        (dict(store=tmp_path / "k.zarr"), "disagrees with `plan`, made for the kernel in memory"),
        (dict(plan="p"), "`plan`='p' is not a Plan"),
    ]
    for change, message in cases:
        kw = dict(x1=x, outputs="full", plan=p, progress=False) | change
        with pytest.raises(ValueError, match=message):
            ntkcalc.ntk(net, kw.pop("x1"), **kw)
    other = ntkcalc.Net(lambda params, xb: 2 * net.apply(params, xb), net.params)
    with pytest.raises(ValueError, match="net call: plan"):
        ntkcalc.ntk(other, x, outputs="full", plan=p, progress=False)
    # Parameter values may differ: a checkpoint of the same model runs the same plan.
    import jax

    scaled = net.replace(params=jax.tree_util.tree_map(lambda v: 1.5 * v, net.params))
    assert_close(ntkcalc.ntk(scaled, x, outputs="full", plan=p, progress=False),
                 reference_full(scaled, x))


class _FakeDevice:
    """A device as the planner sees it: platform, kind and its own memory statistics."""

    def __init__(self, platform, limit=None, in_use=0):
        self.platform, self.device_kind = platform, f"simulated {platform}"
        self._stats = None if limit is None else {"bytes_limit": limit, "bytes_in_use": in_use}

    def memory_stats(self):
        return self._stats


def test_accelerator_budget_comes_from_its_own_memory(monkeypatch):
    net, x, _ = mlp()
    req = prepare(net, x, outputs="full")
    gpus = (_FakeDevice("gpu", 8_000_000, 2_000_000), _FakeDevice("gpu", 9_000_000, 1_000_000))
    assert C.available_memory(gpus) == 6_000_000  # the smaller free memory of the two
    p = plan_request(req, outputs="full", memory=None, method="auto", devices=gpus, rates=FIXED)
    assert p.memory == int(C.DEFAULT_MEMORY_FRACTION * 6_000_000)  # in whole MB: 3 MB
    # The result is held on the host: nothing reserved; each device has the whole budget.
    assert p.reserved == 0 and p.working == p.memory and p.devices == gpus
    assert "2 gpu devices" in str(p)
    # ... but it must fit the host: a result over half the free host memory asks for a store.
    monkeypatch.setattr(C, "host_memory", lambda: 200_000)  # 115 KB of result > 100 KB
    with pytest.raises(MemoryError, match="exceeds half the host memory .* pass `store=`"):
        plan_request(req, outputs="full", memory=None, method="auto", devices=gpus, rates=FIXED)
    assert plan_request(req, outputs="full", memory=None, method="auto", devices=gpus,
                        rates=FIXED, store="k.zarr").reserved == 0
    monkeypatch.undo()
    # CPU devices share host memory: the result is reserved, the rest split between them.
    cpus = (_FakeDevice("cpu"), _FakeDevice("cpu"))
    q = plan_request(req, outputs="full", memory="1MB", method="auto", devices=cpus, rates=FIXED)
    assert q.reserved == result_bytes(req, "full") and q.working == (10**6 - q.reserved) // 2
    # One CPU device takes everything when half is too small for one tile: the least budget
    # that fits one device's tile, found by search, is then planned on one of the two.
    kw = dict(outputs="full", method="auto", rates=FIXED)
    for extra in range(500, 50_000, 500):
        try:
            one = plan_request(req, memory=q.reserved + extra, devices=cpus[:1], **kw)
            break
        except MemoryError:
            continue
    small = plan_request(req, memory=q.reserved + extra, devices=cpus, **kw)
    assert len(small.devices) == 1 and small.working == extra and small.block == one.block
