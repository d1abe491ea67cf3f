"""Tiling never changes the kernel; the memory budget is enforced up front.

References: dense jax.jacrev (`helpers.reference_full`, float64 within 1e-12 relative) and the
single-tile kernel (block = N: one compiled step over all examples), float32 within 1e-6.
"""

from __future__ import annotations

import dataclasses
import re

import jax
import numpy as np
import pytest
from helpers import ZOO, assert_close, reduce_mode, reference_full

import ntkcalc
from ntkcalc._engine.planner import prepare
from ntkcalc._tiles.plan import plan_request
from ntkcalc._tiles.run import assemble

N1, N2 = 13, 6
BLOCKS = [1, 3, 5, 8, N1]


def _net():
    case = next(c for c in ZOO if c.name == "mlp")
    rng = np.random.default_rng(4)
    return case.make(), case.x(rng, N1), case.x(rng, N2)


def _tiled(net, x1, x2, block, outputs, method="auto"):
    req = prepare(net, x1, x2, outputs=outputs, method=method)
    plan = plan_request(req, outputs=outputs, memory="1GB", method=method)
    return assemble(dataclasses.replace(plan, block=block), req)[0]


@pytest.mark.parametrize("outputs", ["full", "trace"])
@pytest.mark.parametrize("symmetric", [True, False], ids=["K(X,X)", "K(X1,X2)"])
def test_tile_sizes_float64(outputs, symmetric):
    # Reference: helpers.reference_full (jax.jacrev + einsum), 1e-12 relative, five tile sizes.
    net, x1, x2 = _net()
    x2 = None if symmetric else x2
    want = reduce_mode(reference_full(net, x1, x2), outputs)
    for b in BLOCKS:
        assert_close(_tiled(net, x1, x2, b, outputs), want, rtol=1e-12)


def test_tile_sizes_float32():
    # Reference: the float32 single-tile kernel (block = N); tiles change only the rounding.
    net, x1, _ = _net()
    with jax.enable_x64(False):
        one = _tiled(net, x1, None, N1, "full", method="jacobian")
        assert one.dtype == np.float32
        for b in BLOCKS[:-1]:
            assert_close(_tiled(net, x1, None, b, "full", method="jacobian"), one, rtol=1e-6)


def _stated_minimum(err) -> int:
    amount = re.search(r"works is about ([0-9.]+) ([KMG]?B)", str(err.value))
    return int(float(amount.group(1)) * {"B": 1, "KB": 1e3, "MB": 1e6, "GB": 1e9}[amount.group(2)])


def test_budget_too_small_names_a_budget_that_works(tmp_path):
    # The planner's stated minimum is checked by running with it (outside check: it computes):
    # into a store it suffices alone; in memory the result (stated in the error) comes on top.
    net, x1, _ = _net()
    want = reference_full(net, x1)
    with pytest.raises(MemoryError, match="smallest budget that works is about") as err:
        ntkcalc.ntk(net, x1, outputs="full", memory=100, progress=False)
    assert "`memory`=100" in str(err.value) and "result in memory needs another" in str(err.value)
    least = _stated_minimum(err)
    view = ntkcalc.ntk(net, x1, outputs="full", memory=least, store=tmp_path / "k.zarr",
                       progress=False)
    assert_close(np.asarray(view), want, rtol=1e-12)
    result = want.nbytes
    assert_close(ntkcalc.ntk(net, x1, outputs="full", memory=least + result, progress=False),
                 want, rtol=1e-12)


def test_result_larger_than_budget_asks_for_a_store(tmp_path):
    # 40×40×3×3 float64 = 115 KB of result; a 60 KB budget fits tiles but not the result.
    case = next(c for c in ZOO if c.name == "mlp")
    net = case.make()
    x = case.x(np.random.default_rng(5), 40)
    with pytest.raises(MemoryError, match="alone exceeds `memory`='60KB'.*pass `store=`"):
        ntkcalc.ntk(net, x, outputs="full", memory="60KB", progress=False)
    view = ntkcalc.ntk(net, x, outputs="full", memory="60KB", store=tmp_path / "k.zarr",
                       progress=False)
    assert_close(np.asarray(view), reference_full(net, x), rtol=1e-12)
