"""The ``ntkcalc`` command line: ``demo``, ``kernel``, ``report``, ``bench``.

Argument errors print one line on stderr and exit with status 2; errors while running (a
checkpoint that does not match the model, a memory budget too small, a store that cannot be
written or a full disk, a non-finite kernel, ...) print the library's message as one line and exit
with 1, never a traceback.
"""

from __future__ import annotations

import argparse
import importlib
import inspect
import os
import re
import sys
import time

import numpy as np

from .._engine.options import METHODS, OUTPUTS

MISSING_PART = "ntkcalc {command}: error: {what} is not available in this installation ({err})."
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
    """The argument parser of ``ntkcalc`` with its four commands."""
    parser = _Parser(
        prog="ntkcalc",
        description="Exact empirical neural tangent kernels of JAX and flax models.",
        epilog="example:\n  ntkcalc kernel run/ckpt --model mymodels:make_mlp --x probe.npz "
               "--key x --store kernel.zarr",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
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

    report = _subparser(sub, "report", help="Write the HTML and JSON report of a run directory.",
                        example="ntkcalc report out/ --out out/report")
    report.add_argument("source", help="run directory written by 'ntkcalc demo'")
    report.add_argument("--out", help="directory for the report (default: the source)")

    bench = _subparser(sub, "bench", help="Time the kernel methods; every argument after "
                       "'bench' goes to the benchmark.",
                       example="ntkcalc bench [BENCHMARK ARGUMENTS]")
    bench.add_argument("args", nargs=argparse.REMAINDER, help="arguments of the benchmark")
    return parser


# -- helpers --------------------------------------------------------------------------------------
def _load_array(path: str, key: str | None, *, flag: str) -> np.ndarray:
    if not os.path.isfile(path):
        raise UsageError(f"ntkcalc kernel: error: {flag} {path!r} does not exist.")
    if path.endswith(".npz"):
        with np.load(path, allow_pickle=False) as data:
            names = sorted(data.files)
            if key is None and len(names) == 1:
                key = names[0]
            if key not in names:
                need = "has no array" if key is not None else "holds several arrays; pass one"
                raise UsageError(f"ntkcalc kernel: error: {path!r} {need} "
                                 f"{'' if key is None else repr(key) + ' '}(arrays: "
                                 f"{', '.join(names)}); pick one with {flag.replace('x', 'key')}.")
            return data[key]
    if path.endswith(".npy"):
        try:
            return np.load(path, allow_pickle=False)
        except ValueError as err:
            raise UsageError(f"ntkcalc kernel: error: {flag} {path!r}: {err}") from None
    raise UsageError(f"ntkcalc kernel: error: {flag} {path!r} must be a .npy or .npz file.")


def _factory(spec: str):
    if not MODEL_SPEC.match(spec):
        raise UsageError(f"ntkcalc kernel: error: --model {spec!r} must look like "
                         "package.module:factory.")
    module_name, attr = spec.split(":")
    if os.getcwd() not in sys.path:  # models next to the data, as for `python -m`
        sys.path.insert(0, os.getcwd())
    try:
        obj = importlib.import_module(module_name)
    except ImportError as err:
        raise UsageError(f"ntkcalc kernel: error: --model: cannot import {module_name!r} "
                         f"({err}).") from None
    for part in attr.split("."):
        if not hasattr(obj, part):
            raise UsageError(f"ntkcalc kernel: error: --model: {module_name!r} has no {attr!r}.")
        obj = getattr(obj, part)
    if not callable(obj):
        raise UsageError(f"ntkcalc kernel: error: --model: {spec!r} is not callable.")
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

    from .._adapters.checkpoint import load_checkpoint
    from .._kernel import ntk

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
    accepted = inspect.signature(ntk).parameters
    extra = {k: v for k, v in (("store", args.store), ("progress", not args.quiet),
                               ("spot_check", args.spot_check)) if k in accepted}
    n2 = len(x) if x2 is None else len(x2)
    _say(args.quiet, f"kernel {len(x)} x {n2}, outputs {args.outputs}, method {args.method}, "
                     f"{net.num_params:,} parameters")
    start = time.perf_counter()
    k = ntk(net, x, x2, method=args.method, outputs=args.outputs, params=args.params,
            memory=args.memory, **extra)
    seconds = time.perf_counter() - start
    if "store" in extra:
        print(f"kernel {tuple(k.shape)} written to the store {args.store} in {seconds:.1f} s")
    else:
        np.save(args.store, np.asarray(k))
        print(f"kernel {tuple(np.shape(k))} written with numpy.save to {args.store} in "
              f"{seconds:.1f} s (this installation has no resumable kernel store)")
    return 0


def _optional(command: str, module: str, name: str):
    try:
        return getattr(importlib.import_module(module), name)
    except (ImportError, AttributeError) as err:
        raise UsageError(MISSING_PART.format(command=command, what=f"{module}.{name}",
                                             err=err)) from None


def _demo(args) -> int:
    run_demo = _optional("demo", "ntkcalc._workflows.demo", "run_demo")
    out_dir = args.out_dir or time.strftime("ntkcalc-demo-%Y%m%d-%H%M%S")
    result = run_demo(out_dir, scale=args.scale, progress=not args.quiet)
    print(f"report: {result.report_html}")
    for line in result.summary:
        print(line)
    return 0


def _report(args) -> int:
    write_report = _optional("report", "ntkcalc._workflows.report", "write_report")
    html, data = write_report(args.source, out=args.out)
    print(f"report: {html}\ndata: {data}")
    return 0


def _bench(args) -> int:
    bench = _optional("bench", "ntkcalc.bench", "main")
    return int(bench(args.args) or 0)


COMMANDS = {"demo": _demo, "kernel": _kernel, "report": _report, "bench": _bench}


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
