"""The report of a real run: a small MLP trained on scikit-learn's iris with optax, analysed by
`analyse_run`, rendered by `write_report` — sections, embedded figures, numbers, cautions.

The report's own computations are checked against outside references: the kernel behind the
spectrum and the heat map against the dense ``jax.jacrev`` reference (tests/helpers.py), the
eigenvalues against ``numpy.linalg.eigvalsh``, the power-law line against ``numpy.polyfit``, the
class block means against numpy slices. The cautions are provoked one at a time by replacing
fields of the typed result (`dataclasses.replace`).
"""

import base64
import dataclasses
import functools
import html
import json
import math
import pathlib
import re

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
from helpers import assert_close, reduce_mode, reference_full
from sklearn.datasets import load_iris

import ntkcalc
from ntkcalc._tiles.store import record_source
from ntkcalc._workflows.report import SECTIONS, RunDescription, write_report
from ntkcalc._workflows.study import analyse_run

CLASSES = ("setosa", "versicolor", "virginica")
WIDTH, STEPS, LR = 256, 20, 0.5  # lr below the stability limit 2N/λ_max of the initial kernel


def _hidden(p, x):
    return jnp.tanh(x @ p["w"] / 2.0 + 0.1 * p["b"][None, :])  # NTK parameterization, fan-in 4


def _apply(p, x):
    return _hidden(p, x) @ p["v"] / np.sqrt(WIDTH)


@functools.cache
def _run():
    """Iris (standardized; every third example to train, the next to test), a tanh MLP of width
    `WIDTH` in the NTK parameterization, trained by full-batch optax SGD on
    L = (1/N) Σ ½‖f − y‖², outputs recorded at every step."""
    iris = load_iris()
    x_all = (iris.data - iris.data.mean(0)) / iris.data.std(0)
    x, labels = x_all[::3], iris.target[::3]
    xt, labels_t = x_all[1::3], iris.target[1::3]
    keys = jax.random.split(jax.random.key(0), 3)
    params = {"w": jax.random.normal(keys[0], (4, WIDTH), jnp.float64),
              "b": jax.random.normal(keys[2], (WIDTH,), jnp.float64),
              "v": jax.random.normal(keys[1], (WIDTH, 3), jnp.float64)}
    y = jnp.asarray(np.eye(3)[labels])
    grad = jax.jit(jax.grad(lambda p: 0.5 * jnp.sum((_apply(p, x) - y) ** 2) / len(x)))
    opt = optax.sgd(LR)
    state, kept = opt.init(params), [params]
    for _ in range(STEPS):
        updates, state = opt.update(grad(params), state)
        params = optax.apply_updates(params, updates)
        kept.append(params)
    net = ntkcalc.Net(_apply, kept[0])
    pairs = [(s, net.replace(params=kept[s])) for s in (0, 10, STEPS)]
    analysis = analyse_run(
        pairs, x, labels, x_test=xt, y_test=labels_t, lr=LR, full_batch_gd=True,
        recorded_steps=np.arange(STEPS + 1),
        recorded_train=np.stack([np.asarray(_apply(p, x)) for p in kept]),
        recorded_test=np.stack([np.asarray(_apply(p, xt)) for p in kept]),
        layer=_hidden, ridges=9)
    return analysis, net, x, labels


@pytest.fixture(scope="module")
def run():
    return _run()


DESCRIPTION = RunDescription(title="iris test", data="iris flowers", model="MLP 4→16→3, tanh",
                             training="optax.sgd, full batch", class_names=CLASSES,
                             details=(("source", "scikit-learn load_iris"),))


def _write(analysis, path, description=DESCRIPTION):
    html_path, json_path = write_report(analysis, out=path, description=description)
    return _text(html_path), json.loads(_text(json_path))


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


def test_every_section_with_an_embedded_figure_or_table(run, tmp_path):
    page, doc = _write(run[0], tmp_path)
    ids = re.findall(r'<section id="([^"]+)">', page)
    assert tuple(ids) == SECTIONS
    images = re.findall(r'src="data:image/png;base64,([^"]+)"', page)
    assert len(images) == 5  # spectrum, heat map, drift, forecast, risk
    for data in images:
        assert base64.b64decode(data)[:8] == b"\x89PNG\r\n\x1a\n"
    assert "http" not in page.replace("http-equiv", "")  # self-contained: nothing fetched
    assert set(doc["sections"]) == set(SECTIONS) - {"summary", "cautions"}
    assert len(doc["summary"]) == 5
    assert all(math.isfinite(v) for v in numbers_in(doc))
    for line in doc["summary"]:
        assert html.escape(line) in page
    # the description travels typed: class names in the heat map and setup, the title on top
    assert doc["sections"]["heatmap"]["class_names"] == list(CLASSES)
    assert doc["sections"]["setup"]["class_counts"] == np.bincount(run[3]).tolist()
    assert "ntkcalc report: iris test" in page and "scikit-learn load_iris" in page


def test_spectrum_and_kernel_match_references(run, tmp_path):
    """The kernel against dense jax.jacrev; eigenvalues against numpy.linalg.eigvalsh; the
    power-law line through its own fit range against numpy.polyfit (least squares)."""
    analysis, net, x, _ = run
    k = analysis.drift.kernels[0]
    assert_close(k, reduce_mode(reference_full(net, x), "trace"), rtol=1e-10)
    spec = _write(analysis, tmp_path)[1]["sections"]["spectrum"]
    np.testing.assert_allclose(spec["eigenvalues"], np.linalg.eigvalsh(k)[::-1], rtol=1e-9,
                               atol=1e-12 * np.abs(k).max())
    first, last = spec["decay_fit_range"]
    ranks = np.arange(first, last + 1)
    logs = np.log(np.asarray(spec["eigenvalues"])[first - 1:last])
    slope, intercept = np.polyfit(np.log(ranks), logs, 1)  # least squares, both free
    np.testing.assert_allclose([-slope, intercept],
                               [spec["decay_exponent"], spec["decay_intercept"]], rtol=1e-8)


def test_block_means_by_class(run, tmp_path):
    analysis, _, _, labels = run
    doc = _write(analysis, tmp_path)[1]
    k = analysis.drift.kernels[0]
    means = np.asarray(doc["sections"]["heatmap"]["block_means"]["step 0"])
    assert means[0, 2] == pytest.approx(k[np.ix_(labels == 0, labels == 2)].mean(), rel=1e-12)
    assert means[1, 1] == pytest.approx(k[np.ix_(labels == 1, labels == 1)].mean(), rel=1e-12)


def _singular(n: int):
    v = np.ones((n, 1)) / np.sqrt(n)
    return ntkcalc.spectrum(v @ v.T)


def _with_spectrum(analysis, spec):
    first = dataclasses.replace(analysis.checkpoints[0], spectrum=spec)
    return dataclasses.replace(analysis, checkpoints=(first, *analysis.checkpoints[1:]))


def _not_lazy(analysis, sentence):
    verdict = dataclasses.replace(analysis.laziness, lazy=False, sentence=sentence)
    return dataclasses.replace(analysis, laziness=verdict, lazy=False, verdict=sentence)


@pytest.mark.parametrize(
    ("change", "phrase"),
    [
        (lambda a: _not_lazy(a, "not lazy: 40%"), "Not lazy"),
        (lambda a: _with_spectrum(a, _singular(a.num_train)), "ill-conditioned"),
        (lambda a: dataclasses.replace(a, dtype="bfloat16"), "bfloat16"),
        (lambda a: dataclasses.replace(a, cautions=("Something the analysis warned about.",)),
         "analysis warned"),
    ],
)
def test_cautions(run, tmp_path, change, phrase):
    page, doc = _write(change(run[0]), tmp_path)
    assert any(phrase in c for c in doc["cautions"]), doc["cautions"]
    assert f"cautions: {len(doc['cautions'])}" in doc["summary"][-1]
    assert phrase in page


def test_no_cautions_says_so(run, tmp_path):
    analysis = run[0]
    assert analysis.lazy and analysis.drift.condition_number.max() < 1e12
    doc = _write(dataclasses.replace(analysis, cautions=()), tmp_path)[1]
    assert doc["cautions"] == []
    assert doc["summary"][-1].endswith("cautions: none.")


def test_infinite_numbers_become_null(run, tmp_path):
    """A singular kernel has condition number inf: JSON gets null, never Infinity."""
    page, _ = _write(_with_spectrum(run[0], _singular(run[0].num_train)), tmp_path)
    text = _text(tmp_path / "report.json")
    assert "Infinity" not in text and "NaN" not in text
    assert json.loads(text)["sections"]["spectrum"]["condition_number"] is None
    assert "ill-conditioned" in page


def test_without_test_set_or_learning_rate(run, tmp_path):
    """A run analysed without lr and test set still gets every section, saying what is missing."""
    analysis, net, x, labels = run
    bare = analyse_run([(0, net), (1, net.replace(params=jax.tree.map(lambda a: 1.01 * a,
                                                                         net.params)))],
                       x, labels, layer=_hidden, ridges=5)
    page, doc = _write(bare, tmp_path, description=None)
    assert tuple(re.findall(r'<section id="([^"]+)">', page)) == SECTIONS
    assert "no forecasts" in doc["summary"][0] and "Forecast: none" in doc["summary"][2]
    assert doc["sections"]["risk"]["heldout"] is None
    assert doc["sections"]["heatmap"]["class_names"] == ["0", "1", "2"]


def test_bad_arguments(run, tmp_path):
    analysis = run[0]
    with pytest.raises(TypeError, match="`source`"):
        write_report(3)
    with pytest.raises(FileNotFoundError, match="kernel store"):
        write_report(tmp_path)
    analysis.write(tmp_path / "run")
    (tmp_path / "run" / "result.npz").unlink()  # as written before results were saved whole
    with pytest.raises(ValueError, match="run directory written before results were saved"):
        write_report(tmp_path / "run")
    (tmp_path / "run" / "result.npz").write_bytes(b"not a zip")
    with pytest.raises(ValueError, match="result.npz' is damaged"):
        write_report(tmp_path / "run")
    with pytest.raises(ValueError, match="`out`"):
        write_report(analysis)
    with pytest.raises(TypeError, match="`out`"):
        write_report(analysis, out=5)
    with pytest.raises(TypeError, match="`description`"):
        write_report(analysis, out=tmp_path, description={"title": "x"})
    with pytest.raises(ValueError, match="class_names"):
        write_report(analysis, out=tmp_path, description=RunDescription(class_names=("a",)))
    with pytest.raises(TypeError, match="`class_names`"):
        RunDescription(class_names=["a", "b", "c"])
    with pytest.raises(TypeError, match="`details`"):
        RunDescription(details=(("only a label",),))
    with pytest.raises(TypeError, match="`title`"):
        RunDescription(title=3)


def same(a, b, where: str = "result") -> None:
    """Every field of two results equal, recursively: arrays by dtype, shape and value (NaN equal
    to NaN), numbers by type and value."""
    assert type(a) is type(b), f"{where}: {type(a).__name__} vs {type(b).__name__}"
    if dataclasses.is_dataclass(a):
        for f in dataclasses.fields(a):
            same(getattr(a, f.name), getattr(b, f.name), f"{where}.{f.name}")
    elif isinstance(a, np.ndarray | np.generic):
        assert (a.dtype, np.shape(a)) == (b.dtype, np.shape(b)), where
        np.testing.assert_array_equal(a, b, err_msg=where, strict=True)
    elif isinstance(a, tuple | list):
        assert len(a) == len(b), where
        for i, (u, v) in enumerate(zip(a, b, strict=True)):
            same(u, v, f"{where}[{i}]")
    elif isinstance(a, dict):
        assert list(a) == list(b), where
        for k in a:
            same(a[k], b[k], f"{where}[{k!r}]")
    elif isinstance(a, float) and math.isnan(a):
        assert math.isnan(b), where
    else:
        assert a == b, f"{where}: {a!r} vs {b!r}"


def test_written_run_reads_back_whole(run, tmp_path):
    # RunAnalysis.write → RunAnalysis.read: every field of the typed result as it was (arrays by
    # dtype, shape and value); write_report(run directory) renders the same report again.
    analysis = run[0]
    html_path, json_path = analysis.write(tmp_path / "run", description=DESCRIPTION)
    back = ntkcalc.RunAnalysis.read(tmp_path / "run")
    same(back, analysis)
    assert back.drift.kernels.shape == analysis.drift.kernels.shape  # the kernels too
    again_html, again_json = write_report(tmp_path / "run", out=tmp_path / "again")
    assert _text(again_json) == _text(json_path)  # the saved description is used again
    assert _text(again_html) == _text(html_path)
    with pytest.raises(FileNotFoundError, match="`directory`=.*holds no result.npz"):
        ntkcalc.RunAnalysis.read(tmp_path / "again")


def test_overview_figure_labels_are_whole(run):
    from test_plots import clipped_labels

    assert clipped_labels(run[0].plot()) == []


def test_one_output_is_said_in_the_singular(run, tmp_path):
    a = run[0]
    one = dataclasses.replace(a, num_outputs=1, labels=None)
    _, doc = _write(one, tmp_path, description=None)
    assert ", 1 output;" in doc["summary"][0]
    _, doc = _write(a, tmp_path / "three")
    assert ", 3 outputs;" in doc["summary"][0]


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
    assert doc["kernel_source"] is None and "Source: not recorded" in doc["summary"][0]
    np.testing.assert_allclose(doc["sections"]["spectrum"]["eigenvalues"],
                               np.linalg.eigvalsh(k)[::-1], rtol=1e-10, atol=1e-12)
    assert all(math.isfinite(v) for v in numbers_in(doc))
    assert ("ill-conditioned" in " ".join(doc["cautions"])) == (np.linalg.cond(k) > 1e12)
    # with class labels the heat map is sorted by class; block means against numpy slices
    labels = np.repeat([1, 0], 6)
    doc = json.loads(_text(write_report(store, out=tmp_path / "sorted", labels=labels)[1]))
    means = np.asarray(doc["sections"]["heatmap"]["block_means"]["kernel"])
    assert means[0, 1] == pytest.approx(k[6:, :6].mean(), rel=1e-12)
    assert doc["sections"]["heatmap"]["class_counts"] == [6, 6]
    with pytest.raises(ValueError, match="`labels`"):
        write_report(store, out=tmp_path / "bad", labels=np.zeros(5, int))
    # the source a store records (as `ntkcalc kernel` writes it) is shown on the page and kept
    made = {"checkpoint": "/runs/a/ckpt", "step": 30, "item": None, "subtree": "params",
            "model": "models:Mlp"}
    record_source(str(store), made)
    html_path, json_path = write_report(store, out=tmp_path / "sourced")
    assert json.loads(_text(json_path))["kernel_source"] == made
    assert ("Source: checkpoint /runs/a/ckpt step 30, subtree params, model models:Mlp."
            in html.unescape(_text(html_path)))


#: Byte units as printed (decimal, `ntkcalc._engine.cost.format_bytes`): "3.4 MB" is 3.4e6 bytes.
_BYTES = {"KB": 1e3, "MB": 1e6, "GB": 1e9, "TB": 1e12}


def _shown_numbers(text: str):
    """Decimal numbers, percentages and byte sizes as shown (value, unit of the last digit)."""
    for m in re.finditer(r"(?<![\w.])(-?\d+\.\d+)(e[-+]?\d+)?(%| [KMGT]B\b)?", text):
        digits, exp, unit = m.groups()
        step = 10.0 ** -len(digits.split(".")[1]) * (10.0 ** int(exp[1:]) if exp else 1.0)
        value = float(digits + (exp or ""))
        scale = 0.01 if unit == "%" else _BYTES[unit.strip()] if unit else 1.0
        yield value * scale, step * scale


def test_one_verdict_and_every_shown_number_in_json(run, tmp_path):
    # A run that is not lazy: the verdict sentence is the same in the summary, the cautions, the
    # drift and forecast sections; every decimal number the page shows is in report.json (up to
    # the rounding it is shown with); every error label names the one convention (MSE).
    # the one verdict of this run's own numbers at a kernel threshold of 0.5% (its kernel moved
    # about 0.9%), so every number of the sentence is one of the run's
    a = run[0]
    first = a.checkpoints[0]
    verdict = ntkcalc.laziness(relative_change=a.drift.relative_change,
                               distance=a.drift.distance_to_initial, steps=a.drift.steps,
                               forecast_gap=first.gap, gap_steps=first.gap_steps,
                               kernel_threshold=0.005)
    assert not verdict.lazy
    sentence = verdict.sentence
    page, doc = _write(dataclasses.replace(a, laziness=verdict, lazy=False, verdict=sentence),
                       tmp_path)
    assert doc["verdict"]["sentence"] == sentence and doc["verdict"]["lazy"] is False
    assert sentence in doc["summary"][1]
    assert sum(sentence in c for c in doc["cautions"]) == 1
    assert doc["sections"]["drift"]["verdict"] == sentence
    assert doc["sections"]["forecast"]["verdict"] == sentence
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


def test_sketched_estimates_print_bias_corrected_where_the_bias_exceeds_the_error():
    """A sketched number whose jackknife bias exceeds its error bar is printed as value − bias
    (Quenouille's first-order correction) and says so; otherwise as value ± error. The numbers:
    the kernel distance measured in docs/sketch.md (exact 1.15e-4)."""
    from ntkcalc._workflows.report import _pm

    far = ntkcalc.Uncertain(-2.74e-4, 1.1e-4, -3.19e-4, 8)
    assert _pm(far) == "4.5e-05 ± 0.00011 (bias-corrected from -0.000274)"
    near = ntkcalc.Uncertain(0.659, 0.014, 0.003, 8)
    assert _pm(near) == "0.659 ± 0.014"


def _rewrite_record(path, change) -> None:
    """Rewrite a saved result.npz with ``change`` applied to its record (the JSON header)."""
    with np.load(path, allow_pickle=False) as data:
        arrays = {k: data[k] for k in data.files}
    record = change(json.loads(str(arrays.pop("__record__"))))
    np.savez(path, __record__=np.array(json.dumps(record)), **arrays)


def _rename_field(tree, cls: str, old: str, new: str):
    """The record tree with field ``old`` of every ``cls`` renamed ``new``, as a version whose
    class had another field would have written it."""
    if isinstance(tree, list):
        return [_rename_field(v, cls, old, new) for v in tree]
    if not isinstance(tree, dict):
        return tree
    tree = {k: _rename_field(v, cls, old, new) for k, v in tree.items()}
    if tree.get("__type__", "").endswith(f":{cls}"):
        tree["fields"] = {new if k == old else k: v for k, v in tree["fields"].items()}
    return tree


def test_a_record_of_another_version_is_refused_as_such(run, tmp_path):
    # A result saved by a version whose classes had other fields is refused saying so and what
    # to do (re-run), never called damaged; the record names the version that wrote it.
    analysis = run[0]
    analysis.write(tmp_path / "run", description=DESCRIPTION)
    record = tmp_path / "run" / "result.npz"
    with np.load(record, allow_pickle=False) as data:
        header = json.loads(str(data["__record__"]))
    assert header["format"] == 1 and header["ntkcalc"] == ntkcalc.__version__
    # as the version before records named their version wrote it: no header; its Laziness had
    # a field this one lacks in place of one it requires
    _rewrite_record(record, lambda r: _rename_field(r["tree"], "Laziness", "lazy", "is_lazy"))
    with pytest.raises(ValueError) as err:
        ntkcalc.RunAnalysis.read(tmp_path / "run")
    message = str(err.value)
    assert "damaged" not in message
    assert "saved by another version of ntkcalc" in message
    assert "an earlier ntkcalc, one that did not record its version" in message
    assert ("its Laziness has fields is_lazy that this version's lacks; no fields lazy, which "
            "this version's requires") in message
    assert "Re-run the analysis (`analyse_run`, then `write`)" in message
    assert "its numbers are still in" in message and "result.json" in message
    # a record naming its version, with a class this version does not have
    analysis.write(tmp_path / "run", description=DESCRIPTION)

    def renamed(r):
        text = json.dumps(r).replace("ntkcalc._analysis.laziness:Laziness",
                                     "ntkcalc._analysis.laziness:LazinessV0")
        return {**json.loads(text), "ntkcalc": "0.0.9"}

    _rewrite_record(record, renamed)
    with pytest.raises(ValueError, match=r"written by ntkcalc 0\.0\.9; this is ntkcalc .*its "
                       r"result class ntkcalc\._analysis\.laziness:LazinessV0 is not in this "
                       r"version\)\. Re-run the analysis"):
        write_report(tmp_path / "run")
    # another record layout
    analysis.write(tmp_path / "run", description=DESCRIPTION)
    _rewrite_record(record, lambda r: {**r, "format": 2})
    with pytest.raises(ValueError, match="its record layout is format 2, this version reads "
                                         r"format 1\)\. Re-run"):
        ntkcalc.RunAnalysis.read(tmp_path / "run")
    # what is not a record of any version is still called damaged
    analysis.write(tmp_path / "run", description=DESCRIPTION)
    _rewrite_record(record, lambda r: {**r, "tree": {"__array__": "missing", "scalar": True}})
    with pytest.raises(ValueError, match="result.npz' is damaged"):
        ntkcalc.RunAnalysis.read(tmp_path / "run")
