"""Tiles spread over devices and over JAX processes give the single-device kernel.

References: the in-memory single-device, single-process kernel of `ntkcalc.ntk` (float64, within
1e-12 relative; bit-identical where the tiles are the same) and `helpers.reference_full`.
Forced CPU devices and processes run in subprocesses, bounded by timeouts.
"""

from __future__ import annotations

import json
import socket

import jax
import numpy as np
import pytest
from helpers import assert_close, reference_full
from test_tiles_store import SMALL, mlp, run_child

import ntkcalc

N = 21


@pytest.fixture(scope="module")
def single():
    net, x = mlp(N)
    return ntkcalc.ntk(net, x, outputs="full", memory=SMALL, progress=False), reference_full(net, x)


def _load(path):
    with open(str(path) + ".json") as f:
        return np.load(path), json.load(f)


@pytest.mark.multiprocess
def test_four_forced_devices(single, tmp_path):
    # 1 vs 4 devices, in memory and into a store, float64 (1e-12) and float32 (1e-6).
    mem, ref = single
    runs = {"mem4": {}, "store4": {"store": str(tmp_path / "s.zarr")}, "mem1of4": {"use": 1},
            "mem4_f32": {"float32": True}, "mem1of4_f32": {"float32": True, "use": 1}}
    for name, run in runs.items():
        run["out"] = str(tmp_path / f"{name}.npy")
    proc = run_child({"n": N, "outputs": "full", "memory": SMALL, "devices": 4,
                      "runs": list(runs.values())})
    assert proc.returncode == 0, proc.stdout + proc.stderr
    got32 = {name: _load(runs[name]["out"])[0] for name in ("mem4_f32", "mem1of4_f32")}
    assert got32["mem4_f32"].dtype == np.float32
    assert_close(got32["mem4_f32"], got32["mem1of4_f32"], rtol=1e-6)  # float32: 1e-6 relative
    assert_close(got32["mem4_f32"], ref, rtol=1e-5)
    for name, run in runs.items():
        if name.endswith("_f32"):
            continue
        got, info = _load(run["out"])
        assert_close(got, ref, rtol=1e-12)
        if name == "store4":
            assert info["devices"] == 4 and info["computed"] == info["tiles"]
        if name == "mem1of4":
            np.testing.assert_array_equal(got, mem)  # one device: the same tiles, bitwise
        # CPU devices share the budget: tiles on 4 devices are planned in a quarter of it, so
        # they may be smaller than the single-device run's: equal to rounding, not bitwise.
        assert_close(got, mem, rtol=1e-12)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.mark.multiprocess
def test_two_processes_share_one_store(single, tmp_path):
    # 1 vs 2 processes (jax.distributed on 127.0.0.1, gloo CPU collectives), one shared store;
    # the store is first partly filled by a killed single-process run, which the two resume.
    mem, ref = single
    store = str(tmp_path / "k.zarr")
    base = {"n": N, "outputs": "full", "memory": SMALL, "store": store}
    killed = run_child({**base, "kill_after": 2})
    assert killed.returncode == -9, killed.stdout + killed.stderr
    port = _free_port()
    procs = [run_child({**base, "process": [i, 2, port], "out": str(tmp_path / f"p{i}.npy")},
                       wait=False) for i in range(2)]
    try:
        logs = [p.communicate(timeout=240)[0].decode() for p in procs]
    finally:
        for p in procs:
            p.kill()
    for p, log in zip(procs, logs, strict=True):
        assert p.returncode == 0, log
    results = [_load(tmp_path / f"p{i}.npy") for i in range(2)]
    for got, _ in results:
        np.testing.assert_array_equal(got, mem)  # same tile size as the single-process run
    infos = [info for _, info in results]
    assert [i["process"] for i in infos] == [[0, 2], [1, 2]]
    assert sum(i["computed"] for i in infos) == infos[0]["tiles"] - 2
    assert sum(i["computed"] + i["reused"] for i in infos) == infos[0]["tiles"]
    assert_close(results[0][0], ref, rtol=1e-12)


def test_two_local_devices_argument_checks():
    net, x = mlp(4)
    with pytest.raises(ValueError, match="`devices`=\\[\\] is not a non-empty sequence"):
        ntkcalc.ntk(net, x, devices=[])
    with pytest.raises(ValueError, match="`devices`='cpu' is not a non-empty sequence"):
        ntkcalc.ntk(net, x, devices="cpu")
    dev = jax.local_devices()[0]
    with pytest.raises(ValueError, match="lists a device twice"):
        ntkcalc.ntk(net, x, devices=[dev, dev])


def test_several_processes_need_a_store(monkeypatch):
    # Without a shared store the processes' tiles would have nowhere to meet: refused up front.
    from ntkcalc._tiles import drive

    net, x = mlp(4)
    monkeypatch.setattr(drive, "process", lambda: (0, 2))
    with pytest.raises(ValueError, match="`store`=None with 2 JAX processes"):
        ntkcalc.ntk(net, x, progress=False)


PLAN_CHILD = """
import json, os, sys
os.environ["XLA_FLAGS"] = "--xla_force_host_platform_device_count=2"
sys.path.insert(0, sys.argv[1])
import conftest  # x64, rank promotion "raise", matmul precision "highest" as in the suite
import jax
import numpy as np
import ntkcalc
from ntkcalc._tiles import drive
from helpers import ZOO

case = next(c for c in ZOO if c.name == "mlp")
net, x = case.make(), case.x(np.random.default_rng(0), 21)
ran = []
real = drive.assemble
def spy(plan, req, **kw):
    ran.append((plan, kw.get("devices")))
    return real(plan, req, **kw)
drive.assemble = spy
out = []
for memory in ("120KB", "2GB", "40KB"):
    try:
        p = ntkcalc.plan(net, x, outputs="full", memory=memory)
    except MemoryError as e:
        out.append({"memory": memory, "refused": str(e)})
        continue
    k = ntkcalc.ntk(net, x, outputs="full", memory=memory, progress=False)
    done, devices = ran[-1]
    out.append({"memory": memory, "planned": [p.method, p.block, list(p.representations),
                                              len(p.devices), p.working, p.reserved],
                "ran": [done.method, done.block, list(done.representations), len(devices),
                        done.working, done.reserved],
                "kernel": np.asarray(k).tolist()})
print("RESULT" + json.dumps(out))
"""


@pytest.mark.multiprocess
def test_plan_on_two_forced_cpu_devices_is_what_ran(single):
    # Two CPU devices share host memory: the plan splits what the result leaves between them
    # (or uses one when half is too small), and ntk runs that plan on those devices.
    import os
    import subprocess
    import sys

    from test_tiles_store import TESTS

    _, ref = single
    env = {k: v for k, v in os.environ.items() if k != "XLA_FLAGS"}
    proc = subprocess.run([sys.executable, "-c", PLAN_CHILD, TESTS], env=env,
                          capture_output=True, text=True, timeout=240)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    rows = json.loads(proc.stdout.split("RESULT", 1)[1])
    used = set()
    for row in rows:
        if "refused" in row:
            continue
        assert row["planned"] == row["ran"], row["memory"]
        used.add(row["planned"][3])
        assert_close(np.array(row["kernel"]), ref, rtol=1e-12)  # jax.jacrev reference
    assert 2 in used  # at least one budget spreads the tiles over both devices
