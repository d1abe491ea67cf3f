"""Benchmark rows of sketched features: accuracy against the exact kernel, and throughput.

Run by ``python -m ntkcalc.bench --sketch``; each measurement in a fresh subprocess
(``python -m ntkcalc._bench.sketch <json>``), float32 with matmul precision "highest".

Model: the dataset-scale MLP 784-512-512-512-10 (tanh) of `ntkcalc._bench.scale`, Gaussian
inputs. Task (regenerable): labels are the argmax of a seeded teacher network of the same
architecture (seed 7) on the same inputs; targets are their one-hot rows.

- accuracy: at N examples (3/4 train, 1/4 test), the exact trace kernel by `ntkcalc.ntk` against
  features at each k: top-10 eigenvalues (relative error), kernel-ridge test MSE (absolute
  difference), centered alignment (difference in units of its jackknife error bar); with
  ``"refine": true`` also the top-10 refined by exact products from the features
  (`ntkcalc.refine_spectrum`: relative error, products, seconds);
- scale: N examples streamed from a .npy memmap into a features store, seconds per 100,000
  examples (wall, and CPU seconds of the process with the load average around it: on a shared
  machine wall time measures the neighbours too) and peak RSS of the process, the
  1,000,000-example time extrapolated linearly.
"""

from __future__ import annotations

import json
import os
import sys
import tempfile
import time

from .._subprocess import run_child

TOP = 10


def _task(n: int):
    import numpy as np

    from . import scale as bs

    net = bs._net(0)
    x = bs._inputs(n, seed=1)
    teacher = bs._net(7)
    labels = np.asarray(teacher.apply(teacher.params, x)).argmax(1)
    return net, x, np.eye(10)[labels]


def _exact_summary(k, y, n: int, ridges) -> dict:
    """Top eigenvalues, kernel-ridge test MSE per ridge and centered alignment of the exact kernel
    (N, N) on the 3/4 train, 1/4 test split."""
    import numpy as np
    import scipy.linalg
    import scipy.sparse.linalg

    import ntkcalc

    tr, te = slice(0, 3 * n // 4), slice(3 * n // 4, n)
    if n <= 4000:
        eig = scipy.linalg.eigh(np.asarray(k, np.float64), eigvals_only=True,
                                subset_by_index=(n - TOP, n - 1))[::-1]
    else:  # Lanczos on the dense kernel (scipy ARPACK): O(N²) per product, not O(N³)
        eig = np.sort(scipy.sparse.linalg.eigsh(k, k=TOP, which="LA", tol=1e-8,
                                                return_eigenvectors=False))[::-1]
    ktr = np.asarray(k[tr, tr], np.float64)
    test_mse = []
    for r in ridges:
        fit = ntkcalc.ridge_fit(ktr, y[tr], ridge=r, k_test_train=np.asarray(k[te, tr],
                                                                           np.float64))
        test_mse.append(float(np.mean((fit.test_predictions - y[te]) ** 2)))
    # Centered alignment (Cortes, Mohri & Rostamizadeh, JMLR 13, 2012), centering in place:
    # at N = 20,000 the definition's N × N copies of YYᵀ would not fit beside the kernel.
    rows = ktr.mean(0)
    ktr -= rows[:, None]
    ktr -= rows[None, :]
    ktr += rows.mean()
    yc = y[tr] - y[tr].mean(0)
    align = float(np.sum((yc.T @ ktr) * yc.T) / (np.linalg.norm(ktr)
                                                 * np.linalg.norm(yc.T @ yc)))
    return {"eig": eig, "test_mse": test_mse, "alignment": align,
            "trace_over_top": float(np.trace(k) / eig[0]),
            "mean_diag_train": float(np.mean(np.diag(k)[tr]))}


def _accuracy(spec: dict) -> list[dict]:
    """Rows of features against the exact kernel. ``spec["dir"]`` (optional) keeps the exact
    kernel's store and each k's features there, so a rerun reuses them."""
    import numpy as np

    import ntkcalc

    n = spec["n"]
    scales = list(spec.get("ridge_scales", (1e-2, 1e-1, 1.0)))
    net, x, y = _task(n)
    keep = spec.get("dir")
    tr, te = slice(0, 3 * n // 4), slice(3 * n // 4, n)
    t0 = time.perf_counter()
    store = None if keep is None else os.path.join(keep, f"exact-{n}.zarr")
    k = ntkcalc.ntk(net, x, outputs="trace", progress=False, memory=spec.get("memory", "3GB"),
                    store=store)
    k = np.asarray(k, np.float32 if n > 4000 else np.float64)
    exact_s = time.perf_counter() - t0
    mean_diag = float(np.mean(np.diag(k)[tr]))
    ridges = [c * mean_diag for c in scales]
    exact = _exact_summary(k, y, n, ridges)
    del k
    eig = exact["eig"]
    rows = []
    for kk in spec["ks"]:
        t0 = time.perf_counter()
        path = None if keep is None else os.path.join(keep, f"features-{n}-{kk}.npy")
        if path is not None and os.path.exists(path):
            phi = np.load(path)
        else:
            f = ntkcalc.ntk_features(net, x, k=kk, seed=0, progress=False, memory="6GB")
            phi = np.asarray(f.features)
            if path is not None:
                np.save(path, phi)
        feat_s = time.perf_counter() - t0
        t0 = time.perf_counter()
        spec_f, _ = ntkcalc.features_spectrum(phi, top=TOP)
        fits = [ntkcalc.features_ridge(phi[tr], y[tr], ridge=r, test_features=phi[te],
                                       y_test=y[te]) for r in ridges]
        af = ntkcalc.features_alignment(phi[tr], y[tr])
        analysis_s = time.perf_counter() - t0
        if spec.get("refine"):
            rows_refined = _refined(net, x, phi, eig, spec)
        rel = np.abs(spec_f.value - eig) / eig
        rel_c = np.abs(spec_f.corrected - eig) / eig
        rows.append({
            "kind": "accuracy", "N": n, "k": kk, "exact_s": exact_s, "features_s": feat_s,
            "analysis_s": analysis_s, "trace_over_top": exact["trace_over_top"],
            "eig_exact": eig.tolist(), "eig_corrected": np.asarray(spec_f.corrected).tolist(),
            "eig_rel_err_max": float(rel.max()), "eig_rel_err_top1": float(rel[0]),
            "eig_corrected_rel_err_max": float(rel_c.max()),
            "eig_rel_err_bar_max": float(np.max(spec_f.error / eig)),
            "eig_corrected_z_max": float(np.max(np.abs(spec_f.corrected - eig) / spec_f.error)),
            "ridge_over_mean_diag": scales,
            "test_mse_exact": exact["test_mse"],
            "test_mse_features": [ft.test_mse.value for ft in fits],
            "test_mse_features_corrected": [ft.test_mse.corrected for ft in fits],
            "test_mse_error_bar": [ft.test_mse.error for ft in fits],
            "alignment_exact": exact["alignment"], "alignment_features": af.value,
            "alignment_error_bar": af.error,
            "alignment_z": abs(af.value - exact["alignment"]) / af.error,
            "load_avg": os.getloadavg()[0],
            **(rows_refined if spec.get("refine") else {}),
        })
        print(json.dumps(rows[-1]), file=sys.stderr, flush=True)
    return rows


def _refined(net, x, phi, eig, spec: dict) -> dict:
    """Top eigenvalues refined by exact products (`ntkcalc.refine_spectrum`) from the features."""
    import numpy as np

    import ntkcalc

    t0 = time.perf_counter()
    op = ntkcalc.ntk_operator(net, x, outputs="trace", memory=spec.get("memory", "3GB"))
    r = ntkcalc.refine_spectrum(phi, op, top=TOP, extra=spec.get("extra", 10))
    rel = np.abs(r.values - eig) / eig
    return {"refined_s": time.perf_counter() - t0, "refined_products": r.products,
            "refined_blocks": r.blocks, "refined_rel_err_max": float(rel.max()),
            "refined_rel_err_mean": float(rel.mean()), "refined_rise_max": float(r.rise.max()),
            "refined_residual_rel_max": float(np.max(r.residuals / r.values)),
            "refined_converged": r.converged, "refined_history": r.history.tolist(),
            "refined_values": r.values.tolist(), "refined_method": r.method}


def _scale(spec: dict) -> list[dict]:
    import resource

    import numpy as np

    import ntkcalc

    from . import scale as bs

    n, k = spec["n"], spec["k"]
    net = bs._net(0)
    with tempfile.TemporaryDirectory(dir=spec.get("dir")) as tmp:
        path = os.path.join(tmp, "x.npy")
        mm = np.lib.format.open_memmap(path, mode="w+", dtype=np.float32, shape=(n, 784))
        step = 50_000
        for r0 in range(0, n, step):
            mm[r0:r0 + step] = bs._inputs(min(step, n - r0), seed=1 + r0)
        mm.flush()
        del mm
        x = np.load(path, mmap_mode="r")
        load0 = os.getloadavg()[0]
        cpu0 = _cpu_seconds()
        t0 = time.perf_counter()
        f = ntkcalc.ntk_features(net, x, k=k, store=os.path.join(tmp, "f.zarr"),
                                 memory=spec.get("memory", "4GB"),
                                 progress=bool(spec.get("progress", False)))
        wall = time.perf_counter() - t0
        cpu = _cpu_seconds() - cpu0
        rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e6
    per = f.seconds / n * 1e5
    return [{"kind": "scale", "N": n, "k": k, "block": f.block, "seconds": wall,
             "blocks_s": f.seconds, "s_per_100k": per, "extrapolated_1M_s": 10 * per,
             "cpu_s": cpu, "cpu_s_per_100k": cpu / n * 1e5, "cores": os.cpu_count(),
             "peak_rss_gb": rss, "memory": spec.get("memory", "4GB"),
             "load_avg_start": load0, "load_avg_end": os.getloadavg()[0]}]


def _cpu_seconds() -> float:
    """User + system CPU seconds of this process (all threads): on a shared machine the wall
    time depends on the neighbours' load, the CPU time much less."""
    import resource

    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def _child(spec: dict) -> list[dict]:
    import jax

    jax.config.update("jax_default_matmul_precision", "highest")
    return _accuracy(spec) if spec["kind"] == "accuracy" else _scale(spec)


def rows(*, n_accuracy: int = 4000, ks=(1024, 2048, 4096), n_scale: int = 100_000,
         k_scale: int = 2048, log=print) -> list[dict]:
    """The benchmark rows, each group in a fresh process."""
    out = []
    for spec in ({"kind": "accuracy", "n": n_accuracy, "ks": list(ks)},
                 {"kind": "scale", "n": n_scale, "k": k_scale}):
        res = run_child(__name__, [json.dumps(spec)], timeout=7200)
        for r in res["rows"]:
            log(r)
            out.append(r)
    return out


if __name__ == "__main__":
    print(json.dumps({"rows": _child(json.loads(sys.argv[1]))}))
