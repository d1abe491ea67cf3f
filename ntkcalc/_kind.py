"""What a kernel array is: which outputs mode made it, over how many outputs, at what precision.

`ntkcalc.ntk` returns a `KernelArray`: a numpy array that remembers its *kind* (the ``outputs``
mode of the call, or ``"per-output"``), the model's number of outputs O and its dtype. Analyses
read the kind so that a kernel can never be used as something it is not: the trace kernel
``Σ_a Θ_aa`` is O times the per-output kernel when ``Θ = K ⊗ I_O`` and is not a per-output kernel
otherwise, so an analysis that assumes ``K ⊗ I_O`` (a forecast, a convergence rate, a stability
limit) refuses it and names the call that gives the right kernel.

The kind survives what keeps its meaning — slicing examples (``k[:100, :100]``), transposing,
copying — and is dropped by anything that changes values (``k / 4``, ``k + k2``, in-place
arithmetic) or shape in a way that does not match it (``k_full[:, :, 0, 0]``): those give a plain
array, which an analysis treats as a kernel of unknown kind.
"""

from __future__ import annotations

from typing import Literal, get_args

import numpy as np

from ._engine.options import check_choice
from ._words import counted

Kind = Literal["full", "trace", "diagonal", "logit-sum", "per-output"]

#: Rank of the array each kind has: (N1, N2, O, O), (N1, N2), (N1, N2, O), (N1, N2), (N1, N2).
KIND_NDIM: dict[str, int] = {
    "full": 4, "trace": 2, "diagonal": 3, "logit-sum": 2, "per-output": 2,
}


class KernelArray(np.ndarray):
    """A kernel as a numpy array that knows its kind.

    Attributes:
        kind: ``"full"`` (N1, N2, O, O), ``"trace"`` Σ_a Θ_aa (N1, N2), ``"diagonal"`` (N1, N2, O),
            ``"logit-sum"`` the kernel of Σ_a f_a (N1, N2), or ``"per-output"`` (N1, N2), the
            kernel K of one output when Θ = K ⊗ I_O.
        num_outputs: the model's number of outputs O.
        note: how it was made when that matters (e.g. ``"trace / 4, assuming Θ = K ⊗ I_4"``).

    Use it as any numpy array; ``np.asarray(k)`` is the plain array. Arithmetic returns plain
    arrays, since ``k / 4`` is no longer the kernel ``k`` says it is.
    """

    kind: str | None
    num_outputs: int | None
    note: str | None

    def __new__(cls, values, *, kind: Kind, num_outputs: int, note: str | None = None):
        obj = np.asarray(values).view(cls)
        check_choice("kind", kind, get_args(Kind))
        obj.kind, obj.num_outputs, obj.note = kind, int(num_outputs), note
        return obj

    def __array_finalize__(self, obj) -> None:
        self.kind = getattr(obj, "kind", None)
        self.num_outputs = getattr(obj, "num_outputs", None)
        self.note = getattr(obj, "note", None)

    def __array_ufunc__(self, ufunc, method, *inputs, **kwargs):
        plain = tuple(np.asarray(a) if isinstance(a, KernelArray) else a for a in inputs)
        out = kwargs.get("out")
        if out is not None:
            for o in out:  # values change in place: the array is no longer the kernel it was
                if isinstance(o, KernelArray):
                    o.kind = o.num_outputs = o.note = None
            kwargs["out"] = tuple(np.asarray(o) if isinstance(o, KernelArray) else o for o in out)
        return getattr(ufunc, method)(*plain, **kwargs)

    def __array_function__(self, func, types, args, kwargs):
        # numpy functions (concatenate, mean, linalg, ...) give plain arrays: their results are
        # not kernels of the same kind in general.
        def strip(a):
            if isinstance(a, KernelArray):
                return np.asarray(a)
            if isinstance(a, list | tuple):
                return type(a)(strip(b) for b in a)
            return a

        return func(*strip(args), **{k: strip(v) for k, v in kwargs.items()})

    def __reduce__(self):  # pickling (multiprocessing, joblib) keeps the kind
        state = super().__reduce__()
        return state[0], state[1], (*state[2], (self.kind, self.num_outputs, self.note))

    def __setstate__(self, state):
        *base, extra = state
        super().__setstate__(tuple(base))
        self.kind, self.num_outputs, self.note = extra

    def __repr__(self) -> str:
        head = np.array2string(np.asarray(self), threshold=20, edgeitems=2, precision=4)
        tag = f"kind={self.kind!r}, num_outputs={self.num_outputs}, dtype={self.dtype}"
        if self.note:
            tag += f", note={self.note!r}"
        return f"KernelArray({head}, {tag})"


def kind_of(k) -> tuple[str | None, int | None]:
    """``(kind, O)`` of a kernel, or ``(None, None)`` when unknown (a plain array).

    A `KernelArray` (or a stored kernel view with ``kind``/``num_outputs``) whose rank does not
    match its kind — e.g. ``k_full[:, :, 0, 0]`` — counts as unknown.
    """
    kind = getattr(k, "kind", None)
    if kind is None or getattr(k, "ndim", None) != KIND_NDIM.get(kind, -1):
        return None, None
    return kind, getattr(k, "num_outputs", None)


def describe(kind: str | None, num_outputs: int | None) -> str:
    """A short phrase naming a kernel kind and the call that makes it."""
    if kind is None:
        return "a plain array of unknown kind"
    over = "" if num_outputs is None else f" over {counted(num_outputs, 'output')}"
    if kind == "per-output":
        return f"the per-output kernel (K of Θ = K ⊗ I_{num_outputs or 'O'})"
    return f"the {kind!r} kernel{over} (ntkcalc.ntk(..., outputs={kind!r}))"


def per_output_kernel(k, *, num_outputs: int | None = None) -> KernelArray:
    """The per-output kernel K of ``Θ = K ⊗ I_O``, for analyses that assume that structure.

    Forecasts, convergence rates and stability limits of gradient descent with an (N, N) kernel
    take it as the same kernel for every output with no cross-output terms. The exact kernel of
    a finite network is not of this form; ``ntkcalc.ntk(..., outputs="full")`` gives the exact
    (N, N, O, O) kernel, which those analyses accept as it is. When the full kernel is too large,
    this function gives the usual approximation:

    - from a ``"trace"`` kernel: ``Σ_a Θ_aa / O`` (exact if Θ = K ⊗ I_O);
    - from a ``"full"`` kernel: the same mean of its diagonal output blocks;
    - from a ``"diagonal"`` kernel: the mean over its O output kernels;
    - from a ``"logit-sum"`` kernel (Θ of Σ_a f_a, which is O·K under K ⊗ I_O): ``Θ / O``;
    - from a plain (N, N) array: the array itself, which you assert is per-output (pass
      ``num_outputs``).

    Returns:
        `KernelArray` of kind ``"per-output"``, with a ``note`` saying how it was made.
    """
    kind, o = kind_of(k)
    if kind is None:
        arr = np.asarray(k)
        if arr.ndim != 2:
            raise ValueError(
                f"`k` is a plain array of shape {arr.shape}; a per-output kernel is (N1, N2). "
                "Pass a kernel returned by ntkcalc.ntk, or the (N1, N2) per-output kernel."
            )
        if num_outputs is None:
            raise ValueError(
                "`k` is a plain (N1, N2) array, so its kind is unknown. If it is the kernel of "
                "each output (Θ = K ⊗ I_O), say so with `num_outputs=O`; if it is a trace "
                "kernel, divide by O first or pass the array ntkcalc.ntk returned."
            )
        return KernelArray(arr, kind="per-output", num_outputs=num_outputs,
                           note="given as per-output")
    if o is None:  # e.g. a stored kernel reopened from disk: the store knows its kind, not O
        if num_outputs is None:
            raise ValueError(
                f"`k` is {describe(kind, o)} whose number of outputs O is not recorded: pass "
                "`num_outputs=O`, the model's number of outputs."
            )
        o = int(num_outputs)
    elif num_outputs is not None and num_outputs != o:
        raise ValueError(
            f"`num_outputs`={num_outputs} but `k` is {describe(kind, o)}: leave it out."
        )
    arr = np.asarray(k)
    if kind == "per-output":
        return k
    if kind == "full":
        arr = np.einsum("ijaa->ij", arr) / o
    elif kind == "diagonal":
        arr = arr.mean(axis=2)
    else:  # trace, logit-sum
        arr = arr / o
    note = None if o == 1 else f"{kind} / {o}, assuming Θ = K ⊗ I_{o}"
    return KernelArray(arr, kind="per-output", num_outputs=o, note=note)
