"""The engine's pricing against what runs: the jitted calls a plan counts are the calls the tile
runner makes (spied on the compiled steps), and the per-call cost enters the estimate as
calls × `Rates.call`. Rates are pinned (`FIXED`, tests/test_engine_rates.py) so the plans are
reproducible. The whole request's plan is tested in tests/test_tiles_plan.py.
"""

from __future__ import annotations

import dataclasses
import functools

import numpy as np
import pytest
from helpers import FIXED_RATES as FIXED
from helpers import ZOO, reference_full

import ntkcalc
from ntkcalc._engine.planner import prepare
from ntkcalc._tiles import run

N = 40


@functools.cache
def mlp():
    case = next(c for c in ZOO if c.name == "mlp")
    net = case.make()
    x = case.x(np.random.default_rng(7), N)
    return net, x, reference_full(net, x)


def test_planned_calls_are_the_calls_made(monkeypatch, tmp_path):
    # The per-call term of the estimate counts the jitted steps the tile runner makes.
    net, x, _ = mlp()
    counts = {"calls": 0}
    real_compiled, real_single = run.compiled, run.compiled_single

    def counted(f):
        def wrapped(*a, **k):
            counts["calls"] += 1
            return f(*a, **k)
        return wrapped

    monkeypatch.setattr(run, "compiled", lambda p: tuple(map(counted, real_compiled(p))))
    monkeypatch.setattr(run, "compiled_single", lambda p: counted(real_single(p)))
    for memory, x2 in [("60KB", None), ("2GB", None), ("60KB", x[:17]), ("8MB", x[:17])]:
        p = ntkcalc.plan(net, x, x2, outputs="full", memory=memory, store=tmp_path / "k.zarr",
                         rates=FIXED)
        req = prepare(net, x, x2, outputs="full")
        counts["calls"] = 0
        run.assemble(p, req)
        assert counts["calls"] == p.calls, (memory, p.block, p.cache_factors)


def test_per_call_cost_is_in_the_estimate(tmp_path):
    net, x, _ = mlp()
    free = dataclasses.replace(FIXED, call=0.0)
    slow = dataclasses.replace(FIXED, call=1e-3)
    kw = dict(outputs="full", memory="60KB", method="structured", store=tmp_path / "k.zarr")
    a = ntkcalc.plan(net, x, rates=free, **kw)
    b = ntkcalc.plan(net, x, rates=slow, **kw)
    assert a.calls == b.calls > 1 and a.block == b.block
    assert b.seconds - a.seconds == pytest.approx(b.calls * 1e-3, rel=1e-9)
    assert "1 ms per call" in str(b) and "given" in str(b)
