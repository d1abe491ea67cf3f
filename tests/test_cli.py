"""The command line, run in-process through `main` (and once as ``python -m ntkcalc``).

The end-to-end `kernel` run is checked against the in-memory `ntk` and the dense jax.jacrev
reference (tests/helpers.py); argument errors must be one line on stderr with a non-zero status
(common practice for command-line tools).
"""

from __future__ import annotations

import os
import pickle
import subprocess
import sys
import types

import flax.linen as nn
import jax
import numpy as np
import orbax.checkpoint as ocp
import pytest
from helpers import assert_close, f64, reduce_mode, reference_full

import ntkcalc
from ntkcalc._workflows.cli import build_parser, main

MODELS = '''
import flax.linen as nn

class Tiny(nn.Module):
    @nn.compact
    def __call__(self, x):
        return nn.Dense(2)(nn.tanh(nn.Dense(4)(x)))

def make():
    return Tiny()

not_callable = 3
'''


class Tiny(nn.Module):  # the same model as the factory file's
    @nn.compact
    def __call__(self, x):
        return nn.Dense(2)(nn.tanh(nn.Dense(4)(x)))


@pytest.fixture
def files(tmp_path, monkeypatch):
    (tmp_path / "cli_tiny_models.py").write_text(MODELS)
    monkeypatch.syspath_prepend(str(tmp_path))
    x = np.random.default_rng(0).normal(size=(5, 3))
    variables = f64(Tiny().init(jax.random.key(0), x[:1]))
    with ocp.StandardCheckpointer() as c:
        c.save(tmp_path / "ckpt", variables)
    np.savez(tmp_path / "data.npz", x=x, y=np.arange(5))
    np.save(tmp_path / "x.npy", x)
    return tmp_path, x, variables


def _run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def _kernel_args(tmp_path, **change):
    checkpoint = change.pop("checkpoint", tmp_path / "ckpt")
    args = {"--model": "cli_tiny_models:make", "--x": tmp_path / "data.npz", "--key": "x",
            "--store": tmp_path / "k.zarr"}
    args.update(change)
    return ["kernel", checkpoint, "--quiet"] + [
        str(v) for kv in args.items() if kv[1] is not None for v in kv]


def test_kernel_end_to_end(files, capsys):
    tmp_path, x, variables = files
    code, out, err = _run(capsys, *_kernel_args(tmp_path))
    assert code == 0, err
    import zarr

    stored = np.asarray(zarr.open_group(str(tmp_path / "k.zarr"), mode="r")["kernel"][0])
    net = ntkcalc.Net.from_linen(Tiny(), variables)
    assert_close(stored, ntkcalc.ntk(net, x))
    assert_close(stored, reduce_mode(reference_full(net, x), "trace"))  # dense jax.jacrev
    assert "written" in out and "(5, 5)" in out


def _one_line_error(code, err, *, status=2):
    assert code == status
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err, err


@pytest.mark.parametrize("change, message", [
    ({"checkpoint": "missing-ckpt"}, "checkpoint 'missing-ckpt' does not exist"),
    ({"--x": "nowhere.npz"}, "--x 'nowhere.npz' does not exist"),
    ({"--model": "no_colon"}, "must look like package.module:factory"),
    ({"--model": "no_such_module_xyz:make"}, "cannot import 'no_such_module_xyz'"),
    ({"--model": "cli_tiny_models:missing"}, "'cli_tiny_models' has no 'missing'"),
    ({"--model": "cli_tiny_models:not_callable"}, "is not callable"),
    ({"--key": "z"}, "has no array 'z' (arrays: x, y); pick one with --key"),
    ({"--key": None}, "holds several arrays; pass one (arrays: x, y)"),
    ({"--outputs": "all"}, "argument --outputs: invalid choice: 'all'"),
])
def test_kernel_argument_errors(files, capsys, change, message):
    tmp_path, _, _ = files
    if "checkpoint" in change:
        change = {"checkpoint": tmp_path / change["checkpoint"]}
        message = message.replace("'missing-ckpt'", repr(str(tmp_path / "missing-ckpt")))
    code, out, err = _run(capsys, *_kernel_args(tmp_path, **change))
    _one_line_error(code, err)
    assert message in err


def test_pickle_checkpoint_refused(files, capsys):
    tmp_path, _, variables = files
    (tmp_path / "w.pkl").write_bytes(pickle.dumps(jax.tree_util.tree_map(np.asarray, variables)))
    code, out, err = _run(capsys, *_kernel_args(tmp_path, checkpoint=tmp_path / "w.pkl"))
    _one_line_error(code, err, status=1)
    assert "pickle file: loading it would run arbitrary code" in err


def test_missing_required_arguments(capsys):
    code, out, err = _run(capsys, "kernel", "somewhere")
    _one_line_error(code, err)
    assert "required: --model, --x, --store" in err
    code, out, err = _run(capsys)
    _one_line_error(code, err)


def test_other_commands_parse():
    parser = build_parser()
    demo = parser.parse_args(["demo", "out", "--scale", "small", "--quiet"])
    assert (demo.out_dir, demo.scale, demo.quiet) == ("out", "small", True)
    report = parser.parse_args(["report", "run", "--out", "rep"])
    assert (report.source, report.out) == ("run", "rep")


def test_dispatch_to_other_modules(capsys, monkeypatch):
    seen = {}

    def run_demo(out_dir, *, scale, progress):
        seen["demo"] = (out_dir, scale, progress)
        return types.SimpleNamespace(report_html="out/report.html",
                                     summary=[f"line {i}" for i in range(5)])

    def write_report(source, *, out=None):
        seen["report"] = (source, out)
        return "r.html", "r.json"

    monkeypatch.setattr("ntkcalc._workflows.demo.run_demo", run_demo)
    monkeypatch.setattr("ntkcalc._workflows.report.write_report", write_report)
    def bench(argv):
        seen["bench"] = argv
        return 3

    monkeypatch.setattr("ntkcalc.bench.main", bench)
    code, out, _ = _run(capsys, "demo", "out", "--scale", "small", "--quiet")
    assert code == 0 and seen["demo"] == ("out", "small", False)
    assert out.splitlines() == ["report: out/report.html"] + [f"line {i}" for i in range(5)]
    code, out, _ = _run(capsys, "report", "run")
    # written next to the source by default, never inside it (a zarr store warns on foreign files)
    assert code == 0 and seen["report"] == ("run", os.path.abspath("run-report"))
    assert "r.html" in out
    assert _run(capsys, "bench", "--sizes", "8", "16")[0] == 3
    assert seen["bench"] == ["--sizes", "8", "16"]


def test_python_m_help():
    for argv in ([], ["kernel"]):
        done = subprocess.run([sys.executable, "-m", "ntkcalc", *argv, "--help"],
                              capture_output=True, text=True, timeout=120)
        assert done.returncode == 0, done.stderr
        assert "example:" in done.stdout and "ntkcalc kernel" in done.stdout


# -- no traceback for a user mistake (issue 12) ---------------------------------------------------


def test_runtime_errors_are_one_line(files, capsys):
    # Before: MemoryError and PermissionError/NotADirectoryError escaped as tracebacks.
    tmp_path, _, _ = files
    code, _, err = _run(capsys, *_kernel_args(tmp_path, **{"--memory": "10"}))
    _one_line_error(code, err, status=1)
    assert "`memory`='10' (10 B) is too small" in err
    (tmp_path / "afile").write_text("not a directory")
    code, _, err = _run(capsys, *_kernel_args(tmp_path, **{"--store": tmp_path / "afile/k.zarr"}))
    _one_line_error(code, err, status=1)
    assert "is not writable" in err


def test_report_out_on_a_file_is_one_line(files, capsys):
    tmp_path, _, _ = files
    code, _, err = _run(capsys, *_kernel_args(tmp_path))
    assert code == 0, err
    (tmp_path / "afile").write_text("not a directory")
    code, _, err = _run(capsys, "report", tmp_path / "k.zarr", "--out", tmp_path / "afile")
    _one_line_error(code, err, status=1)
    assert "afile" in err and "writable directory" in err


def test_inputs_of_the_wrong_width_are_named(files, capsys):
    # Before: only the checkpoint was blamed; the linen variables are shaped from --x.
    tmp_path, _, _ = files
    np.save(tmp_path / "wide.npy", np.ones((5, 4)))
    code, _, err = _run(capsys, *_kernel_args(tmp_path, **{"--x": tmp_path / "wide.npy",
                                                           "--key": None}))
    _one_line_error(code, err, status=1)
    assert "--x has the wrong feature shape" in err and "(4,)" in err


def test_kernel_spot_check(files, capsys, monkeypatch):
    # A wrong kernel entry (injected where tiles leave the devices) stops the run with one line.
    from ntkcalc._tiles import drive

    tmp_path, _, _ = files
    code, _, err = _run(capsys, *_kernel_args(tmp_path), "--spot-check", "4")
    assert code == 0, err
    real = drive.iter_tiles

    def wrong(plan, req, todo, *, devices):
        for t, values in real(plan, req, todo, devices=devices):
            yield t, values * 1.01

    monkeypatch.setattr(drive, "iter_tiles", wrong)
    code, _, err = _run(capsys, *_kernel_args(tmp_path, **{"--store": tmp_path / "w.zarr"}),
                        "--spot-check", "4")
    _one_line_error(code, err, status=1)
    assert "`spot_check` failed" in err
