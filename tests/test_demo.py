"""The demo at its small scale, end to end, and the seeded data generator behind it.

The demo runs once per session (under a minute on two cores); the tests read what it wrote. Its
numbers about the invented data are demo outputs, not checked as facts; what is checked here is
that the demo is the workflow (`analyse_run` on its checkpoints, rendered by the report), that
it is consistent where the mathematics says it must be (the forecast starts from the observed
loss, the restored step-0 checkpoint's kernel equals the dense ``jax.jacrev`` reference of the
initial model, the GCV at the chosen ridge agrees with a scikit-learn refit) and that the report
is complete.
"""

import functools
import json
import math
import pathlib
import re

import jax
import numpy as np
import pytest
from helpers import assert_close, reduce_mode, reference_full
from test_report import numbers_in

import ntkcalc
from ntkcalc._workflows import demo as demo_module
from ntkcalc._workflows.data import CLASS_NAMES, pump_readings
from ntkcalc._workflows.demo import DemoResult, run_demo
from ntkcalc._workflows.report import SECTIONS
from ntkcalc._workflows.study import RunAnalysis


@functools.cache
def _demo(root: str) -> DemoResult:
    return run_demo(pathlib.Path(root) / "demo", scale="small", progress=False)


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> DemoResult:
    return _demo(str(tmp_path_factory.mktemp("small")))


def _json(path):
    return json.loads(pathlib.Path(path).read_text(encoding="utf-8"))


def test_report_has_every_section(demo):
    page = pathlib.Path(demo.report_html).read_text(encoding="utf-8")
    assert re.findall(r'<section id="([^"]+)">', page) == list(SECTIONS)
    assert len(re.findall(r"<h2>", page)) == len(SECTIONS)
    assert len(re.findall(r'src="data:image/png;base64,', page)) == 5
    doc = _json(demo.report_json)
    assert set(doc["sections"]) == {"spectrum", "heatmap", "drift", "groups", "forecast",
                                    "risk", "feature-rank", "setup"}
    assert doc["sections"]["heatmap"]["class_names"] == list(CLASS_NAMES)
    for key in ("eigenvalues", "decay_exponent", "condition_number"):
        assert key in doc["sections"]["spectrum"]
    for key in ("gcv", "kare", "loo", "heldout", "chosen_ridge", "heldout_at_chosen",
                "chosen_by", "loo_over_gcv"):
        assert key in doc["sections"]["risk"]
    for key in ("observed_train_mse", "forecast_train_mse", "observed_test_mse",
                "forecast_test_mse", "train_gap", "test_gap", "largest_train_gap"):
        assert key in doc["sections"]["forecast"]
    for key in ("kernel_distance", "relative_change", "alignment", "steps", "init_spread"):
        assert key in doc["sections"]["drift"]
    ranks = doc["sections"]["feature-rank"]["checkpoints"]
    assert all("margin" in r for r in ranks.values())
    assert all(math.isfinite(v) for v in numbers_in(doc))


def test_summary_is_five_lines_and_matches_the_result(demo):
    assert len(demo.summary) == 5 and all(isinstance(s, str) and s for s in demo.summary)
    assert all("\n" not in s for s in demo.summary)
    doc = _json(demo.report_json)
    assert list(demo.summary) == doc["summary"]
    assert list(demo.cautions) == doc["cautions"]
    risk = doc["sections"]["risk"]
    assert demo.gcv_ridge == risk["chosen_ridge"]
    assert demo.heldout_error == risk["heldout_at_chosen"]
    assert f"{demo.heldout_error:.4f}" in demo.summary[3]
    for field in ("lr", "forecast_gap", "train_loss", "test_loss", "kernel_distance",
                  "relative_change", "gcv_error", "heldout_accuracy", "seconds"):
        assert math.isfinite(getattr(demo, field)), field


def test_one_verdict_everywhere(demo):
    """The verdict is the laziness of the drift numbers and the forecast gap (ntkcalc.laziness),
    recomputed here from report.json; summary, cautions and sections say the same."""
    import ntkcalc

    doc = _json(demo.report_json)
    dr, fc = doc["sections"]["drift"], doc["sections"]["forecast"]
    spread = ntkcalc.InitSpread(**dr["init_spread"])
    again = ntkcalc.laziness(relative_change=dr["relative_change"],
                             distance=dr["kernel_distance"], steps=dr["steps"],
                             forecast_gap=fc["train_gap"], gap_steps=fc["steps"], spread=spread)
    assert again.sentence == demo.verdict == doc["verdict"]["sentence"]
    assert again.lazy == demo.lazy
    assert demo.verdict in demo.summary[1]
    assert dr["verdict"] == fc["verdict"] == demo.verdict
    assert any(demo.verdict in c for c in demo.cautions) == (not demo.lazy)
    assert spread.count == 3 and spread.relative_change > 0
    # the train gap at step 0 is 0: the linearized and the real network start as one function
    assert fc["train_gap"][0] < 1e-12 and fc["largest_train_gap"] == max(fc["train_gap"])


def test_the_demo_is_the_workflow(demo):
    """One pipeline: the demo's numbers are the RunAnalysis fields, result.json is its to_json."""
    a = demo.analysis
    assert isinstance(a, RunAnalysis) and a.verdict == demo.verdict and a.lazy == demo.lazy
    first = a.checkpoints[0]
    assert demo.gcv_ridge == first.ridge == first.risk.recommended
    assert demo.heldout_error == pytest.approx(first.test_mse_ridge, rel=1e-15)
    assert demo.forecast_gap == pytest.approx(float(np.max(first.gap)), rel=1e-15)
    assert demo.relative_change == pytest.approx(float(a.drift.relative_change[-1]), rel=1e-15)
    assert _json(pathlib.Path(demo.out_dir) / "result.json") == json.loads(a.to_json())
    # lr is half the stability limit 2N/λ_max: λ_max by Lanczos in the demo, by the forecast's
    # full eigendecomposition (scipy.linalg.eigh) of the same initial kernel here
    assert demo.lr == pytest.approx(first.forecast.max_stable_lr / 2, rel=1e-9)


def test_checkpoints_saved_and_restored(demo):
    """orbax steps on disk; the kernel of the restored step-0 checkpoint against the dense
    jax.jacrev reference (tests/helpers.py) of the initial model built again by hand."""
    doc = _json(demo.report_json)
    steps = doc["sections"]["drift"]["steps"]
    saved = sorted(int(p.name) for p in (pathlib.Path(demo.out_dir) / "checkpoints").iterdir())
    assert saved == steps and steps[0] == 0 and steps[-1] == demo.steps
    assert doc["sections"]["drift"]["kernel_distance"][0] == pytest.approx(0.0, abs=1e-12)
    cfg = demo_module._SETTINGS["small"]
    train, _ = pump_readings(cfg.n_train, cfg.n_test, seed=0)
    with jax.enable_x64(True):
        net = ntkcalc.Net.from_linen(*demo_module._model(cfg, train))
        want = reduce_mode(reference_full(net, train.x[:40]), "trace")
    assert_close(demo.analysis.drift.kernels[0][:40, :40], want, rtol=1e-10)


def test_forecast_starts_where_training_starts(demo):
    """At step 0 the linearized and the real network are the same function."""
    fc = _json(demo.report_json)["sections"]["forecast"]
    assert fc["steps"][0] == 0
    assert fc["forecast_train_mse"][0] == pytest.approx(fc["observed_train_mse"][0], rel=1e-12)
    assert fc["forecast_test_mse"][0] == pytest.approx(fc["observed_test_mse"][0], rel=1e-12)
    assert ("Not lazy" in " ".join(demo.cautions)) == (not demo.lazy)


def test_gcv_at_the_chosen_ridge_matches_a_scikit_learn_refit(demo):
    """GCV = (1/N)‖(I − H)y‖² / ((1/N) tr(I − H))² (Craven & Wahba 1979), with the residual of
    scikit-learn's KernelRidge refitted on the saved kernel and the trace from numpy's eigvalsh."""
    from sklearn.kernel_ridge import KernelRidge

    doc = _json(demo.report_json)
    k, labels = np.asarray(demo.analysis.drift.kernels[0]), demo.analysis.labels
    y = np.eye(len(CLASS_NAMES))[labels]
    r = doc["sections"]["risk"]["chosen_ridge"]
    fit = KernelRidge(alpha=r, kernel="precomputed").fit(k, y)
    resid = np.mean((fit.predict(k) - y) ** 2)
    w = np.linalg.eigvalsh(k)
    trace = np.mean(r / (w + r))  # (1/N) tr(I − H)
    gcv = doc["sections"]["risk"]["gcv_at_chosen"]
    assert gcv == pytest.approx(resid / trace**2, rel=1e-8)


def test_bad_arguments(tmp_path, demo):
    with pytest.raises(ValueError, match="`scale`"):
        run_demo(tmp_path / "x", scale="huge")
    with pytest.raises(TypeError, match="`progress`"):
        run_demo(tmp_path / "x", progress="yes")
    with pytest.raises(TypeError, match="`out_dir`"):
        run_demo(3)
    (tmp_path / "file").write_text("")
    with pytest.raises(ValueError, match="not a directory"):
        run_demo(tmp_path / "file")
    with pytest.raises(ValueError, match="earlier run"):
        run_demo(demo.out_dir, scale="small")


# -- the data generator ----------------------------------------------------------------------


def test_readings_are_seeded_and_standardized():
    a_train, a_test = pump_readings(200, 50, seed=3)
    b_train, _ = pump_readings(200, 50, seed=3)
    c_train, _ = pump_readings(200, 50, seed=4)
    np.testing.assert_array_equal(a_train.raw, b_train.raw)
    assert not np.allclose(a_train.raw, c_train.raw)
    assert a_train.x.shape == (200, 11) and a_test.x.shape == (50, 11)
    np.testing.assert_allclose(a_train.x.mean(axis=0), 0.0, atol=1e-12)
    np.testing.assert_allclose(a_train.x.std(axis=0), 1.0, rtol=1e-12)
    assert a_train.class_names == CLASS_NAMES
    assert set(np.unique(a_train.labels)) == set(range(len(CLASS_NAMES)))
    np.testing.assert_array_equal(a_train.one_hot.argmax(axis=1), a_train.labels)
    assert np.all(a_train.severity[a_train.labels == 0] == 0)
    assert np.all(a_train.raw[:, 3:8] > 0)  # amplitudes, logged for the model inputs
    assert "PumpReadings(200 examples × 11 features" in repr(a_train)


@pytest.mark.parametrize(
    ("args", "kwargs", "error", "match"),
    [
        ((4, 10), {}, ValueError, "`n_train`"),
        ((10, 0), {}, ValueError, "`n_test`"),
        ((10.5, 3), {}, ValueError, "`n_train`"),
        ((10, 3), {"seed": "a"}, TypeError, "`seed`"),
    ],
)
def test_readings_validate(args, kwargs, error, match):
    with pytest.raises(error, match=match):
        pump_readings(*args, **kwargs)
