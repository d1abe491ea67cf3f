"""The features store: resume after SIGKILL, repair, refusal of a different sketch.

Reference: an uninterrupted run with the same arguments (bit-identical), and the counts of blocks
each rerun computes (only those the killed run did not finish).
"""

from __future__ import annotations

import functools
import json
import os
import subprocess
import sys
import textwrap

import numpy as np
import pytest

import ntkcalc
from ntkcalc._sketch import features as F
from tests.helpers import ZOO, features_budget

TESTS = os.path.dirname(os.path.abspath(__file__))
N, K = 10, 8

# A child computing features into a store; it SIGKILLs itself after writing some blocks
# (optionally after the chunk of the next one landed without its checksum).
CHILD = textwrap.dedent("""
    import json, os, signal, sys
    spec = json.loads(sys.argv[1])
    sys.path.insert(0, spec["tests"])
    import conftest  # x64, rank promotion "raise", matmul precision "highest" as in the suite
    import numpy as np
    import ntkcalc
    from ntkcalc._sketch.store import FeatureStore
    from helpers import ZOO

    case = next(c for c in ZOO if c.name == "mlp")
    net, x = case.make(), case.x(np.random.default_rng(0), spec["n"])
    written = [0]
    write = FeatureStore.write
    def killing_write(self, i, r0, values):
        if written[0] == spec["kill_after"]:
            if spec["half"]:
                self.features[r0:r0 + values.shape[0]] = np.zeros_like(values)
            os.kill(os.getpid(), signal.SIGKILL)
        write(self, i, r0, values)
        written[0] += 1
    FeatureStore.write = killing_write
    ntkcalc.ntk_features(net, x, k=spec["k"], store=spec["store"], memory=spec["memory"],
                         progress=False)
""")


@functools.cache
def model():
    case = next(c for c in ZOO if c.name == "mlp")
    return case.make(), case.x(np.random.default_rng(0), N)


@functools.cache
def small_memory() -> int:
    """A budget that fits blocks of 3 examples (4 blocks of N = 10)."""
    return features_budget(*model(), k=K, examples=3)


def run(path, **kw):
    net, x = model()
    return ntkcalc.ntk_features(net, x, k=K, store=path, memory=small_memory(), progress=False,
                                **kw)


@pytest.mark.multiprocess
@pytest.mark.parametrize("half", [False, True], ids=["between-blocks", "mid-block"])
def test_sigkill_then_resume_is_bit_identical(tmp_path, half):
    store = tmp_path / "f.zarr"
    spec = {"tests": TESTS, "n": N, "k": K, "store": str(store), "memory": small_memory(),
            "kill_after": 2, "half": half}
    env = {k: v for k, v in os.environ.items() if k != "XLA_FLAGS"}
    proc = subprocess.run([sys.executable, "-c", CHILD, json.dumps(spec)], env=env,
                          capture_output=True, text=True, timeout=240)
    assert proc.returncode == -9, proc.stdout + proc.stderr
    resumed = run(store)
    assert resumed.block == 3
    assert (resumed.reused, resumed.computed) == (2, 2)
    whole = run(tmp_path / "u.zarr")
    assert whole.computed == 4
    np.testing.assert_array_equal(np.asarray(resumed.features[...]),
                                  np.asarray(whole.features[...]))
    # and the in-memory features (another block size) agree to rounding
    net, x = model()
    mem = ntkcalc.ntk_features(net, x, k=K, progress=False)
    np.testing.assert_allclose(np.asarray(whole.features[...]), mem.features, rtol=1e-12,
                               atol=1e-14)


def test_damaged_block_is_recomputed(tmp_path):
    store = tmp_path / "f.zarr"
    first = np.asarray(run(store).features[...])
    import zarr

    arr = zarr.open_group(store, mode="r+")["features"]
    arr[3:6] = 0.0  # block 1 (examples 3-5) no longer matches its checksum
    again = run(store)
    assert (again.reused, again.computed) == (3, 1)
    np.testing.assert_array_equal(np.asarray(again.features[...]), first)


def test_different_sketch_or_kernel_store_is_refused(tmp_path):
    store = tmp_path / "f.zarr"
    run(store)
    with pytest.raises(ValueError, match="seed"):
        run(store, seed=1)
    net, x = model()
    kernel_store = tmp_path / "k.zarr"
    ntkcalc.ntk(net, x, store=kernel_store, progress=False)
    with pytest.raises(ValueError, match="kind"):
        run(kernel_store)


def test_processes_share_blocks_of_one_store(tmp_path, monkeypatch):
    """Process p of P computes blocks p, p + P, ...: two processes (simulated one after the other)
    fill one store; the first reports the blocks still missing, the second completes it."""
    store = tmp_path / "f.zarr"
    monkeypatch.setattr(F, "process", lambda: (0, 2))
    with pytest.raises(RuntimeError, match="missing 2 of 4"):
        run(store)
    monkeypatch.setattr(F, "process", lambda: (1, 2))
    second = run(store)
    assert (second.computed, second.reused) == (2, 0)
    monkeypatch.undo()
    np.testing.assert_array_equal(np.asarray(second.features[...]),
                                  np.asarray(run(tmp_path / "u.zarr").features[...]))


def test_store_in_use_is_waited_for(tmp_path, caplog):
    """A single-process run holds the store's lock (the kernel store's `locked`) for the whole
    run: while another holder has it, the run logs that it waits, then completes."""
    import fcntl
    import threading
    import time

    store = tmp_path / "f.zarr"
    store.mkdir()
    fd = os.open(store, os.O_RDONLY)
    fcntl.flock(fd, fcntl.LOCK_EX)
    out = []
    worker = threading.Thread(target=lambda: out.append(run(store)))
    with caplog.at_level("WARNING", logger="ntkcalc"):
        worker.start()
        deadline = time.time() + 120
        while "in use by another process" not in caplog.text and time.time() < deadline:
            time.sleep(0.2)
        assert "in use by another process" in caplog.text
        assert not out  # still waiting
        os.close(fd)  # release: the run goes on
        worker.join(240)
    assert out and out[0].computed == 4
