"""The report on a hand-made run directory: sections, embedded figures, numbers, cautions.

The run directory is written here (not by the demo), with a kernel whose spectrum is known, so the
report's own computations can be checked against numpy and the cautions provoked one at a time.
"""

import base64
import html
import json
import math
import pathlib
import re

import numpy as np
import pytest

from ntkcalc._workflows import report
from ntkcalc._workflows.report import SECTIONS, write_report

CLASSES = ["a", "b", "c"]


def _kernel(n, *, cond=10.0, seed=0):
    """A PSD kernel with eigenvalues geometric from 1 down to 1/cond (numpy QR basis)."""
    q, _ = np.linalg.qr(np.random.default_rng(seed).normal(size=(n, n)))
    w = np.geomspace(1.0, 1.0 / cond, n)
    return (q * w) @ q.T


def _results(n=30, steps=(0, 10, 100), ridges=7, **changes):
    record = list(range(0, 101, 10))
    loss = np.geomspace(1.0, 0.1, len(record)).tolist()
    gap = np.linspace(0.0, 0.02, len(record)).tolist()
    grid = np.logspace(-3, 1, ridges).tolist()
    curve = np.linspace(0.3, 0.2, ridges).tolist()
    rank = {"num_examples": n, "num_features": 9, "rank": 9, "full_rank": False,
            "sigma_max": 3.0, "sigma_min": 0.0, "tol": 1e-14, "margin": 0.0}
    out = {
        "kind": "demo", "dtype": "float64", "scale": "small", "cautions": [],
        "data": {"scenario": "test", "n_train": n, "n_test": 5, "features": ["u", "v"],
                 "units": ["m", "s"], "class_names": CLASSES, "train_counts": [10, 10, 10]},
        "model": {"architecture": "MLP 2→8→3", "parameters": 51, "width": 8, "depth": 1},
        "training": {"loss": "L = (1/N) Σ ½‖f − y‖², O/2 times the MSE", "optimizer": "sgd", "lr": 0.5, "max_stable_lr": 1.0,
                     "steps": 100, "checkpoint_steps": list(steps), "parameter_change": 0.01},
        "laziness": {"lazy": True, "sentence": "lazy: the numbers", "relative_change": 0.03,
                     "distance": 0.02, "forecast_gap": 0.02, "failed": [], "first_step": None,
                     "spread": {"relative_change": 0.04, "distance": 0.01, "count": 3},
                     "kernel_threshold": 0.05, "gap_threshold": 0.1, "beyond_spread": False},
        "forecast": {"steps": record, "train_gap": gap, "test_gap": gap, "tolerance": 0.1,
                     "largest_train_gap": 0.02, "largest_test_gap": 0.02,
                     **{f"{a}_{b}_{c}": loss for a in ("observed", "forecast")
                        for b in ("train", "test") for c in ("mse", "accuracy")}},
        "drift": {"steps": list(steps), "kernel_distance": [0.0, 0.01, 0.02],
                  "relative_change": [0.0, 0.02, 0.03], "alignment": [0.3, 0.31, 0.33],
                  "threshold": 0.05,
                  "init_spread": {"relative_change": 0.04, "distance": 0.01, "count": 3}},
        "risk": {"ridges": grid, "gcv": curve, "kare": curve, "loo": curve, "heldout": curve,
                 "heldout_accuracy": [0.8] * ridges, "best": {"gcv": grid[3], "kare": grid[3],
                                                             "loo": grid[3]},
                 "chosen_ridge": grid[3], "chosen_by": "gcv", "estimators_agree": True,
                 "loo_over_gcv": 1.0, "loo_at_chosen": curve[3], "gcv_at_chosen": curve[3],
                 "heldout_at_chosen": curve[3], "heldout_accuracy_at_chosen": 0.8,
                 "final_kernel_heldout": 0.2, "final_kernel_heldout_accuracy": 0.85},
        "feature_rank": {"layer": "hidden_0", "width": 8,
                         "checkpoints": {"initialization": rank, "step 100": rank}},
    }
    for key, value in changes.items():
        section, _, field = key.partition("__")
        if field:
            out[section][field] = value
        else:
            out[section] = value
    return out


def _write_run(path, results, *, cond=10.0):
    n = results["data"]["n_train"]
    path.mkdir(parents=True, exist_ok=True)
    (path / report.RESULTS).write_text(json.dumps(results))
    k = _kernel(n, cond=cond)
    np.savez(path / report.ARRAYS, k_init=k, k_final=k + 0.01 * _kernel(n, seed=1),
             labels=np.repeat(np.arange(3), n // 3))
    return path


def _text(path) -> str:
    return pathlib.Path(path).read_text(encoding="utf-8")


def numbers_in(tree):
    """Every number in a JSON tree (booleans left out)."""
    if isinstance(tree, dict):
        for v in tree.values():
            yield from numbers_in(v)
    elif isinstance(tree, list):
        for v in tree:
            yield from numbers_in(v)
    elif isinstance(tree, int | float) and not isinstance(tree, bool):
        yield tree


def test_every_section_with_an_embedded_figure_or_table(tmp_path):
    run = _write_run(tmp_path / "run", _results())
    html_path, json_path = write_report(run)
    page = _text(html_path)
    ids = re.findall(r'<section id="([^"]+)">', page)
    assert tuple(ids) == SECTIONS
    images = re.findall(r'src="data:image/png;base64,([^"]+)"', page)
    assert len(images) == 5  # spectrum, heat map, drift, forecast, risk
    for data in images:
        assert base64.b64decode(data)[:8] == b"\x89PNG\r\n\x1a\n"
    assert "http" not in page.replace("http-equiv", "")  # self-contained: nothing fetched
    doc = json.loads(_text(json_path))
    assert set(doc["sections"]) == set(SECTIONS) - {"summary", "cautions"}
    assert len(doc["summary"]) == 5
    assert all(math.isfinite(v) for v in numbers_in(doc))
    for line in doc["summary"]:
        assert html.escape(line) in page


def test_spectrum_numbers_match_numpy(tmp_path):
    """Eigenvalues against numpy.linalg.eigvalsh; the power-law line through its own fit range."""
    run = _write_run(tmp_path / "run", _results(), cond=1e3)
    _, json_path = write_report(run, out=tmp_path / "elsewhere")
    assert json_path.startswith(str(tmp_path / "elsewhere"))
    spec = json.loads(_text(json_path))["sections"]["spectrum"]
    k = np.load(run / report.ARRAYS)["k_init"]
    np.testing.assert_allclose(spec["eigenvalues"], np.linalg.eigvalsh(k)[::-1], rtol=1e-10)
    np.testing.assert_allclose(spec["condition_number"], 1e3, rtol=1e-8)
    first, last = spec["decay_fit_range"]
    ranks = np.arange(first, last + 1)
    logs = np.log(np.asarray(spec["eigenvalues"])[first - 1:last])
    slope, intercept = np.polyfit(np.log(ranks), logs, 1)  # least squares, both free
    np.testing.assert_allclose([-slope, intercept],
                               [spec["decay_exponent"], spec["decay_intercept"]], rtol=1e-8)


def test_block_means_by_class(tmp_path):
    run = _write_run(tmp_path / "run", _results())
    doc = json.loads(_text(write_report(run)[1]))
    k = np.load(run / report.ARRAYS)["k_init"]
    means = np.asarray(doc["sections"]["heatmap"]["block_means"]["initialization"])
    assert means[0, 2] == pytest.approx(k[:10, 20:].mean(), rel=1e-12)
    assert means[1, 1] == pytest.approx(k[10:20, 10:20].mean(), rel=1e-12)


@pytest.mark.parametrize(
    ("changes", "cond", "phrase"),
    [
        ({"laziness__lazy": False, "laziness__sentence": "not lazy: 40%"}, 10.0, "Not lazy"),
        ({}, 1e14, "ill-conditioned"),
        ({"dtype": "float32"}, 10.0, "float32"),
        ({"cautions": ["Something the analysis warned about."]}, 10.0, "analysis warned"),
    ],
)
def test_cautions(tmp_path, changes, cond, phrase):
    run = _write_run(tmp_path / "run", _results(**changes), cond=cond)
    html_path, json_path = write_report(run)
    doc = json.loads(_text(json_path))
    assert any(phrase in c for c in doc["cautions"]), doc["cautions"]
    assert f"cautions: {len(doc['cautions'])}" in doc["summary"][-1]
    assert phrase in _text(html_path)


def test_no_cautions_says_so(tmp_path):
    doc = json.loads(_text(write_report(_write_run(tmp_path / "run", _results()))[1]))
    assert doc["cautions"] == []
    assert doc["summary"][-1].endswith("cautions: none.")


def test_infinite_numbers_become_null(tmp_path):
    """A singular kernel has condition number inf: JSON gets null, never Infinity."""
    run = _write_run(tmp_path / "run", _results())
    k = np.load(run / report.ARRAYS)
    v = np.ones((30, 1)) / np.sqrt(30)
    np.savez(run / report.ARRAYS, k_init=v @ v.T, k_final=k["k_final"], labels=k["labels"])
    html_path, json_path = write_report(run)
    text = _text(json_path)
    assert "Infinity" not in text and "NaN" not in text
    assert json.loads(text)["sections"]["spectrum"]["condition_number"] is None
    assert "ill-conditioned" in _text(html_path)


def test_bad_sources(tmp_path):
    with pytest.raises(TypeError, match="`source`"):
        write_report(3)
    with pytest.raises(FileNotFoundError, match="results.json"):
        write_report(tmp_path)
    (tmp_path / report.RESULTS).write_text(json.dumps({"kind": "other"}))
    with pytest.raises(ValueError, match="kind 'other'"):
        write_report(tmp_path)
    run = _write_run(tmp_path / "run", _results())
    with pytest.raises(TypeError, match="`out`"):
        write_report(run, out=5)


def test_kernel_store_gets_spectrum_and_heatmap(tmp_path):
    """A store written by ntk(..., store=...) of a tiny MLP: the spectrum against numpy."""
    import jax
    import jax.numpy as jnp

    import ntkcalc

    w = jax.random.normal(jax.random.key(0), (3, 16), jnp.float64)
    v = jax.random.normal(jax.random.key(1), (16, 2), jnp.float64)
    net = ntkcalc.Net(lambda p, x: jnp.tanh(x @ p["w"]) @ p["v"], {"w": w, "v": v})
    x = np.random.default_rng(0).normal(size=(12, 3))
    store = tmp_path / "kernel.zarr"
    k = np.asarray(ntkcalc.ntk(net, x, store=str(store), progress=False))
    html_path, json_path = write_report(store, out=tmp_path / "report")
    page = _text(html_path)
    assert re.findall(r'<section id="([^"]+)">', page) == ["summary", "cautions", "spectrum",
                                                           "heatmap"]
    doc = json.loads(_text(json_path))
    np.testing.assert_allclose(doc["sections"]["spectrum"]["eigenvalues"],
                               np.linalg.eigvalsh(k)[::-1], rtol=1e-10, atol=1e-12)
    assert all(math.isfinite(v) for v in numbers_in(doc))
    assert ("ill-conditioned" in " ".join(doc["cautions"])) == (np.linalg.cond(k) > 1e12)


def _shown_numbers(text: str):
    """Decimal numbers and percentages as shown (value, unit of the last digit)."""
    for m in re.finditer(r"(?<![\w.])(-?\d+\.\d+)(e[-+]?\d+)?(%?)", text):
        digits, exp, pct = m.groups()
        step = 10.0 ** -len(digits.split(".")[1]) * (10.0 ** int(exp[1:]) if exp else 1.0)
        value = float(digits + (exp or ""))
        yield (value / 100, step / 100) if pct else (value, step)


def test_one_verdict_and_every_shown_number_in_json(tmp_path):
    # A run that is not lazy: the verdict sentence is the same in the summary, the cautions, the
    # drift and forecast sections; every decimal number the page shows is in report.json (up to
    # the rounding it is shown with); every error label names the one convention (MSE).
    sentence = "not lazy (from step 10): kernel relative change up to 6.71% (threshold 5%)"
    results = _results(laziness__lazy=False, laziness__sentence=sentence,
                       laziness__relative_change=0.0671, laziness__failed=["relative_change"],
                       drift__relative_change=[0.0, 0.0671, 0.05])
    html_path, json_path = write_report(_write_run(tmp_path / "run", results))
    doc = json.loads(_text(json_path))
    assert doc["verdict"]["sentence"] == sentence and doc["verdict"]["lazy"] is False
    assert sentence in doc["summary"][1]
    assert sum(sentence in c for c in doc["cautions"]) == 1
    assert doc["sections"]["drift"]["verdict"] == sentence
    assert doc["sections"]["forecast"]["verdict"] == sentence
    page = _text(html_path)
    assert "the run is lazy" not in page  # the no-cautions text cannot contradict the verdict
    known = list(numbers_in(doc))
    cells = re.findall(r'<td class="num">([^<]*)</td>', page) + doc["summary"]
    for cell in cells:
        for value, step in _shown_numbers(html.unescape(cell)):
            assert any(abs(v - value) <= 0.51 * step + 1e-12 for v in known), (cell, value)
    rows = re.findall(r'<tr><th>([^<]*)</th><td class="num">([^<]*)</td></tr>', page)
    for label, value in rows:
        if "error" in label or "loss" in label:
            assert "MSE" in label or "MSE" in value, label
    assert page.count("MSE: mean over examples and outputs of (f − y)²") >= 3
