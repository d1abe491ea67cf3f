"""The ``ntkcalc`` command line: ``demo``, ``kernel``, ``run``, ``drift``, ``report``, ``bench``.

Argument errors print one line on stderr and exit with status 2; errors while running (a
checkpoint that does not match the model, a memory budget too small, a store that cannot be
written or a full disk, a non-finite kernel, ...) print the library's message as one line and exit
with 1, never a traceback.
"""

from __future__ import annotations

import argparse
import importlib
import os
import re
import sys
import time
from typing import get_args

import numpy as np

from .._engine.options import METHODS, OUTPUTS
from .._words import counted

MODEL_SPEC = re.compile(r"^[A-Za-z_][\w.]*:[A-Za-z_][\w.]*$")


class UsageError(Exception):
    """An argument the command cannot use; printed as one line, exit status 2."""


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # one line instead of usage + message
        raise UsageError(f"{self.prog}: error: {message} (see {self.prog} --help)")


def _subparser(sub, name: str, *, help: str, example: str):
    return sub.add_parser(
        name, help=help, description=help, epilog=f"example:\n  {example}",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of ``ntkcalc`` with its six commands."""
    parser = _Parser(
        prog="ntkcalc",
        description="Exact empirical neural tangent kernels of JAX and flax models.",
        epilog="example:\n  ntkcalc kernel run/ckpt --model mymodels:make_mlp --x probe.npz "
               "--key x --store kernel.zarr",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    from .._version import __version__
    from .choice import KernelPath
    from .study import Loss

    parser.add_argument("--version", action="version", version=f"ntkcalc {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    demo = _subparser(sub, "demo",
                      help="Train a small network, analyse its kernel, write a report.",
                      example="ntkcalc demo out/ --scale small")
    demo.add_argument("out_dir", nargs="?", default=None,
                      help="a new or empty directory for the run, its checkpoints and the report "
                      "(default: a new ./ntkcalc-demo-YYYYMMDD-HHMMSS)")
    demo.add_argument("--scale", choices=("full", "small"), default="full",
                      help="'small' runs in seconds (default: full)")
    demo.add_argument("--quiet", action="store_true", help="no progress messages")

    kernel = _subparser(
        sub, "kernel", help="The kernel of a saved model on a data set, written to a store.",
        example="ntkcalc kernel run/ckpt --step 100 --model mymodels:make_mlp --x data.npz "
                "--key x_test\n    --outputs trace --memory 4GB --store kernel.zarr",
    )
    kernel.add_argument("checkpoint", help="orbax checkpoint or CheckpointManager directory, "
                                           "or a flax msgpack file")
    kernel.add_argument("--model", required=True, metavar="PACKAGE.MODULE:FACTORY",
                        help="factory() returns a flax linen module or an nnx model; linen "
                             "variables take their shapes from the first example of --x")
    kernel.add_argument("--x", required=True, metavar="PATH", help="inputs (.npy, or .npz)")
    kernel.add_argument("--key", help="array name in the --x .npz file")
    kernel.add_argument("--x2", metavar="PATH", help="second inputs for K(x, x2) (default x)")
    kernel.add_argument("--key2", help="array name in the --x2 .npz file")
    kernel.add_argument("--store", required=True, metavar="PATH", help="where the kernel goes")
    kernel.add_argument("--step", type=int, help="step of a CheckpointManager directory "
                                                 "(default: latest)")
    kernel.add_argument("--item", help="item of a checkpoint step holding several")
    kernel.add_argument("--subtree", help="'/'-path to the variables inside the checkpoint")
    kernel.add_argument("--outputs", choices=OUTPUTS, default="trace")
    kernel.add_argument("--method", choices=METHODS, default="auto")
    kernel.add_argument("--params", metavar="REGEX", help="only parameters whose dotted name "
                                                          "matches")
    kernel.add_argument("--memory", help="peak-memory budget, e.g. 4GB")
    kernel.add_argument("--spot-check", type=int, default=0, metavar="K",
                        help="recompute K kernel entries independently with jax.jacrev and "
                             "stop if one disagrees (default 0: off)")
    kernel.add_argument("--x64", action="store_true", help="compute in float64")
    kernel.add_argument("--quiet", action="store_true", help="no progress messages")

    run = _subparser(
        sub, "run", help="Analyse your own training run (drift, laziness, forecasts, test error, "
        "interpolation check, spectrum, alignment) and write the report.",
        example="ntkcalc run run/ckpt --model mymodels:make_mlp --data digits.npz --x x --y y "
                "\\\n    --x-test x_test --y-test y_test --lr 0.1 --out run/analysis",
    )
    _run_arguments(run)
    run.add_argument("--x-test", metavar="KEY", help="test inputs in --data (optional)")
    run.add_argument("--y-test", metavar="KEY", help="test labels or targets in --data")
    run.add_argument("--lr", type=float, help="the run's learning rate (for the forecasts; "
                                              "default: analyse_run's)")
    run.add_argument("--horizon", type=int, help="steps to forecast (default: the last step)")
    run.add_argument("--forecast-from", type=int, nargs="+", metavar="STEP",
                     help="checkpoint steps to forecast from (default: the first)")
    run.add_argument("--loss", choices=get_args(Loss), default="mse",
                     help="the run's training loss (default: mse)")
    run.add_argument("--full-batch-gd", action="store_true",
                     help="the run was full-batch gradient descent on --x (forecasts compare)")
    run.add_argument("--kernel", choices=get_args(KernelPath), default="auto",
                     help="exact kernels, sketched features, or auto: features when the exact "
                          "kernels exceed --memory or the planner's time limit (default: auto)")
    run.add_argument("--features", type=int, metavar="K",
                     help="features per example on the sketched path (default: analyse_run's)")
    run.add_argument("--memory", help="memory budget, e.g. 8GB (default: half the free memory)")
    run.add_argument("--store", metavar="DIR",
                     help="directory for the sketched path's features: resumable stores, one "
                          "per checkpoint; rerun the same command to resume after an interruption")

    drift = _subparser(
        sub, "drift", help="The kernel at every checkpoint of a run and how far it moved: "
        "drift.json, drift.png and the laziness verdict.",
        example="ntkcalc drift run/ckpt --model mymodels:make_mlp --data digits.npz --out drift/",
    )
    _run_arguments(drift)
    drift.add_argument("--outputs", choices=OUTPUTS, default="trace")

    report = _subparser(sub, "report", help="Write the HTML and JSON report of a kernel store "
                        "or, again, of a run directory ('ntkcalc run').",
                        example="ntkcalc report kernel.zarr --labels data.npz:y")
    report.add_argument("source", help="kernel store written by 'ntkcalc kernel' or "
                                       "ntk(..., store=...), or a run directory written by "
                                       "'ntkcalc run' or RunAnalysis.write")
    report.add_argument("--labels", metavar="FILE[:KEY]",
                        help="class labels of the store's examples (.npy, or .npz with :KEY); "
                             "the heat map is sorted by class only with them")
    report.add_argument("--out", help="directory for the report (default: next to the store, "
                                      "<store>-report; never inside it)")

    bench = _subparser(sub, "bench", help="Time the kernel methods; every argument after "
                       "'bench' goes to the benchmark.",
                       example="ntkcalc bench [BENCHMARK ARGUMENTS]")
    bench.add_argument("args", nargs=argparse.REMAINDER, help="arguments of the benchmark")
    return parser


def _run_arguments(p) -> None:
    """The arguments ``run`` and ``drift`` share: a checkpoint directory, a model, data."""
    p.add_argument("checkpoint", help="orbax CheckpointManager directory of the run")
    p.add_argument("--model", required=True, metavar="PACKAGE.MODULE:FACTORY",
                   help="factory() returns the flax linen module or nnx model of the checkpoints")
    p.add_argument("--data", required=True, metavar="PATH", help="a .npz file with the arrays")
    p.add_argument("--x", default="x", metavar="KEY", help="training inputs in --data "
                                                           "(default 'x')")
    p.add_argument("--y", default="y", metavar="KEY",
                   help="training labels (integers) or targets in --data (default 'y')")
    p.add_argument("--steps", type=int, nargs="+", metavar="STEP",
                   help="checkpoint steps to use (default: all)")
    p.add_argument("--item", help="item of a checkpoint step holding several")
    p.add_argument("--subtree", help="'/'-path to the variables inside the checkpoint")
    p.add_argument("--out", help="directory for the results (default: next to the checkpoint "
                                 "directory, <checkpoint>-<command>)")
    p.add_argument("--x64", action="store_true", help="compute in float64")
    p.add_argument("--quiet", action="store_true", help="no progress bars or messages")


# -- helpers --------------------------------------------------------------------------------------
def _load_array(path: str, key: str | None, *, flag: str, command: str = "kernel",
                key_flag: str | None = None) -> np.ndarray:
    key_flag = key_flag or flag.replace("x", "key")
    if not os.path.isfile(path):
        raise UsageError(f"ntkcalc {command}: error: {flag} {path!r} does not exist.")
    if path.endswith(".npz"):
        with np.load(path, allow_pickle=False) as data:
            names = sorted(data.files)
            if key is None and len(names) == 1:
                key = names[0]
            if key not in names:
                need = "has no array" if key is not None else "holds several arrays; pass one"
                raise UsageError(f"ntkcalc {command}: error: {path!r} {need} "
                                 f"{'' if key is None else repr(key) + ' '}(arrays: "
                                 f"{', '.join(names)}); pick one with {key_flag}.")
            return data[key]
    if path.endswith(".npy"):
        try:
            return np.load(path, allow_pickle=False)
        except ValueError as err:
            raise UsageError(f"ntkcalc {command}: error: {flag} {path!r}: {err}") from None
    raise UsageError(f"ntkcalc {command}: error: {flag} {path!r} must be a .npy or .npz file.")


def _factory(spec: str, *, command: str = "kernel"):
    if not MODEL_SPEC.match(spec):
        raise UsageError(f"ntkcalc {command}: error: --model {spec!r} must look like "
                         "package.module:factory.")
    module_name, attr = spec.split(":")
    if os.getcwd() not in sys.path:  # models next to the data, as for `python -m`
        sys.path.insert(0, os.getcwd())
    try:
        obj = importlib.import_module(module_name)
    except ImportError as err:
        raise UsageError(f"ntkcalc {command}: error: --model: cannot import {module_name!r} "
                         f"({err}).") from None
    for part in attr.split("."):
        if not hasattr(obj, part):
            raise UsageError(f"ntkcalc {command}: error: --model: {module_name!r} has no "
                             f"{attr!r}.")
        obj = getattr(obj, part)
    if not callable(obj):
        raise UsageError(f"ntkcalc {command}: error: --model: {spec!r} is not callable.")
    return obj


def _say(quiet: bool, text: str) -> None:
    if not quiet:
        print(f"ntkcalc: {text}", file=sys.stderr, flush=True)


# -- commands -------------------------------------------------------------------------------------
def _kernel(args) -> int:
    if not os.path.exists(args.checkpoint):
        raise UsageError(f"ntkcalc kernel: error: checkpoint {args.checkpoint!r} does not exist.")
    factory = _factory(args.model)
    x = _load_array(args.x, args.key, flag="--x")
    x2 = None if args.x2 is None else _load_array(args.x2, args.key2, flag="--x2")
    if args.x64:
        import jax

        jax.config.update("jax_enable_x64", True)
    from flax import nnx

    from .._adapters.net import load_checkpoint
    from .._kernel import ntk
    from .._tiles.store import record_source

    model = factory()
    linen = {} if isinstance(model, nnx.Module) else {"example": x[:1]}
    _say(args.quiet, f"loading {args.checkpoint} into {type(model).__name__}")
    try:
        net = load_checkpoint(args.checkpoint, module=model, step=args.step, item=args.item,
                              subtree=args.subtree, **linen)
    except (ValueError, TypeError) as err:
        if not linen:
            raise
        # A linen module's variables take their shapes from the first example of --x, so a
        # checkpoint that "does not match" may be inputs of the wrong width.
        raise type(err)(f"{err} (The variables of {type(model).__name__} were shaped from the "
                        f"first example of --x, of feature shape {x.shape[1:]}: if the checkpoint "
                        "is the right one, --x has the wrong feature shape for it.)") from err
    n2 = len(x) if x2 is None else len(x2)
    _say(args.quiet, f"kernel {len(x)} x {n2}, outputs {args.outputs}, method {args.method}, "
                     f"{net.num_params:,} parameters")
    start = time.perf_counter()
    k = ntk(net, x, x2, method=args.method, outputs=args.outputs, params=args.params,
            memory=args.memory, store=args.store, progress=not args.quiet,
            spot_check=args.spot_check)
    seconds = time.perf_counter() - start
    record_source(args.store, _provenance(args))
    print(f"kernel {tuple(k.shape)} written to the store {args.store} in {seconds:.1f} s")
    return 0


def _provenance(args) -> dict:
    """Which checkpoint (absolute path, step) and model produced a kernel, for its store."""
    from .._adapters.checkpoint import checkpoint_steps

    step = args.step
    if step is None and os.path.isdir(args.checkpoint):
        try:
            steps = checkpoint_steps(args.checkpoint)
        except (ValueError, OSError):  # a single checkpoint, not a CheckpointManager directory
            steps = ()
        step = max(steps) if steps else None
    return {"checkpoint": os.path.abspath(args.checkpoint), "step": step, "item": args.item,
            "subtree": args.subtree, "model": args.model}


def _run_inputs(args, command: str) -> tuple[dict, str]:
    """The keyword arguments ``analyse_run`` and ``drift`` share, and the output directory."""
    if not os.path.isdir(args.checkpoint):
        raise UsageError(f"ntkcalc {command}: error: checkpoint directory {args.checkpoint!r} "
                         "does not exist or is not a directory.")
    if not args.data.endswith(".npz"):
        raise UsageError(f"ntkcalc {command}: error: --data {args.data!r} must be a .npz file "
                         "holding the arrays named by --x, --y, ...")
    factory = _factory(args.model, command=command)
    x = _load_array(args.data, args.x, flag="--data", command=command, key_flag="--x")
    y = _load_array(args.data, args.y, flag="--data", command=command, key_flag="--y")
    if len(y) != len(x):
        raise UsageError(f"ntkcalc {command}: error: --y {args.y!r} has "
                         f"{counted(len(y), 'row')} but --x {args.x!r} has {len(x)}; they must "
                         "be the same examples.")
    if args.x64:
        import jax

        jax.config.update("jax_enable_x64", True)
    from flax import nnx

    model = factory()
    kwargs = {"module": model, "item": args.item, "subtree": args.subtree, "steps": args.steps,
              "progress": not args.quiet}
    if not isinstance(model, nnx.Module):
        kwargs["example"] = x[:1]
    out = args.out or f"{os.path.abspath(args.checkpoint).rstrip(os.sep)}-{command}"
    return {"x": x, "y": y, **kwargs}, out


def _run(args) -> int:
    from .study import analyse_run

    shared, out = _run_inputs(args, "run")
    x, y = shared.pop("x"), shared.pop("y")
    if (args.x_test is None) != (args.y_test is None):
        raise UsageError("ntkcalc run: error: --x-test and --y-test go together; pass both or "
                         "neither.")
    test = {}
    if args.x_test is not None:
        test = {"x_test": _load_array(args.data, args.x_test, flag="--data", command="run",
                                      key_flag="--x-test"),
                "y_test": _load_array(args.data, args.y_test, flag="--data", command="run",
                                      key_flag="--y-test")}
    options = {k: v for k, v in (("lr", args.lr), ("horizon", args.horizon),
                                 ("forecast_from", args.forecast_from),
                                 ("features", args.features), ("memory", args.memory),
                                 ("store", args.store)) if v is not None}
    _say(args.quiet, f"analysing {args.checkpoint} on {len(x)} training examples")
    result = analyse_run(args.checkpoint, x, y, **shared, **test, **options, loss=args.loss,
                         full_batch_gd=args.full_batch_gd, kernel=args.kernel)
    from .report import RunDescription

    what = f"{len(x)} training examples ({args.data}: {args.x}, {args.y})" + (
        "" if not test else f", {len(test['x_test'])} test ({args.x_test}, {args.y_test})")
    description = RunDescription(
        title=f"training run {args.checkpoint}", data=what,
        model=f"{args.model} ({type(shared['module']).__name__}, {result.num_params:,} "
              "parameters)",
        details=(("checkpoints", os.path.abspath(args.checkpoint)),
                 ("steps", ", ".join(str(int(s)) for s in result.steps))))
    html, data = result.write(out, description=description)
    print(result.verdict)
    print(f"kernel: {result.kinds['kernel']}")
    print(f"report: {html}\ndata: {data}\nresult: {os.path.join(out, 'result.json')}")
    return 0


def _drift(args) -> int:
    from .drift import drift

    shared, out = _run_inputs(args, "drift")
    x, y = shared.pop("x"), shared.pop("y")
    result = drift(args.checkpoint, x, y, outputs=args.outputs, **shared)
    if os.path.exists(out) and not os.path.isdir(out):
        raise UsageError(f"ntkcalc drift: error: --out {out!r} is a file; pass a directory.")
    os.makedirs(out, exist_ok=True)
    table, figure = os.path.join(out, "drift.json"), os.path.join(out, "drift.png")
    with open(table, "w", encoding="utf-8") as fh:
        fh.write(result.to_json(indent=1))
    result.plot().figure.savefig(figure, dpi=110)
    print(result.verdict)
    print(f"table: {table}\nfigure: {figure}")
    return 0


def _demo(args) -> int:
    from .demo import run_demo

    out_dir = args.out_dir or time.strftime("ntkcalc-demo-%Y%m%d-%H%M%S")
    result = run_demo(out_dir, scale=args.scale, progress=not args.quiet)
    print(f"report: {result.report_html}")
    for line in result.summary:
        print(line)
    return 0


def _report(args) -> int:
    from .report import source_phrase, write_report

    source = os.path.abspath(args.source).rstrip(os.sep)
    out = args.out or f"{source}-report"
    if os.path.commonpath([source, os.path.abspath(out)]) == source:
        raise UsageError(f"ntkcalc report: error: --out {args.out!r} is inside the store "
                         f"{args.source!r} (zarr would find foreign files there); pass a "
                         "directory outside it.")
    extra = {}
    if args.labels is not None:
        path, _, key = args.labels.partition(":")
        extra["labels"] = _load_array(path, key or None, flag="--labels", command="report",
                                      key_flag="--labels FILE:KEY")
    html, data = write_report(args.source, out=out, **extra)
    from .._tiles.store import read_source

    made = read_source(args.source)
    if made is not None:
        print(f"kernel of {source_phrase(made)}")
    print(f"report: {html}\ndata: {data}")
    return 0


def _bench(args) -> int:
    from ..bench import main as bench

    return int(bench(args.args) or 0)


COMMANDS = {"demo": _demo, "kernel": _kernel, "run": _run, "drift": _drift, "report": _report,
            "bench": _bench}


def main(argv: list[str] | None = None) -> int:
    """Run ``ntkcalc`` with ``argv`` (default ``sys.argv[1:]``); returns the exit status."""
    parser = build_parser()
    try:
        args, extra = parser.parse_known_args(argv)
        if args.command == "bench":  # everything after `bench` belongs to the benchmark
            args.args = [*extra, *args.args]
        elif extra:
            parser.error(f"unrecognized arguments: {' '.join(extra)}")
        return COMMANDS[args.command](args)
    except SystemExit as stop:  # --help
        return int(stop.code or 0)
    except UsageError as err:
        print(err, file=sys.stderr)
        return 2
    except (ValueError, TypeError, MemoryError, ArithmeticError, OSError, RuntimeError) as err:
        # The library's messages say what to do; OSError covers a full disk, a path that is a
        # file or not writable (PermissionError, FileExistsError, FileNotFoundError);
        # RuntimeError a failed spot check, an incomplete multi-process store, a device error.
        text = str(err)
        if isinstance(err, OSError) and err.strerror:
            text = err.strerror if err.filename is None else (
                f"{err.strerror}: {err.filename!r}: pass a path that is a writable directory or "
                "does not exist yet.")
        print(f"ntkcalc: error: {' '.join(text.split())}", file=sys.stderr)
        return 1
