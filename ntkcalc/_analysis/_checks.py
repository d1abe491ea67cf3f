"""Up-front validation shared by every analysis function.

Each check raises with a message that names the argument, says what it received and what to do.
Messages used in more than one place are module constants.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
import scipy.sparse.linalg as spla

from .._words import counted

#: Relative asymmetry ``max|K - Kᵀ| / max|K|`` above which a kernel is rejected. Kernels computed
#: in float32 are symmetric to about 1e-7 relative; anything larger is not a kernel matrix.
SYMMETRY_RTOL = 1e-6

ROWS_MISMATCH = (
    "`{name}` has {rows} rows but `{kname}` is {kshape}: both need one row per training example."
)
NOT_FINITE = (
    "`{name}` contains {count} non-finite value(s) (NaN or Inf). Remove or fix them; a kernel or "
    "target with NaN/Inf gives meaningless answers."
)
NOT_SQUARE = (
    "`{name}` must be a square (n, n) kernel matrix, got shape {shape}. Pass the train-train "
    "kernel; the test-train kernel goes in its own argument."
)
NOT_SYMMETRIC = (
    "`{name}` is not symmetric: max|K - Kᵀ| / max|K| = {asym:.3g} > {rtol:g}. A kernel matrix "
    "must be symmetric; symmetrize it with (K + K.T) / 2 only if the asymmetry is rounding."
)
CROSS_MISMATCH = (
    "`{name}` is {shape} but the training kernel `{kname}` has {n} rows: a test-train kernel "
    "needs shape (M, {n}{tail}), one column per training example."
)
NEGATIVE = "`{name}` must be >= 0, got {value}. Pass a non-negative value."
NOT_POSITIVE = "`{name}` must be > 0, got {value}. Pass a positive value."
OUTPUT_MISMATCH = (
    "`{name}` has {got} output(s) per example but {ref} has {want}: both need the same number of "
    "outputs (columns)."
)

LabelFormat = Literal["one-hot", "integer"]


def finite_array(name: str, a, *, ndim: tuple[int, ...] | None = None) -> np.ndarray:
    """``a`` as a float64 ndarray with no NaN/Inf, optionally of one of the given ranks.

    Refused with a message naming ``name``: anything numpy cannot read as a regular numeric
    array (ragged nested lists, objects, strings) and complex values, whose imaginary part a
    cast to float64 would drop silently.
    """
    if a is None or isinstance(a, str | bytes | dict):
        raise TypeError(
            f"`{name}` must be a numeric array, got {type(a).__name__}. Pass a numpy array."
        )
    try:
        raw = np.asarray(a)
        if np.iscomplexobj(raw):
            raise TypeError(
                f"`{name}` is complex ({raw.dtype}); kernels, targets and outputs here are real. "
                f"Pass the real part explicitly (`{name}.real`) if the imaginary part is rounding."
            )
        arr = np.asarray(raw, dtype=np.float64)
    except (TypeError, ValueError) as err:
        if isinstance(err, TypeError) and str(err).startswith(f"`{name}`"):
            raise
        raise TypeError(
            f"`{name}` must be a numeric array, got {type(a).__name__}"
            f"{' (ragged or not numeric)' if isinstance(a, list | tuple) else ''}. Pass a regular "
            "numpy array."
        ) from err
    if ndim is not None and arr.ndim not in ndim:
        want = " or ".join(f"{d}-D" for d in ndim)
        raise ValueError(f"`{name}` must be {want}, got shape {arr.shape}.")
    bad = int(arr.size - np.count_nonzero(np.isfinite(arr)))
    if bad:
        raise ValueError(NOT_FINITE.format(name=name, count=bad))
    return arr


def ndim_of(a) -> int:
    """``np.ndim(a)``, or -1 when numpy cannot read ``a`` as a regular array (ragged, objects):
    for dispatching on a shape before `finite_array` names the argument in its refusal."""
    try:
        return int(np.ndim(a))
    except (TypeError, ValueError):
        return -1


def square_kernel(name: str, k) -> np.ndarray:
    """A finite symmetric (n, n) float64 kernel, symmetrized exactly as (K + Kᵀ)/2."""
    if isinstance(k, spla.LinearOperator):
        raise TypeError(
            f"`{name}` is a LinearOperator, but this function needs the kernel as an array. "
            "Pass a numpy array (or use a function that accepts operators)."
        )
    k = finite_array(name, k)
    if k.ndim != 2 or k.shape[0] != k.shape[1]:
        raise ValueError(NOT_SQUARE.format(name=name, shape=k.shape))
    if k.shape[0] == 0:
        raise ValueError(
            f"`{name}` is an empty (0, 0) kernel: there is nothing to analyse. Compute the "
            "kernel on at least one example."
        )
    scale = float(np.max(np.abs(k))) if k.size else 0.0
    asym = float(np.max(np.abs(k - k.T))) / scale if scale > 0 else 0.0
    if asym > SYMMETRY_RTOL:
        raise ValueError(NOT_SYMMETRIC.format(name=name, asym=asym, rtol=SYMMETRY_RTOL))
    return 0.5 * (k + k.T)


def square_operator(name: str, op) -> spla.LinearOperator:
    """``op`` as a square LinearOperator."""
    if not isinstance(op, spla.LinearOperator):
        raise TypeError(
            f"`{name}` must be a scipy.sparse.linalg.LinearOperator, got {type(op).__name__}."
        )
    if len(op.shape) != 2 or op.shape[0] != op.shape[1]:
        raise ValueError(NOT_SQUARE.format(name=name, shape=op.shape))
    return op


def targets(
    name: str, y, *, n: int, kname: str, kshape: tuple, num_classes: int | None = None
) -> np.ndarray:
    """Targets as a finite float64 (n, O) array, by the one label convention of every analysis.

    - A 1-D array of integers (or booleans) is class labels: it becomes one-hot rows (n, C),
      with C = ``num_classes`` (the model's outputs, where known) or ``max(y) + 1``. Labels read
      as one scalar target would make alignments, drifts and fits of a classification task
      meaningless.
    - Any float array is regression targets: (n,) is one column, (n, O) is O columns. Pass
      integer-valued regression targets as floats (``y.astype(float)``).
    """
    if is_label_array(y):
        return one_hot(name, y, n=n, num_classes=num_classes, kname=kname, kshape=kshape)
    y = finite_array(name, y, ndim=(1, 2))
    rows(name, y, n=n, kname=kname, kshape=kshape)
    return y.reshape(n, -1)


def is_label_array(y) -> bool:
    """True for a 1-D integer or boolean array: class labels under the label convention."""
    dtype = getattr(y, "dtype", None)
    if dtype is None:
        try:
            y = np.asarray(y)
        except (TypeError, ValueError):  # ragged or not numeric: finite_array says so by name
            return False
        dtype = y.dtype
    return np.ndim(y) == 1 and (np.issubdtype(dtype, np.integer) or dtype == np.bool_)


def one_hot(
    name: str, y, *, n: int, num_classes: int | None, kname: str, kshape: tuple
) -> np.ndarray:
    """Integer class labels (n,) as one-hot rows (n, C) in float64."""
    arr = np.asarray(y).astype(np.int64)
    rows(name, arr, n=n, kname=kname, kshape=kshape)
    if arr.size == 0:
        return np.zeros((0, num_classes or 0))
    c = int(arr.max()) + 1 if num_classes is None else num_classes
    if arr.min() < 0 or arr.max() >= c:
        where = f"the model has {counted(c, 'output')}" if num_classes is not None else "classes"
        raise ValueError(
            f"`{name}` holds integer labels in [{arr.min()}, {arr.max()}] but {where}: labels "
            f"must lie in [0, {c}). Integer arrays are read as class labels; pass one-hot "
            "targets, labels matching the outputs, or regression targets as floats "
            f"(`{name}.astype(float)`)."
        )
    return np.eye(c)[arr]


def rows(name: str, a, *, n: int, kname: str, kshape: tuple) -> None:
    """``a`` must have ``n`` rows, one per training example of the kernel ``kname``."""
    if np.shape(a)[0] != n:
        raise ValueError(
            ROWS_MISMATCH.format(name=name, rows=np.shape(a)[0], kname=kname, kshape=kshape)
        )


def cross_kernel(name: str, k, *, n: int, kname: str, tail: tuple = ()) -> np.ndarray:
    """A finite test-train kernel of shape (M, n, *tail)."""
    k = finite_array(name, k)
    if k.ndim != 2 + len(tail) or k.shape[1] != n or tuple(k.shape[2:]) != tuple(tail):
        tail_txt = "".join(f", {t}" for t in tail)
        raise ValueError(
            CROSS_MISMATCH.format(name=name, shape=k.shape, kname=kname, n=n, tail=tail_txt)
        )
    return k


def same_outputs(name: str, a: np.ndarray, *, want: int, ref: str) -> None:
    """``a`` (rows, O) must have ``want`` columns."""
    if a.shape[1] != want:
        raise ValueError(OUTPUT_MISMATCH.format(name=name, got=a.shape[1], ref=ref, want=want))


def examples(name: str, x) -> np.ndarray:
    """Inputs as an ndarray with at least one example on axis 0."""
    x = np.asarray(x)
    if x.ndim < 1 or x.shape[0] == 0:
        raise ValueError(
            f"`{name}` must have at least one example on axis 0, got shape {x.shape}."
        )
    return x


def nonnegative(name: str, value) -> np.ndarray:
    """A finite scalar or 1-D array of values >= 0 (a ridge, a noise variance)."""
    arr = finite_array(name, value, ndim=(0, 1))
    if arr.size == 0:
        raise ValueError(f"`{name}` is empty. Pass at least one value.")
    if np.any(arr < 0):
        raise ValueError(NEGATIVE.format(name=name, value=value))
    return arr


def positive(name: str, value) -> float:
    """A finite scalar > 0 (a learning rate, a size); a boolean is no number here."""
    if isinstance(value, bool | np.bool_):
        raise TypeError(f"`{name}` must be a number > 0, got {value!r}.")
    arr = finite_array(name, value, ndim=(0,))
    if not arr > 0:
        raise ValueError(NOT_POSITIVE.format(name=name, value=value))
    return float(arr)


def positive_int(name: str, value) -> int:
    """An integer >= 1 (a count of queries, a batch size)."""
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < 1:
        raise ValueError(f"`{name}` must be an integer >= 1, got {value!r}.")
    return int(value)


def seed(name: str, value):
    """A seed for ``numpy.random.default_rng``: None, an integer >= 0 or a ``Generator``."""
    if value is None or isinstance(value, np.random.Generator):
        return value
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < 0:
        raise TypeError(
            f"`{name}` must be None, an integer >= 0 or a numpy Generator, got {value!r}."
        )
    return int(value)


def sorted_times(name: str, values, *, integer: bool) -> np.ndarray:
    """A 1-D, non-decreasing array of values >= 0; an int ``S`` means ``0, 1, ..., S``."""
    if ndim_of(values) == 0 and integer:
        if isinstance(values, bool) or not isinstance(values, int | np.integer) or values < 0:
            raise ValueError(
                f"`{name}` must be a whole number S >= 0 (meaning 0, 1, ..., S) or a sorted 1-D "
                f"array, got {values!r}."
            )
        return np.arange(int(values) + 1)
    arr = finite_array(name, values, ndim=(1,))
    if arr.size == 0:
        raise ValueError(f"`{name}` is empty. Pass at least one value.")
    if np.any(arr < 0):
        raise ValueError(NEGATIVE.format(name=name, value=values))
    if np.any(np.diff(arr) < 0):
        raise ValueError(
            f"`{name}` must be sorted in increasing order, got {arr.tolist()[:8]}"
            f"{'...' if arr.size > 8 else ''}. Pass np.sort({name})."
        )
    if integer:
        if np.any(arr != np.round(arr)):
            raise ValueError(
                f"`{name}` must hold whole numbers of gradient steps, got {arr.tolist()[:8]}. "
                "Pass integers, or use flow=True for continuous time."
            )
        return arr.astype(np.int64)
    return arr


def labels(name: str, y, *, n: int, num_classes: int, kname: str, kshape: tuple):
    """Classification targets as (one-hot (n, C) float64, format) or (None, None) if not labels.

    Integer labels are a 1-D integer array with values in ``[0, num_classes)`` (see `targets`);
    one-hot targets are an (n, num_classes) array whose rows are 0/1 with a single 1. Anything
    else is treated as regression targets (no accuracy).
    """
    if is_label_array(y):
        return one_hot(name, y, n=n, num_classes=num_classes, kname=kname,
                       kshape=kshape), "integer"
    y2 = targets(name, y, n=n, kname=kname, kshape=kshape)
    if y2.shape[1] == num_classes and num_classes > 1:
        is_01 = np.all((y2 == 0) | (y2 == 1))
        if is_01 and np.all(y2.sum(axis=1) == 1):
            return y2, "one-hot"
    return None, None


def kernel_to_flat(name: str, k, *, num_outputs: int) -> tuple[np.ndarray, bool]:
    """An (N, N) or (N, N, O, O) kernel as the (N·O, N·O) matrix over (example, output) pairs.

    Returns the validated matrix and whether it was block-diagonal (the (N, N) case, taken as
    K ⊗ I_O; then the returned matrix is the (N, N) K itself, to be used once per output).
    """
    arr = finite_array(name, k, ndim=(2, 4))
    if arr.ndim == 2:
        return square_kernel(name, arr), True
    n, n2, o, o2 = arr.shape
    if n != n2 or o != o2:
        raise ValueError(
            f"`{name}` must be (N, N) or (N, N, O, O), got {arr.shape}. Pass the kernel over "
            "examples (and outputs) of the training set."
        )
    if o != num_outputs:
        raise ValueError(
            f"`{name}` is {arr.shape}, a kernel over {counted(o, 'output')}, but the outputs "
            f"have {counted(num_outputs, 'column')}: they must agree."
        )
    return square_kernel(name, arr.transpose(0, 2, 1, 3).reshape(n * o, n * o)), False


ILL_CONDITIONED = (
    "{what} is ill-conditioned (condition number ≈ {cond:.2g}): about {digits:.0f} of 16 float64 "
    "digits of the solution may be lost. Increase `ridge`, or treat the result as approximate."
)

#: Condition number above which a solve warns (leaves fewer than ~4 correct digits in float64).
COND_WARN = 1e12


def warn_if_ill_conditioned(cond: float, *, what: str, stacklevel: int = 3) -> None:
    """Warn (RuntimeWarning) when ``cond`` exceeds `COND_WARN`."""
    import warnings

    if not np.isfinite(cond) or cond > COND_WARN:
        digits = 16.0 if not np.isfinite(cond) else min(16.0, float(np.log10(cond)))
        warnings.warn(
            ILL_CONDITIONED.format(what=what, cond=cond, digits=digits),
            RuntimeWarning,
            stacklevel=stacklevel,
        )
