"""Loading saved parameters into a Net.

Each round trip is checked against the library that wrote the file (orbax-checkpoint or
flax.serialization): the loaded leaves equal the saved ones exactly, and the loaded Net's kernel
equals the original Net's kernel and the dense jax.jacrev reference (tests/helpers.py).
"""

from __future__ import annotations

import pickle
import re

import jax
import numpy as np
import orbax.checkpoint as ocp
import pytest
from flax import nnx, serialization
from helpers import MLP, ResBlockNNX, assert_close, f64, reduce_mode, reference_full

import ntkcalc
from ntkcalc._adapters.checkpoint import checkpoint_steps
from ntkcalc._adapters.net import load_checkpoint

X = np.random.default_rng(0).normal(size=(3, 5))


def _save(path, tree):
    with ocp.StandardCheckpointer() as c:
        c.save(path, tree)


@pytest.fixture(scope="module")
def linen():
    module = MLP(width=6, out=2)
    variables = f64(module.init(jax.random.key(0), X[:1]))
    return module, variables


def _same_leaves(got, want):
    got_l, want_l = jax.tree_util.tree_leaves(got), jax.tree_util.tree_leaves(want)
    assert jax.tree_util.tree_structure(got) == jax.tree_util.tree_structure(want)
    for a, b in zip(got_l, want_l, strict=True):
        np.testing.assert_array_equal(np.asarray(a), np.asarray(b))


def _same_kernel(net, original):
    want = reduce_mode(reference_full(original, X), "trace")  # dense jax.jacrev reference
    assert_close(ntkcalc.ntk(net, X), want)
    assert_close(ntkcalc.ntk(net, X), ntkcalc.ntk(original, X))


@pytest.mark.parametrize("template", ["none", "example", "abstract-variables"])
def test_orbax_linen_round_trip(tmp_path, linen, template):
    module, variables = linen
    _save(tmp_path / "ck", variables)
    options = {
        "none": {},
        "example": {"example": X[:1]},
        "abstract-variables": {"variables": jax.eval_shape(lambda: variables)},
    }[template]
    net = ntkcalc.Net.from_checkpoint(tmp_path / "ck", module=module, **options)
    _same_leaves(net.params, variables["params"])  # orbax round trip
    _same_kernel(net, ntkcalc.Net.from_linen(module, variables))


def test_relative_path_and_params_only_checkpoint(tmp_path, linen, monkeypatch):
    module, variables = linen
    _save(tmp_path / "params-only", variables["params"])
    monkeypatch.chdir(tmp_path)
    net = load_checkpoint("params-only", module=module, example=X[:1])
    _same_leaves(net.params, variables["params"])


def test_subtree_of_a_train_state(tmp_path, linen):
    module, variables = linen
    params = variables["params"]
    state = {"step": np.asarray(7), "params": params, "opt": {"mu": params}}
    _save(tmp_path / "state", state)
    net = load_checkpoint(tmp_path / "state", module=module, example=X[:1], subtree="params")
    _same_leaves(net.params, variables["params"])
    with pytest.raises(ValueError, match="`subtree`='weights'.*has no key 'weights'"):
        load_checkpoint(tmp_path / "state", module=module, subtree="weights")


def test_checkpoint_manager_steps(tmp_path, linen, caplog):
    module, variables = linen
    scaled = lambda s: jax.tree_util.tree_map(lambda a: a * (1 + s), variables)
    with ocp.CheckpointManager(tmp_path / "run") as mngr:
        for s in (0, 3, 7):
            mngr.save(s, args=ocp.args.StandardSave(scaled(s)))
    caplog.clear()
    with caplog.at_level("WARNING"):
        assert checkpoint_steps(tmp_path / "run") == (0, 3, 7)
        load_checkpoint(tmp_path / "run", module=module, example=X[:1])
    # Reading only: orbax's warnings about read-only managers are not the user's concern.
    assert [r for r in caplog.records if r.name == "absl"] == []
    net3 = load_checkpoint(tmp_path / "run", module=module, example=X[:1], step=3)
    _same_leaves(net3.params, scaled(3)["params"])
    latest = load_checkpoint(tmp_path / "run", module=module, example=X[:1])
    _same_leaves(latest.params, scaled(7)["params"])
    one_step = load_checkpoint(tmp_path / "run" / "3", module=module)  # a step directory
    _same_leaves(one_step.params, scaled(3)["params"])
    with pytest.raises(ValueError, match=r"`step`=4 is not saved.*\[0, 3, 7\]"):
        load_checkpoint(tmp_path / "run", module=module, step=4)


def test_checkpoint_manager_items(tmp_path, linen):
    module, variables = linen
    with ocp.CheckpointManager(tmp_path / "run") as mngr:
        mngr.save(1, args=ocp.args.Composite(
            state=ocp.args.StandardSave(variables), meta=ocp.args.JsonSave({"lr": 0.1})))
    with pytest.raises(ValueError, match=r"several items \['meta', 'state'\].*`item=`"):
        load_checkpoint(tmp_path / "run", module=module)
    net = load_checkpoint(tmp_path / "run", module=module, item="state", example=X[:1])
    _same_leaves(net.params, variables["params"])


def test_msgpack_linen_round_trip(tmp_path, linen):
    module, variables = linen
    (tmp_path / "v.msgpack").write_bytes(serialization.to_bytes(variables))
    net = load_checkpoint(tmp_path / "v.msgpack", module=module, example=X[:1])
    _same_leaves(net.params, variables["params"])  # flax.serialization round trip
    _same_kernel(net, ntkcalc.Net.from_linen(module, variables))


@pytest.fixture(scope="module")
def nnx_model():
    model = ResBlockNNX(nnx.Rngs(0))
    model.bn.mean[...] = model.bn.mean[...] + 0.25  # trained statistics differ from a fresh model
    graphdef, state = nnx.split(model)
    return nnx.merge(graphdef, f64(state))


@pytest.mark.parametrize("fmt", ["orbax", "msgpack"])
@pytest.mark.parametrize("template", ["abstract", "constructed"])
def test_nnx_round_trip(tmp_path, nnx_model, fmt, template):
    if fmt == "orbax":
        path = tmp_path / "ck"
        _save(path, nnx.state(nnx_model))
    else:  # the rng state stays out: msgpack holds plain arrays
        path = tmp_path / "m.msgpack"
        saved = nnx.to_pure_dict(nnx.state(nnx_model, nnx.Not(nnx.RngState)))
        path.write_bytes(serialization.to_bytes(saved))
    make = lambda: ResBlockNNX(nnx.Rngs(5))  # different initial values than the saved model
    target = nnx.eval_shape(make) if template == "abstract" else make()
    net = ntkcalc.Net.from_checkpoint(path, module=target)
    original = ntkcalc.Net.from_nnx(nnx_model)
    _same_leaves(net.params, original.params)
    np.testing.assert_array_equal(net.state["bn"]["mean"][...], nnx_model.bn.mean[...])
    _same_kernel(net, original)


@pytest.mark.parametrize("name", ["weights.pkl", "weights.bin"])
def test_pickle_refused(tmp_path, linen, name):
    module, variables = linen
    path = tmp_path / name
    path.write_bytes(pickle.dumps(jax.tree_util.tree_map(np.asarray, variables)))
    with pytest.raises(ValueError, match="pickle file: loading it would run arbitrary code"):
        load_checkpoint(path, module=module)


def test_mismatch_lists_paths(tmp_path, linen):
    module, variables = linen
    params = dict(variables["params"])
    params["Extra"] = {"w": np.ones(2)}
    del params["Dense_1"]
    _save(tmp_path / "ck", {"params": params})
    with pytest.raises(ValueError) as err:
        load_checkpoint(tmp_path / "ck", module=MLP(width=6, out=3), example=X[:1])
    msg = str(err.value)
    assert "5 differing leaves, first 5" in msg
    assert "shape differs: params/Dense_2/kernel is (6, 2) in the checkpoint, (6, 3)" in msg
    assert "missing from the checkpoint: params/Dense_1/bias (6,)" in msg
    assert "extra in the checkpoint: params/Extra/w (2,)" in msg


def test_bad_arguments(tmp_path, linen, nnx_model):
    module, variables = linen
    with pytest.raises(FileNotFoundError, match="`path`='nowhere' does not exist"):
        load_checkpoint("nowhere", module=module)
    (tmp_path / "empty").mkdir()
    with pytest.raises(ValueError, match="holds no orbax checkpoint"):
        load_checkpoint(tmp_path / "empty", module=module)
    (tmp_path / "junk").write_bytes(b"\xc1 not msgpack")
    with pytest.raises(ValueError, match="not flax msgpack bytes"):
        load_checkpoint(tmp_path / "junk", module=module)
    with pytest.raises(TypeError, match="`module` must be a flax linen Module or an nnx"):
        load_checkpoint(tmp_path / "junk", module=object())
    _save(tmp_path / "ck", variables)
    with pytest.raises(ValueError, match="`example`, `variables` and apply keywords are for linen"):
        load_checkpoint(tmp_path / "ck", module=nnx_model, example=X)


@pytest.mark.parametrize("damage", [b"{not json", b""])
def test_damaged_metadata_names_the_path(tmp_path, linen, damage):
    # Before: a bare JSONDecodeError from orbax that named no file.
    module, variables = linen
    _save(tmp_path / "ck", variables)
    (tmp_path / "ck" / "_METADATA").write_bytes(damage)
    with pytest.raises(ValueError) as err:
        load_checkpoint(tmp_path / "ck", module=module)
    msg = str(err.value)
    assert f"Could not read the orbax checkpoint at {str(tmp_path / 'ck')!r}" in msg
    assert f"Damaged metadata: {tmp_path / 'ck' / '_METADATA'}." in msg


def test_damaged_step_metadata_names_the_path(tmp_path, linen):
    module, variables = linen
    with ocp.CheckpointManager(tmp_path / "run") as mngr:
        mngr.save(1, args=ocp.args.StandardSave(variables))
        mngr.wait_until_finished()
    step = tmp_path / "run" / "1"
    (step / "_CHECKPOINT_METADATA").write_bytes(b"{garbage")
    with pytest.raises(ValueError, match="Could not read the orbax checkpoint at .*Damaged "
                                         "metadata: " + re.escape(f"{step}/_CHECKPOINT_METADATA")):
        load_checkpoint(tmp_path / "run", module=module)
