"""Loading a stored kernel back: `ntkcalc.open_kernel` against the dense jax.jacrev reference
(tests/helpers.py) and the view `ntk(..., store=...)` returned; refusals name the argument."""

from __future__ import annotations

import numpy as np
import pytest
from helpers import assert_close, reduce_mode, reference_full
from test_tiles_store import mlp

import ntkcalc


def test_reopened_views_match_the_reference(tmp_path):
    net, x = mlp(9)
    full = reference_full(net, x)
    view = ntkcalc.ntk(net, x, outputs="full", store=tmp_path / "k.zarr", memory="60KB",
                       progress=False)
    again = ntkcalc.open_kernel(tmp_path / "k.zarr")
    assert again.kind == "full" and again.num_outputs == full.shape[2]
    assert again.source is None and again.info.tiles == view.info.tiles
    assert_close(np.asarray(again), full, rtol=1e-12)
    assert_close(again[2:5, 1:7], full[2:5, 1:7], rtol=1e-12)

    layers = ntkcalc.ntk_by_layer(net, x, store=tmp_path / "b.zarr", progress=False)
    names = list(layers)
    with pytest.raises(ValueError, match=r"`group`=None.*parameter groups"):
        ntkcalc.open_kernel(tmp_path / "b.zarr")
    total = sum(np.asarray(ntkcalc.open_kernel(tmp_path / "b.zarr", group=g)) for g in names)
    assert_close(total, reduce_mode(full, "trace"), rtol=1e-12)  # the groups partition Θ
    by_index = ntkcalc.open_kernel(tmp_path / "b.zarr", group=len(names) - 1)
    assert_close(np.asarray(by_index), np.asarray(layers[names[-1]]), rtol=0)
    with pytest.raises(ValueError, match=r"`group`='nope'"):
        ntkcalc.open_kernel(tmp_path / "b.zarr", group="nope")


def test_refuses_what_is_not_a_whole_store(tmp_path):
    with pytest.raises(ValueError, match="`path`=.*no ntkcalc kernel store"):
        ntkcalc.open_kernel(tmp_path)
    net, x = mlp(9)
    ntkcalc.ntk(net, x, store=tmp_path / "k.zarr", memory="20KB", progress=False)
    checksums = tmp_path / "k.zarr" / "checksums" / "c"
    victim = next(p for p in sorted(checksums.rglob("*")) if p.is_file())
    victim.unlink()  # one tile's checksum lost: that tile can no longer be trusted
    with pytest.raises(ValueError, match="`path`=.*missing or fail their checksum"):
        ntkcalc.open_kernel(tmp_path / "k.zarr")


def test_trace_store_records_the_number_of_outputs(tmp_path):
    # A trace kernel's shape (N, N) does not show O: the store records it when written, so the
    # reopened view knows it (O = the model's output width, from calling the net).
    import zarr

    net, x = mlp(9)
    o = int(np.asarray(net(x[:1])).shape[-1])
    view = ntkcalc.ntk(net, x, store=tmp_path / "k.zarr", progress=False)
    again = ntkcalc.open_kernel(tmp_path / "k.zarr")
    assert (again.kind, again.num_outputs) == ("trace", o) == (view.kind, view.num_outputs)
    layers = ntkcalc.ntk_by_layer(net, x, store=tmp_path / "b.zarr", progress=False)
    assert ntkcalc.open_kernel(tmp_path / "b.zarr", group=list(layers)[0]).num_outputs == o
    # a store written before O was recorded: unknown for a trace kernel, not guessed
    group = zarr.open_group(str(tmp_path / "k.zarr"), mode="r+")
    group.attrs["ntkcalc"] = {k: v for k, v in group.attrs["ntkcalc"].items()
                              if k != "num_outputs"}
    assert ntkcalc.open_kernel(tmp_path / "k.zarr").num_outputs is None
