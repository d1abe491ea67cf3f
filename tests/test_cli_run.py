"""The command line over your own training run, end to end: a small flax MLP trained on
scikit-learn's digits with optax, orbax checkpoints, then ``ntkcalc run``, ``ntkcalc drift``,
``ntkcalc kernel`` and ``ntkcalc report`` in-process through `main`.

The numbers they write are checked against independent computation:

- kernels recomputed with `ntkcalc.ntk` on Nets built by hand from the parameters kept in memory
  during training (not read back from disk), the last one also against the dense ``jax.jacrev``
  reference (tests/helpers.py);
- alignment by its formula, centered kernel-target alignment ``⟨HKH, HYYᵀH⟩_F / (‖HKH‖_F
  ‖HYYᵀH‖_F)`` (Cortes, Mohri & Rostamizadeh, "Algorithms for learning kernels based on centered
  alignment", JMLR 13, 2012), evaluated in numpy;
- drift distance ``1 − ⟨K_t, K_0⟩_F / (‖K_t‖_F ‖K_0‖_F)`` and relative change
  ``‖K_t − K_0‖_F / ‖K_0‖_F`` by their definitions (Fort et al., NeurIPS 2020, arXiv:2010.15110).
"""

from __future__ import annotations

import functools
import json
import os

import flax.linen as nn
import jax
import jax.numpy as jnp
import numpy as np
import pytest
from helpers import assert_close, f64, reduce_mode, reference_full, save_steps
from sklearn.datasets import load_digits
from test_study import LR, _mse_loss, _sgd

import ntkcalc
from ntkcalc._workflows.cli import main

N_TRAIN, N_TEST, WIDTH, STEPS = 60, 40, 16, 20
SAVED = (0, 10, 20)

MODELS = f'''
import flax.linen as nn

class Mlp(nn.Module):
    @nn.compact
    def __call__(self, x):
        return nn.Dense(10, name="readout")(nn.tanh(nn.Dense({WIDTH}, name="hidden")(x)))
'''


class _Mlp(nn.Module):  # the same model as the factory file's
    @nn.compact
    def __call__(self, x):
        return nn.Dense(10, name="readout")(nn.tanh(nn.Dense(WIDTH, name="hidden")(x)))


@functools.cache
def _trained(tmp: str):
    """Train on digits with optax SGD (full batch, MSE), save orbax checkpoints and the data."""
    digits = load_digits()
    x, xt = np.split(digits.data[:N_TRAIN + N_TEST] / 16.0, [N_TRAIN])
    labels, labels_t = np.split(digits.target[:N_TRAIN + N_TEST], [N_TRAIN])
    y = np.eye(10)[labels]
    model = _Mlp()
    variables = f64(model.init(jax.random.key(0), jnp.asarray(x[:1])))
    # full-batch optax SGD at test_study's LR, the parameters kept at every step
    kept = _sgd(lambda p: _mse_loss(model.apply({"params": p}, x), y), variables["params"], STEPS)
    save_steps(f"{tmp}/ckpt", {s: kept[s] for s in SAVED})
    with open(f"{tmp}/cli_digits_models.py", "w", encoding="utf-8") as fh:
        fh.write(MODELS)
    np.savez(f"{tmp}/digits.npz", x=x, y=labels, x_test=xt, y_test=labels_t)
    net = ntkcalc.Net.from_linen(model, variables)
    hand = {s: net.replace(params=kept[s]) for s in SAVED}
    kernels = {s: np.asarray(ntkcalc.ntk(n, x, progress=False)) for s, n in hand.items()}
    return hand, kernels, {"x": x, "y": y, "labels": labels}


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    tmp = str(tmp_path_factory.mktemp("cli_run"))
    return tmp, *_trained(tmp)


@pytest.fixture
def cli(run, monkeypatch, capsys):
    """``main`` with the factory module importable; returns (status, stdout, stderr)."""
    monkeypatch.syspath_prepend(run[0])

    def call(*argv):
        status = main([str(a) for a in argv])
        out, err = capsys.readouterr()
        return status, out, err

    return call


def _check_table(table: dict, kernels: dict, y: np.ndarray) -> None:
    """The drift table's distance, relative change and alignment by their formulas."""
    h = np.eye(N_TRAIN) - 1.0 / N_TRAIN  # centering H = I − 11ᵀ/n
    target = h @ y @ y.T @ h
    k0 = kernels[0]
    for i, s in enumerate(SAVED):
        k = kernels[s]
        kc = h @ k @ h
        want = np.sum(kc * target) / (np.linalg.norm(kc) * np.linalg.norm(target))
        assert table["alignment"][i] == pytest.approx(want, rel=1e-9)
        cos = np.sum(k * k0) / (np.linalg.norm(k) * np.linalg.norm(k0))
        assert table["distance_to_initial"][i] == pytest.approx(1 - cos, abs=1e-12)
        assert table["relative_change"][i] == pytest.approx(
            np.linalg.norm(k - k0) / np.linalg.norm(k0), rel=1e-9, abs=1e-14)
    assert table["relative_change"][-1] > 0  # training moved the kernel


def test_run_writes_the_report_with_independently_checked_numbers(run, cli):
    tmp, _, kernels, data = run
    out = f"{tmp}/analysis"
    status, stdout, err = cli("run", f"{tmp}/ckpt", "--model", "cli_digits_models:Mlp",
                              "--data", f"{tmp}/digits.npz", "--x-test", "x_test", "--y-test",
                              "y_test", "--lr", LR, "--full-batch-gd", "--out", out, "--quiet")
    assert status == 0, err
    with open(f"{out}/result.json", encoding="utf-8") as fh:
        result = json.load(fh)
    assert result["steps"] == list(SAVED) and result["num_test"] == N_TEST
    _check_table(result["drift"]["table"], kernels, data["y"])
    assert stdout.splitlines()[0] == result["verdict"]
    assert os.path.isfile(f"{out}/report.html") and f"{out}/report.html" in stdout
    with open(f"{out}/report.html", encoding="utf-8") as fh:
        page = fh.read()
    # the report says which checkpoints, model and data it came from
    assert os.path.abspath(f"{tmp}/ckpt") in page and "cli_digits_models:Mlp" in page
    assert "digits.npz" in page
    # `ntkcalc report` on the run directory renders the same report from the saved result
    status, stdout, err = cli("report", out)
    assert status == 0, err
    with open(f"{out}-report/report.json", encoding="utf-8") as fh, \
            open(f"{out}/report.json", encoding="utf-8") as first:
        assert json.load(fh) == json.load(first)


def test_drift_writes_table_figure_and_verdict(run, cli):
    tmp, _, kernels, data = run
    status, stdout, err = cli("drift", f"{tmp}/ckpt", "--model", "cli_digits_models:Mlp",
                              "--data", f"{tmp}/digits.npz", "--quiet")
    assert status == 0, err
    out = f"{tmp}/ckpt-drift"  # next to the checkpoint directory by default
    with open(f"{out}/drift.json", encoding="utf-8") as fh:
        drift = json.load(fh)
    _check_table(drift["table"], kernels, data["y"])
    assert stdout.splitlines()[0] == drift["verdict"]
    with open(f"{out}/drift.png", "rb") as fh:
        assert fh.read(8) == b"\x89PNG\r\n\x1a\n"


def test_kernel_store_records_provenance_and_loads_back(run, cli):
    tmp, hand, kernels, data = run
    store = f"{tmp}/k20.zarr"
    status, _, err = cli("kernel", f"{tmp}/ckpt", "--model", "cli_digits_models:Mlp", "--x",
                         f"{tmp}/digits.npz", "--key", "x", "--store", store, "--quiet")
    assert status == 0, err
    view = ntkcalc.open_kernel(store)
    assert view.kind == "trace" and view.shape == (N_TRAIN, N_TRAIN)
    assert view.num_outputs == 10  # digits' ten classes, recorded although the trace hides O
    assert view.source == {"checkpoint": os.path.abspath(f"{tmp}/ckpt"), "step": SAVED[-1],
                           "item": None, "subtree": None, "model": "cli_digits_models:Mlp"}
    # the latest checkpoint's kernel, against ntk on the Net built by hand and dense jacrev
    assert_close(np.asarray(view), kernels[SAVED[-1]], rtol=1e-10)
    assert_close(view[:7, 3:9], kernels[SAVED[-1]][:7, 3:9], rtol=1e-10)
    assert_close(kernels[SAVED[-1]],
                 reduce_mode(reference_full(hand[SAVED[-1]], data["x"]), "trace"), rtol=1e-10)

    before = sorted(os.listdir(store))
    status, stdout, err = cli("report", store)
    assert status == 0, err
    assert sorted(os.listdir(store)) == before  # nothing written inside the store
    assert os.path.isfile(f"{store}-report/report.html")
    assert f"step {SAVED[-1]}" in stdout and "cli_digits_models:Mlp" in stdout
    # the report itself names the checkpoint, step and model the kernel came from
    with open(f"{store}-report/report.html", encoding="utf-8") as fh:
        page = fh.read()
    with open(f"{store}-report/report.json", encoding="utf-8") as fh:
        assert json.load(fh)["kernel_source"] == view.source
    assert f"checkpoint {os.path.abspath(f'{tmp}/ckpt')} step {SAVED[-1]}" in page
    assert "model cli_digits_models:Mlp" in page
    status, _, err = cli("report", store, "--out", f"{store}/inside")
    assert status == 2 and "inside the store" in err and len(err.strip().splitlines()) == 1

    np.save(f"{tmp}/labels.npy", data["labels"])
    status, _, err = cli("report", store, "--labels", f"{tmp}/digits.npz:y", "--out",
                         f"{tmp}/labelled")
    assert status == 0, err
    with open(f"{tmp}/labelled/report.json", encoding="utf-8") as fh:
        heat = json.load(fh)["sections"]["heatmap"]
    # mean kernel entry of each pair of classes, by its definition, in numpy
    onehot = np.eye(10)[data["labels"]]
    counts = onehot.sum(axis=0)
    k = kernels[SAVED[-1]]
    assert heat["class_counts"] == np.bincount(data["labels"]).tolist()
    (means,) = heat["block_means"].values()
    assert_close(np.array(means), onehot.T @ k @ onehot / np.outer(counts, counts),
                 rtol=1e-10)


def test_loss_choices_are_analyse_runs():
    from typing import get_args

    from ntkcalc._workflows.cli import build_parser
    from ntkcalc._workflows.study import Loss

    for loss in get_args(Loss):
        args = build_parser().parse_args(["run", "c", "--model", "m:f", "--data", "d.npz",
                                          "--loss", loss])
        assert args.loss == loss


def test_version(capsys):
    assert main(["--version"]) == 0
    assert capsys.readouterr().out.strip() == f"ntkcalc {ntkcalc.__version__}"


def test_run_and_drift_argument_errors_are_one_line(run, cli):
    tmp = run[0]
    common = ["--model", "cli_digits_models:Mlp", "--data", f"{tmp}/digits.npz", "--quiet"]
    for argv, words in [
        (["run", f"{tmp}/nowhere", *common], "does not exist"),
        (["drift", f"{tmp}/ckpt", *common, "--y", "nope"], "--y"),
        (["run", f"{tmp}/ckpt", *common, "--x-test", "x_test"], "go together"),
        (["drift", f"{tmp}/ckpt", "--model", "cli_digits_models:Mlp", "--data",
          f"{tmp}/labels.npy"], ".npz"),
    ]:
        status, _, err = cli(*argv)
        assert status == 2 and words in err and len(err.strip().splitlines()) == 1, err


def test_a_checkpoint_of_another_model_is_one_line_with_status_1(run, cli):
    # test_study's MLP has 64 hidden units, the checkpoints 16: a runtime error, no traceback
    tmp = run[0]
    for command in ("run", "drift"):
        status, _, err = cli(command, f"{tmp}/ckpt", "--model", "test_study:_Mlp", "--data",
                             f"{tmp}/digits.npz", "--out", f"{tmp}/other", "--quiet")
        assert status == 1 and len(err.strip().splitlines()) == 1, err
        assert err.startswith("ntkcalc: error:") and "Traceback" not in err


def test_run_on_sketched_features_resumes_from_its_stores(run, cli):
    """``run --kernel sketch --store DIR``: the features go to stores (3 training, 2 test, one
    block each); the same command again reads every block instead of computing it and writes
    the same numbers. The sketched alignment at the last checkpoint against its formula on the
    exact kernel (Cortes, Mohri & Rostamizadeh, JMLR 13, 2012) within 4 jackknife errors (4σ,
    common practice)."""
    tmp, _, kernels, data = run
    args = ("run", f"{tmp}/ckpt", "--model", "cli_digits_models:Mlp", "--data",
            f"{tmp}/digits.npz", "--x-test", "x_test", "--y-test", "y_test", "--kernel",
            "sketch", "--features", 64, "--store", f"{tmp}/features", "--quiet")
    results = []
    for out in ("sketch", "sketch-again"):
        status, stdout, err = cli(*args, "--out", f"{tmp}/{out}")
        assert status == 0, err
        assert stdout.splitlines()[1] == "kernel: sketch: kernel='sketch'"
        with open(f"{tmp}/{out}/result.json", encoding="utf-8") as fh:
            results.append(json.load(fh)["sketched"])
    first, again = results
    assert first["store"] == os.path.abspath(f"{tmp}/features")
    assert (first["computed"], first["reused"]) == (5, 0)
    assert (again["computed"], again["reused"]) == (0, 5)
    assert first["alignment"] == again["alignment"] and first["distance"] == again["distance"]
    h = np.eye(N_TRAIN) - 1.0 / N_TRAIN
    kc, target = h @ kernels[20] @ h, h @ data["y"] @ data["y"].T @ h
    want = np.sum(kc * target) / (np.linalg.norm(kc) * np.linalg.norm(target))
    got = first["alignment"][-1]
    assert abs(got["value"] - got["bias"] - want) <= 4 * got["error"], (got, want)
