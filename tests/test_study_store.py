"""`analyse_run` on sketched features written to stores: an interrupted run resumes, and why the
sketch was chosen is saved as numbers and printed from them.

References: an uninterrupted run with the same arguments into other stores (bit-identical
numbers), the in-memory features path (its blocks differ, so equal to rounding), the counts of
blocks each rerun computes; for the choice, the exact kernel's size by its closed form
``T·N²·itemsize`` and the time estimate of `ntkcalc.plan` for the same kernel.
"""

from __future__ import annotations

import functools
import json

import jax
import numpy as np
import pytest
from helpers import ZOO, features_budget

import ntkcalc
from ntkcalc._sketch.store import FeatureStore

N, M, K = 10, 6, 16  # K: the jackknife's 8 groups need k >= 16
BLOCK = 3  # examples per block: 4 blocks of the training set, 2 of the test set


@functools.cache
def _case():
    case = next(c for c in ZOO if c.name == "mlp")
    net = case.make()
    rng = np.random.default_rng(0)
    x, xt = case.x(rng, N), case.x(rng, M)
    later = net.replace(params=jax.tree_util.tree_map(lambda p: 1.1 * p, net.params))
    y, yt = rng.normal(size=(N, 3)), rng.normal(size=(M, 3))
    return [(0, net), (5, later)], x, y, xt, yt, features_budget(net, x, k=K, examples=BLOCK)


def _analyse(store, **kw):
    pairs, x, y, xt, yt, memory = _case()
    return ntkcalc.analyse_run(pairs, x, y, x_test=xt, y_test=yt, features=K, memory=memory,
                               store=store, **kw)


def _numbers(result) -> dict:
    """Every number of the result but where the features are and how many blocks were
    reused."""
    d = result.to_dict()
    for key in ("store", "computed", "reused"):
        d["sketched"].pop(key)
    return d


class _Interrupted(Exception):
    pass


def test_interrupted_run_resumes_from_its_stores(tmp_path, monkeypatch):
    """Stop the run after 5 blocks (the first checkpoint's 4 and one of the second's), rerun:
    the 7 missing blocks are computed, the 5 finished ones reused, and every number equals an
    uninterrupted run's; a third call computes nothing."""
    written = [0]
    write = FeatureStore.write

    def stopping_write(self, i, r0, values):
        if written[0] == 5:
            raise _Interrupted
        write(self, i, r0, values)
        written[0] += 1

    monkeypatch.setattr(FeatureStore, "write", stopping_write)
    with pytest.raises(_Interrupted):
        _analyse(tmp_path / "run", kernel="sketch")
    monkeypatch.undo()
    resumed = _analyse(tmp_path / "run", kernel="sketch")
    sk = resumed.sketched
    assert sk.store == str(tmp_path / "run")
    assert (sk.computed, sk.reused) == (7, 5)  # train 2 × 4 blocks, test 2 × 2
    assert sorted(p.name for p in (tmp_path / "run").iterdir()) == [
        "step-0-test.zarr", "step-0-train.zarr", "step-5-test.zarr", "step-5-train.zarr"]
    whole = _analyse(tmp_path / "other", kernel="sketch")
    assert (whole.sketched.computed, whole.sketched.reused) == (12, 0)
    assert _numbers(resumed) == _numbers(whole)
    again = _analyse(tmp_path / "run", kernel="sketch")
    assert (again.sketched.computed, again.sketched.reused) == (0, 12)
    assert _numbers(again) == _numbers(whole)
    # the in-memory features (one block of N): the same answers to rounding
    mem = _analyse(None, kernel="sketch").sketched
    for a, b in zip(mem.alignment, sk.alignment, strict=True):
        assert a.value == pytest.approx(b.value, rel=1e-9)
    assert mem.distance[1].value == pytest.approx(sk.distance[1].value, rel=1e-9)
    for a, b in zip(mem.checkpoints, sk.checkpoints, strict=True):
        np.testing.assert_allclose(a.eigenvalues.value, b.eigenvalues.value, rtol=1e-9)
        assert a.fit.test_mse.value == pytest.approx(b.fit.test_mse.value, rel=1e-9)


def test_store_with_the_exact_kernel_is_refused(tmp_path):
    with pytest.raises(ValueError, match="`store` holds sketched features"):
        _analyse(tmp_path / "run", kernel="exact")
    with pytest.raises(TypeError, match="`store` must be a directory path"):
        _analyse(3, kernel="sketch")


def test_why_the_sketch_is_saved_as_numbers_and_printed_from_them(tmp_path):
    """kernel="auto" above the time limit: the choice's numbers are fields, in report.json and
    read back whole; the summary, setup and caution print `KernelChoice.reason`, written from
    them. Each number against an outside computation: the T kernels' bytes by ``T·N²·8``
    (float64), one kernel's time by `ntkcalc.plan`, the count of kernels by the documented rule
    ``T + 2 + A`` (no forecasts) plus ``A·M/N`` test-train kernels."""
    result = _analyse(tmp_path / "features", exact_seconds=1e-6)
    c = result.choice
    assert (c.path, c.requested, c.rule) == ("sketch", "auto", "time")
    pairs, x, _, _, _, memory = _case()
    t, a = len(pairs), 2  # forecast_from: the first and the last checkpoint
    assert c.memory == memory and c.held_bytes == t * N * N * 8
    exact = ntkcalc.plan(pairs[0][1], x, outputs="trace", memory=memory)
    assert c.kernel_seconds == pytest.approx(exact.seconds, rel=1e-12)
    assert c.kernels == pytest.approx(t + 2 + a + a * M / N)
    assert c.exact_seconds == pytest.approx(c.kernels * exact.seconds, rel=1e-12)
    assert c.limit == 1e-6 and c.features_seconds > 0
    assert f"{c.exact_seconds:.3g} s" in c.reason and "above exact_seconds=1e-06" in c.reason
    assert result.kinds["kernel"] == f"sketch: {c.reason}"
    assert result.cautions[0].startswith(f"Sketched features (k = {K}) instead of exact "
                                         f"kernels: {c.reason}.")

    result.write(tmp_path / "report")
    back = ntkcalc.RunAnalysis.read(tmp_path / "report")
    assert back.choice == c and back.sketched.store == str(tmp_path / "features")
    with open(tmp_path / "report" / "report.json", encoding="utf-8") as fh:
        report = json.load(fh)
    saved = report["sections"]["sketch"]["choice"]
    assert saved == report["sections"]["setup"]["kernel_choice"]
    assert {k: saved[k] for k in ("held_bytes", "kernels", "kernel_seconds", "exact_seconds",
                                  "limit", "features_seconds", "memory")} == {
        "held_bytes": c.held_bytes, "kernels": c.kernels, "kernel_seconds": c.kernel_seconds,
        "exact_seconds": c.exact_seconds, "limit": c.limit,
        "features_seconds": c.features_seconds, "memory": c.memory}
    assert saved["reason"] == c.reason
    assert any(c.reason in line for line in report["summary"])
    assert report["sections"]["sketch"]["computed"] == 12
