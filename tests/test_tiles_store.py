"""The resumable zarr store behind `ntkcalc.ntk(..., store=...)`.

References: the in-memory, single-device kernel of `ntkcalc.ntk` (itself checked against dense
jax.jacrev in test_kernel) and `helpers.reference_full` (whole-batch jax.jacrev + einsum).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap

import numpy as np
import pytest
from helpers import ZOO, assert_close, reduce_mode, reference_full

import ntkcalc
from ntkcalc._tiles import drive
from ntkcalc._tiles.store import TileStore

TESTS = os.path.dirname(os.path.abspath(__file__))
N = 21
SMALL = "120KB"  # tiles of 7 examples for the "full" MLP kernel below: 6 upper tiles of 3×3 blocks

# A child process computing a kernel from a JSON spec; it can SIGKILL itself while writing tiles
# and can join a multi-process JAX run. Shared by test_tiles_devices.
CHILD = textwrap.dedent("""
    import json, os, signal, sys
    spec = json.loads(sys.argv[1])
    if spec.get("devices"):
        os.environ["XLA_FLAGS"] = f"--xla_force_host_platform_device_count={spec['devices']}"
    sys.path.insert(0, spec["tests"])
    import conftest  # x64, rank promotion "raise", matmul precision "highest" as in the suite
    import jax
    if spec.get("process"):
        index, count, port = spec["process"]
        jax.distributed.initialize(f"127.0.0.1:{port}", num_processes=count, process_id=index)
    import numpy as np
    import ntkcalc
    from ntkcalc._tiles.store import TileStore
    from helpers import ZOO

    case = next(c for c in ZOO if c.name == "mlp")
    net, x = case.make(), case.x(np.random.default_rng(spec["seed"]), spec["n"])
    written = [0]
    if spec.get("kill_after") is not None:
        write = TileStore.write
        def killing_write(self, t, values):
            if written[0] == spec["kill_after"]:
                if spec.get("half"):  # the chunk lands, its checksum never does
                    self.kernel[:, t.r0:t.r1, t.c0:t.c1] = np.zeros_like(values)
                os.kill(os.getpid(), signal.SIGKILL)
            write(self, t, values)
            written[0] += 1
        TileStore.write = killing_write
    for run in spec.get("runs", [spec]):  # several kernels in one process share compilations
        devices = jax.local_devices()[: run["use"]] if run.get("use") else None
        with jax.enable_x64(not run.get("float32")):
            k = ntkcalc.ntk(net, x, outputs=spec["outputs"], memory=spec.get("memory"),
                            store=run.get("store"), progress=False, devices=devices)
        if run.get("out"):
            np.save(run["out"], np.asarray(k))
            info = getattr(k, "info", None)
            with open(run["out"] + ".json", "w") as f:
                json.dump(None if info is None else info.__dict__, f)
""")


def run_child(spec: dict, *, timeout: float = 240, wait: bool = True):
    """Start the child on ``spec``; wait (bounded) and return the CompletedProcess, or Popen."""
    args = [sys.executable, "-c", CHILD, json.dumps({"tests": TESTS, "seed": 0, **spec})]
    env = {k: v for k, v in os.environ.items() if k != "XLA_FLAGS"}
    if not wait:
        return subprocess.Popen(args, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT)
    return subprocess.run(args, env=env, capture_output=True, text=True, timeout=timeout)


def mlp(n: int = N, seed: int = 0):
    case = next(c for c in ZOO if c.name == "mlp")
    return case.make(), case.x(np.random.default_rng(seed), n)


@pytest.fixture(scope="module")
def model():
    net, x = mlp()
    return net, x, reference_full(net, x)


@pytest.mark.parametrize("memory", ["2GB", "200KB", SMALL, "50KB"])
def test_store_equals_in_memory_and_reference(model, tmp_path, memory):
    # References: the in-memory single-device kernel (its tiles may be smaller: the result is
    # reserved in the budget) and dense jax.jacrev (helpers.reference_full), 1e-12 relative.
    net, x, ref = model
    view = ntkcalc.ntk(net, x, outputs="full", store=tmp_path / "k.zarr", memory=memory,
                       progress=False)
    mem = ntkcalc.ntk(net, x, outputs="full", memory=memory, progress=False)
    assert view.shape == mem.shape and view.dtype == mem.dtype
    assert_close(np.asarray(view), mem, rtol=1e-12)
    assert_close(np.asarray(view), ref, rtol=1e-12)
    np.testing.assert_array_equal(view[3:9, 2], np.asarray(view)[3:9, 2])
    assert view.info.computed == view.info.tiles


def test_store_equals_in_memory_float32(model, tmp_path):
    # Reference: the float32 in-memory kernel, 1e-6 relative (tiles may differ: see above).
    import jax

    net, x, _ = model
    with jax.enable_x64(False):
        view = ntkcalc.ntk(net, x, outputs="full", store=tmp_path / "k.zarr", memory="50KB",
                           progress=False)
        mem = ntkcalc.ntk(net, x, outputs="full", memory="50KB", progress=False)
    assert view.dtype == mem.dtype == np.float32
    assert_close(np.asarray(view), mem, rtol=1e-6)


def test_four_tile_sizes_reached():
    # The memory values above really give four different tile sizes (else the test is weaker).
    net, x = mlp()
    blocks = {ntkcalc.plan(net, x, outputs="full", memory=m).block
              for m in ["2GB", "200KB", SMALL, "50KB"]}
    assert len(blocks) == 4, blocks


def test_asymmetric_and_by_layer(model, tmp_path):
    # Reference: helpers.reference_full for K(x1, x2); the per-group kernels sum to the total.
    net, x, _ = model
    x2 = mlp(9, seed=1)[1]
    ref = reduce_mode(reference_full(net, x, x2), "diagonal")
    view = ntkcalc.ntk(net, x, x2, outputs="diagonal", store=tmp_path / "a.zarr", memory="60KB",
                       progress=False)
    assert_close(np.asarray(view), ref, rtol=1e-12)
    layers = ntkcalc.ntk_by_layer(net, x, x2, outputs="diagonal", store=tmp_path / "b.zarr",
                                  memory="60KB", progress=False)
    assert_close(sum(np.asarray(v) for v in layers.values()), ref, rtol=1e-12)


def _uninterrupted(net, x, path):
    return np.asarray(ntkcalc.ntk(net, x, outputs="full", store=path, memory=SMALL,
                                  progress=False))


@pytest.mark.multiprocess
@pytest.mark.parametrize("half", [False, True], ids=["between-tiles", "mid-tile"])
def test_sigkill_then_resume_is_bit_identical(model, tmp_path, half):
    # Reference: an uninterrupted store run with the same arguments (bit-identical), and the
    # count of tiles the rerun computes (only those the killed run did not finish).
    net, x, _ = model
    store = tmp_path / "k.zarr"
    done = 2
    proc = run_child({"n": N, "outputs": "full", "memory": SMALL, "store": str(store),
                      "kill_after": done, "half": half})
    assert proc.returncode == -9, proc.stdout + proc.stderr
    view = ntkcalc.ntk(net, x, outputs="full", store=store, memory=SMALL, progress=False)
    assert view.info.reused == done
    assert view.info.computed == view.info.tiles - done == 4
    assert view.info.repaired == 0  # a half-written tile has no checksum: it is simply missing
    np.testing.assert_array_equal(np.asarray(view), _uninterrupted(net, x, tmp_path / "u.zarr"))


def test_corrupted_or_lost_chunk_is_recomputed(model, tmp_path):
    # Reference: the kernel before damage (bit-identical after repair); counts of repaired tiles.
    net, x, _ = model
    store = tmp_path / "k.zarr"
    want = _uninterrupted(net, x, store)
    chunks = sorted(os.path.join(r, f) for r, _, fs in os.walk(store / "kernel" / "c")
                    for f in fs)
    with open(chunks[0], "r+b") as f:  # garble the first tile's bytes in place
        f.seek(16)
        f.write(b"\x7f" * 64)
    with open(chunks[-1], "r+b") as f:  # truncate another
        f.truncate(10)
    view = ntkcalc.ntk(net, x, outputs="full", store=store, memory=SMALL, progress=False)
    assert view.info.repaired == view.info.computed == 2
    np.testing.assert_array_equal(np.asarray(view), want)


@pytest.mark.parametrize(
    "change",
    ["params", "inputs", "method", "outputs", "filter"],
)
def test_mismatched_resume_is_refused(model, tmp_path, change):
    # Common practice: a resumable file records what defines its contents and refuses others.
    net, x, _ = model
    store = tmp_path / "k.zarr"
    ntkcalc.ntk(net, x, outputs="full", store=store, memory=SMALL, method="jacobian",
                progress=False)
    kw = dict(outputs="full", store=store, memory=SMALL, method="jacobian", progress=False)
    if change == "params":
        import jax

        net = net.replace(params=jax.tree_util.tree_map(lambda p: p * 1.01, net.params))
    elif change == "inputs":
        x = x.copy()
        x[0, 0] += 1e-9
    elif change == "method":
        kw["method"] = "jvp"
    elif change == "outputs":
        kw["outputs"] = "trace"
    else:
        kw["params"] = "Dense_0"
    field = {"filter": "parameters"}.get(change, change)
    with pytest.raises(ValueError, match=f"holds a different kernel: .*{field}"):
        ntkcalc.ntk(net, x, **kw)


def test_resume_with_larger_budget_keeps_stored_tiles(model, tmp_path):
    # The store's tile size wins when it fits: a default-memory rerun reuses every tile.
    net, x, _ = model
    store = tmp_path / "k.zarr"
    first = _uninterrupted(net, x, store)
    view = ntkcalc.ntk(net, x, outputs="full", store=store, progress=False)
    assert view.info.computed == 0 and view.info.reused == view.info.tiles
    np.testing.assert_array_equal(np.asarray(view), first)
    with pytest.raises(MemoryError, match="was written in tiles of"):
        ntkcalc.ntk(net, x, outputs="full", store=store, memory="50KB", progress=False)


def test_unwritable_store_fails_before_compute(model, tmp_path, monkeypatch):
    # Common practice: fail fast on an unusable output location, before hours of compute.
    net, x, _ = model
    blocker = tmp_path / "file"
    blocker.write_text("not a directory")

    def no_compute(*a, **k):
        raise AssertionError("planned or computed before checking the store")

    monkeypatch.setattr(drive, "plan_request", no_compute)
    with pytest.raises(PermissionError, match="is not writable .* choose a directory"):
        ntkcalc.ntk(net, x, store=blocker / "k.zarr", progress=False)


def test_argument_errors(model):
    net, x, _ = model
    with pytest.raises(ValueError, match="`store`=3 is not a store location"):
        ntkcalc.ntk(net, x, store=3)
    with pytest.raises(ValueError, match="`progress`='yes' must be True or False"):
        ntkcalc.ntk(net, x, progress="yes")


def test_log_lines_say_where_and_how_much(model, tmp_path, caplog):
    net, x, _ = model
    store = tmp_path / "k.zarr"
    with caplog.at_level("INFO", logger="ntkcalc"):
        ntkcalc.ntk(net, x, outputs="full", store=store, memory=SMALL, progress=False)
    text = caplog.text
    assert str(store) in text and "0 of 6 tiles done, 6 to compute" in text


def test_chunks_are_tiles(model, tmp_path):
    # The zarr chunk is one tile; the mirror of an upper tile is on disk too.
    net, x, _ = model
    view = ntkcalc.ntk(net, x, outputs="full", store=tmp_path / "k.zarr", memory=SMALL,
                       progress=False)
    b = view.info.block
    assert view.array.chunks == (1, b, b, 3, 3)
    ts = TileStore.open(tmp_path / "k.zarr", ntkcalc.plan(net, x, outputs="full", memory=SMALL))
    assert ts.count_done() == view.info.tiles
    full = np.asarray(view)
    blk = np.arange(N) // b
    off = blk[:, None] != blk[None, :]  # diagonal tiles are computed, symmetric to rounding only
    np.testing.assert_array_equal(full[off], np.transpose(full, (1, 0, 3, 2))[off])


def test_foreign_zarr_data_is_not_overwritten(model, tmp_path):
    import zarr

    net, x, _ = model
    zarr.open_group(tmp_path / "other.zarr", mode="a").create_array("a", shape=(2,), dtype="i4")
    with pytest.raises(ValueError, match="holds zarr data that ntkcalc did not write"):
        ntkcalc.ntk(net, x, store=tmp_path / "other.zarr", progress=False)


def test_interrupted_creation_resumes(model, tmp_path, monkeypatch):
    # A run stopped while creating the store (here: before its second array) leaves a store the
    # next run completes, instead of one it refuses as foreign.
    import zarr

    net, x, ref = model
    create = zarr.Group.create_array

    def stop_at_checksums(self, name, **kw):
        if name == "checksums":
            raise KeyboardInterrupt
        return create(self, name, **kw)

    monkeypatch.setattr(zarr.Group, "create_array", stop_at_checksums)
    with pytest.raises(KeyboardInterrupt):
        ntkcalc.ntk(net, x, outputs="full", store=tmp_path / "k.zarr", memory=SMALL,
                    progress=False)
    monkeypatch.setattr(zarr.Group, "create_array", create)
    view = ntkcalc.ntk(net, x, outputs="full", store=tmp_path / "k.zarr", memory=SMALL,
                       progress=False)
    assert view.info.computed == view.info.tiles
    assert_close(np.asarray(view), ref, rtol=1e-12)


@pytest.mark.parametrize("progress", [True, False])
def test_progress_bar_counts_tiles_to_compute(model, tmp_path, monkeypatch, progress):
    # The bar's total is what is left to compute, and it reaches it; progress=False disables it.
    net, x, _ = model
    bars = []

    def recording_bar(total, *, enabled, where):
        b = real_bar(total, enabled=enabled, where=where)
        bars.append((b, b.disable))
        return b

    real_bar = drive.bar
    monkeypatch.setattr(drive, "bar", recording_bar)
    store = tmp_path / "k.zarr"
    for _ in range(2):
        ntkcalc.ntk(net, x, outputs="full", store=store, memory=SMALL, progress=progress)
    assert [b.total for b, _ in bars] == [6, 0]
    assert all(disabled is (not progress) for _, disabled in bars)
    if progress:  # a disabled bar does not count
        assert [b.n for b, _ in bars] == [6, 0]


# -- concurrent processes, damaged metadata, a full disk (issue 12) ----------------------------


def test_independent_runs_on_one_store_neither_corrupt_nor_duplicate(model, tmp_path,
                                                                     monkeypatch):
    # Two runs without jax.distributed: B (parameters 2θ) checks the empty store, then stalls
    # before writing its fingerprint while A (θ) runs; then B goes on. Before the store lock, A
    # filled the store, B overwrote the fingerprint with 2θ's and reused every tile of θ's kernel
    # as its own. Now B holds the store until it is done and A is refused. Reference: each
    # kernel computed in memory.
    import threading

    import jax
    from zarr.core.attributes import Attributes

    net, x, _ = model
    nets = {"A": net, "B": net.replace(params=jax.tree_util.tree_map(lambda p: 2 * p,
                                                                      net.params))}
    real = Attributes.__setitem__
    b_stalled, a_done = threading.Event(), threading.Event()

    def stalling_setitem(self, key, value):
        if key == "ntkcalc" and threading.current_thread().name == "B":
            b_stalled.set()
            a_done.wait(timeout=5)  # without a lock A finishes meanwhile
        real(self, key, value)

    monkeypatch.setattr(Attributes, "__setitem__", stalling_setitem)
    store = tmp_path / "k.zarr"
    results = {}

    def run(name):
        try:
            results[name] = np.asarray(ntkcalc.ntk(nets[name], x, outputs="full", store=store,
                                                   memory=SMALL, progress=False))
        except ValueError as e:
            results[name] = e
        finally:
            if name == "A":
                a_done.set()

    b = threading.Thread(target=run, args=("B",), name="B")
    b.start()
    assert b_stalled.wait(timeout=120)
    a = threading.Thread(target=run, args=("A",), name="A")
    a.start()
    a.join()
    b.join()
    assert isinstance(results["A"], ValueError), "A ran into a store B had claimed"
    assert "holds a different kernel" in str(results["A"])
    want = ntkcalc.ntk(nets["B"], x, outputs="full", memory=SMALL, progress=False)
    assert_close(results["B"], want, rtol=1e-12)
    again = ntkcalc.ntk(nets["B"], x, outputs="full", store=store, memory=SMALL, progress=False)
    assert again.info.reused == again.info.tiles
    np.testing.assert_array_equal(np.asarray(again), results["B"])


def test_same_run_twice_at_once_computes_each_tile_once(model, tmp_path):
    import threading

    net, x, _ = model
    store = tmp_path / "k.zarr"
    views = []
    threads = [threading.Thread(target=lambda: views.append(ntkcalc.ntk(
        net, x, outputs="full", store=store, memory=SMALL, progress=False))) for _ in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert sorted(v.info.computed for v in views) == [0, views[0].info.tiles]
    np.testing.assert_array_equal(np.asarray(views[0]), np.asarray(views[1]))


def _zarr_json(path):
    return path / "zarr.json"


def _edit_fingerprint(path, edit):
    meta = json.loads(_zarr_json(path).read_text())
    edit(meta["attributes"])
    _zarr_json(path).write_text(json.dumps(meta))


def _set_block(attrs):  # IndexError inside zarr before
    attrs["ntkcalc"]["fingerprint"]["block"] = 3


DAMAGE = {
    "group-json-garbled": lambda p: _zarr_json(p).write_text("{not json"),
    "group-json-lost": lambda p: _zarr_json(p).unlink(),
    "attribute-empty": lambda p: _edit_fingerprint(p, lambda a: a.update(ntkcalc={})),
    "attribute-lost": lambda p: _edit_fingerprint(p, lambda a: a.pop("ntkcalc")),
    "field-lost": lambda p: _edit_fingerprint(p, lambda a: a["ntkcalc"]["fingerprint"].clear()),
    "block-edited": lambda p: _edit_fingerprint(p, _set_block),
    "kernel-json-garbled": lambda p: _zarr_json(p / "kernel").write_text("]"),
    "checksums-json-garbled": lambda p: _zarr_json(p / "checksums").write_text('{"a": 1}'),
}


@pytest.mark.parametrize("damage", list(DAMAGE))
def test_damaged_metadata_is_recomputed(model, tmp_path, caplog, damage):
    # Before: JSONDecodeError, KeyError, IndexError inside zarr, or "data ntkcalc did not write".
    # Reference: the uninterrupted kernel (bit-identical after recomputation).
    net, x, _ = model
    store = tmp_path / "k.zarr"
    want = _uninterrupted(net, x, store)
    DAMAGE[damage](store)
    with caplog.at_level("WARNING", logger="ntkcalc"):
        view = ntkcalc.ntk(net, x, outputs="full", store=store, memory=SMALL, progress=False)
    assert "is damaged" in caplog.text and "recomputed from scratch" in caplog.text
    assert view.info.computed == view.info.tiles
    np.testing.assert_array_equal(np.asarray(view), want)


def test_truncated_checksum_chunk_costs_one_tile(model, tmp_path):
    # Before: every resume failed inside zarr decoding the 3-byte chunk.
    net, x, _ = model
    store = tmp_path / "k.zarr"
    want = _uninterrupted(net, x, store)
    chunk = store / "checksums" / "c" / "0" / "1"
    chunk.write_bytes(chunk.read_bytes()[:3])
    view = ntkcalc.ntk(net, x, outputs="full", store=store, memory=SMALL, progress=False)
    assert view.info.computed == 1
    np.testing.assert_array_equal(np.asarray(view), want)


def test_full_disk_is_reported_and_resumes(model, tmp_path, monkeypatch):
    # ENOSPC injected where zarr writes a file, after 2 tile chunks. Reference: the
    # uninterrupted kernel, bit-identical after the resume.
    import errno

    import zarr.storage._local as local

    from ntkcalc._tiles import store as store_module

    net, x, _ = model
    store = tmp_path / "k.zarr"
    want = _uninterrupted(net, x, tmp_path / "u.zarr")
    real_put = local._put
    written = [0]

    def full_put(path, value, exclusive=False):
        if "kernel" in str(path) and "/c/" in str(path):
            if written[0] >= 2:
                raise OSError(errno.ENOSPC, "No space left on device")
            written[0] += 1
        return real_put(path, value, exclusive=exclusive)

    monkeypatch.setattr(local, "_put", full_put)
    with pytest.raises(OSError, match=r"the disk is full .*needs about .* more.*run the same "
                                      r"call again: it resumes") as err:
        ntkcalc.ntk(net, x, outputs="full", store=store, memory=SMALL, progress=False)
    assert err.value.errno == errno.ENOSPC and str(store) in str(err.value)
    # A rerun while the disk is still full says so, not "not writable".
    real_open = open

    def full_open(path, *a, **k):
        if ".ntkcalc-write-test" in str(path):
            raise OSError(errno.ENOSPC, "No space left on device")
        return real_open(path, *a, **k)

    monkeypatch.setattr("builtins.open", full_open)
    with pytest.raises(OSError, match=r"the disk is full") as err:
        ntkcalc.ntk(net, x, outputs="full", store=store, memory=SMALL, progress=False)
    assert "not writable" not in str(err.value)
    monkeypatch.setattr("builtins.open", real_open)
    # Free space is checked against the missing tiles before computing.
    monkeypatch.setattr(store_module.shutil, "disk_usage",
                        lambda p: type("Usage", (), {"free": 500})())
    with pytest.raises(OSError, match=r"free now: 500 B\); it needs about"):
        ntkcalc.ntk(net, x, outputs="full", store=store, memory=SMALL, progress=False)
    monkeypatch.undo()
    view = ntkcalc.ntk(net, x, outputs="full", store=store, memory=SMALL, progress=False)
    assert view.info.reused >= 1 and view.info.computed < view.info.tiles
    np.testing.assert_array_equal(np.asarray(view), want)


def test_report_reads_a_by_layer_store_as_the_whole_kernel(model, tmp_path):
    # Before: the report took parameter group 0 for the whole kernel. Reference: in-memory ntk
    # (the groups of ntk_by_layer partition the parameters, so they sum to it).
    from ntkcalc._tiles.store import read_verified
    from ntkcalc._workflows.report import _load_store

    net, x, _ = model
    store = tmp_path / "k.zarr"
    ntkcalc.ntk_by_layer(net, x, store=store, memory=SMALL, progress=False)
    whole = ntkcalc.ntk(net, x, progress=False)
    assert_close(read_verified(store), whole, rtol=1e-12)
    assert_close(_load_store(str(store)), whole, rtol=1e-12)
    assert read_verified(tmp_path / "nothing.zarr") is None


def test_report_verifies_checksums(model, tmp_path):
    # Before: a corrupted tile (changed symmetrically) went into the report unverified.
    from ntkcalc._workflows.report import write_report

    net, x, _ = model
    store = tmp_path / "k.zarr"
    ntkcalc.ntk(net, x, store=store, memory="20KB", progress=False)
    import zarr

    kernel = zarr.open_group(store, mode="r+")["kernel"]
    kernel[0, 0, 1] = kernel[0, 1, 0] = 1e30
    with pytest.raises(ValueError, match=r"`source`=.* 1 of \d+ tiles are missing or fail their "
                                         r"checksum"):
        write_report(store, out=tmp_path / "report")


def test_filesystem_without_flock_runs_unlocked(model, tmp_path, monkeypatch, caplog):
    # Some network filesystems refuse flock (ENOLCK): the run goes on, and says so.
    import errno
    import fcntl

    net, x, _ = model

    def no_flock(fd, op):
        raise OSError(errno.ENOLCK, "No locks available")

    monkeypatch.setattr(fcntl, "flock", no_flock)
    with caplog.at_level("WARNING", logger="ntkcalc"):
        view = ntkcalc.ntk(net, x, outputs="full", store=tmp_path / "k.zarr", memory=SMALL,
                           progress=False)
    assert "cannot be locked" in caplog.text
    assert view.info.computed == view.info.tiles
