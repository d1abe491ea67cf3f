"""The spot check `ntk(..., spot_check=k)`: entries recomputed from the definition with
jax.jacrev on single examples (Θ = J Jᵀ, common practice) must agree with the kernel, and a
wrong kernel must be caught. The fault is injected where tiles leave the devices."""

from __future__ import annotations

import numpy as np
import pytest
from helpers import ZOO

import ntkcalc
from ntkcalc._tiles import drive
from ntkcalc._tiles.spot_check import pairs


def _mlp(n=6):
    case = next(c for c in ZOO if c.name == "mlp")
    return case.make(), case.x(np.random.default_rng(0), n)


@pytest.mark.parametrize("outputs", ["full", "trace", "diagonal", "logit-sum"])
def test_agrees_on_a_correct_kernel(outputs, caplog):
    net, x = _mlp()
    with caplog.at_level("INFO", logger="ntkcalc"):
        k = ntkcalc.ntk(net, x, x[:4], outputs=outputs, spot_check=5, progress=False)
    assert "spot check: 5 entries recomputed with jax.jacrev agree" in caplog.text
    assert k.shape[:2] == (6, 4)


def test_by_layer_and_store(tmp_path):
    net, x = _mlp()
    groups = ntkcalc.ntk_by_layer(net, x, spot_check=4, store=tmp_path / "k.zarr",
                                  memory="20KB", progress=False)
    assert len(groups) == 3


def _corrupting(monkeypatch, where):
    real = drive.iter_tiles

    def wrong_tiles(plan, req, todo, *, devices):
        for t, values in real(plan, req, todo, devices=devices):
            if (t.r0 <= where[0] < t.r1) and (t.c0 <= where[1] < t.c1):
                values = values.copy()
                values[:, where[0] - t.r0, where[1] - t.c0] *= 1.001
            yield t, values

    monkeypatch.setattr(drive, "iter_tiles", wrong_tiles)


def test_catches_a_wrong_entry(monkeypatch, tmp_path):
    # One entry 0.1 % off (a miscompiled step for one example) is caught when it is checked.
    net, x = _mlp()
    _corrupting(monkeypatch, (2, 2))
    k = ntkcalc.ntk(net, x, store=tmp_path / "off.zarr", progress=False)  # silently wrong
    assert k[2, 2] != ntkcalc.ntk(net, x, progress=False)[2, 2]
    with pytest.raises(RuntimeError, match=r"`spot_check` failed: the kernel at \[2, 2\]"):
        ntkcalc.ntk(net, x, store=tmp_path / "k.zarr", spot_check=36, progress=False)


def test_pairs_cover_the_diagonal_first():
    chosen = pairs(10, 10, 6, symmetric=True)
    assert len(set(chosen)) == 6 and sum(i == j for i, j in chosen) >= 3
    assert sorted(pairs(2, 3, 50, symmetric=False)) == [(i, j) for i in range(2) for j in range(3)]


@pytest.mark.parametrize("bad", [-1, True, "8", 2.5])
def test_bad_count(bad):
    net, x = _mlp(2)
    with pytest.raises(ValueError, match=r"`spot_check`=.* must be a number of kernel entries"):
        ntkcalc.ntk(net, x, spot_check=bad)
