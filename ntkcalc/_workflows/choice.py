"""Which kernel `analyse_run` computes — exact kernels or sketched NTK features — and why.

The choice keeps its numbers as fields (`KernelChoice`): the memory the exact kernels need, the
budget, the planner's time estimates and the limit. Every sentence that says why (the report's
summary and setup, ``RunAnalysis.kinds["kernel"]``, the sketched path's caution) is written from
those fields by `KernelChoice.reason`, so the numbers printed are the numbers saved.

The exact path holds the T trace kernels (N, N) at once; its work is counted as
``T + 2 + A·(1 + O) + A·M/N`` kernels of that size (drift at every checkpoint, the per-group
kernels at the first and last, at each of the A checkpoints of ``forecast_from`` one more and
the full kernel as O of them — ``A·1`` without forecasts — and the test-train kernels, M/N of a
kernel each): our rough count, not measured. Times are the planner's estimates at this
machine's measured rates (`plan_features` plans both), not measurements.
"""

from __future__ import annotations

import dataclasses
from typing import Literal

from .._analysis._result import Result
from .._engine import cost as C
from .._sketch.plan import plan_features

KernelPath = Literal["auto", "exact", "sketch"]

#: ``kernel="auto"`` takes sketched features when the planner's time estimate for the exact
#: kernels the workflow computes (T checkpoints, two per-group passes, the forecasts) exceeds
#: this many seconds (our choice: half an hour, the scale of one N = 50,000 kernel here).
EXACT_SECONDS = 1800.0


@dataclasses.dataclass(frozen=True, repr=False)
class KernelChoice(Result):
    """Which kernel `analyse_run` computed and the numbers it chose by; ``reason`` says it.

    Fields:
        path: ``"exact"`` (kernels by `ntk`) or ``"sketch"`` (features by `ntk_features`).
        requested: the ``kernel`` option: ``"auto"``, ``"exact"`` or ``"sketch"``.
        rule: why: ``"requested"`` (``kernel`` forced the path; nothing was priced),
            ``"memory"`` (the T exact kernels and their computation do not fit ``memory``),
            ``"time"`` (the planner's estimate exceeds ``limit``) or ``"fits"`` (neither: exact).
        checkpoints, num_train: T and N.
        k: features per example of the sketched path (``analyse_run``'s ``features``).
        memory: the budget in bytes, or None when not priced.
        held_bytes: ``T·N²·itemsize``, the T exact trace kernels held at once (None: not priced).
        peak_bytes: the planner's peak working memory of computing one exact kernel (None: not
            priced, or not even one tile fits: ``note`` says why).
        kernels: the exact path's work in kernels of (N, N) (module docstring; None: not priced).
        kernel_seconds: the planner's estimate for one (N, N) trace kernel, seconds.
        exact_seconds: ``kernels · kernel_seconds``, the exact path's estimate.
        limit: ``analyse_run``'s ``exact_seconds`` (the time limit of ``"auto"``).
        features_seconds: the planner's estimate for the sketched path's features (T passes over
            the training set plus the test sets), seconds.
        note: the planner's own words when the exact kernel cannot be planned in the budget.
    """

    path: str
    requested: str
    rule: str
    checkpoints: int
    num_train: int
    k: int
    memory: int | None = None
    held_bytes: float | None = None
    peak_bytes: float | None = None
    kernels: float | None = None
    kernel_seconds: float | None = None
    exact_seconds: float | None = None
    limit: float | None = None
    features_seconds: float | None = None
    note: str = ""

    @property
    def reason(self) -> str:
        """Why this path, in one clause written from the fields (estimates say so)."""
        if self.rule == "requested":
            return f"kernel={self.requested!r}"
        t, n = self.checkpoints, self.num_train
        budget = f"the memory budget of {C.format_bytes(self.memory)}"
        if self.rule == "memory" and self.peak_bytes is None:
            return f"not even one tile of the exact ({n}, {n}) kernel fits {budget} ({self.note})"
        need = (f"the {t} exact ({n}, {n}) kernels need {C.format_bytes(self.held_bytes)} held "
                f"at once plus {C.format_bytes(self.peak_bytes)} to compute one")
        if self.rule == "memory":
            return f"{need}, above {budget}"
        time = (f"the planner estimates the exact kernels at {self.exact_seconds:.3g} s (about "
                f"{self.kernels:.3g} kernels of ≈ {self.kernel_seconds:.3g} s)")
        if self.rule == "time":
            return (f"{time}, above exact_seconds={self.limit:g}; the features at k = {self.k} "
                    f"at ≈ {self.features_seconds:.3g} s")
        return f"{need}, within {budget}, and {time}, within exact_seconds={self.limit:g}"

    def to_dict(self) -> dict:
        """Every field as plain values, and ``reason``, the sentence written from them."""
        return {**dataclasses.asdict(self), "reason": self.reason}


def choose_kernel(kernel: str, nets, x, xt, *, k: int, memory, limit: float, answers: int,
                  forecasts: bool, o: int, to_store: bool) -> KernelChoice:
    """The path of ``analyse_run(kernel=...)`` and its numbers. ``answers``: the checkpoints of
    ``forecast_from``; ``forecasts``: full kernels are computed there (``lr`` given);
    ``to_store``: the features go to stores on disk (memory then holds one block of them)."""
    n, t = int(x.shape[0]), len(nets)
    base = dict(checkpoints=t, num_train=n, k=k)
    if kernel != "auto":
        return KernelChoice(path=kernel, requested=kernel, rule="requested", **base)
    plan = plan_features(nets[0], x, k=k, memory=memory, to_store=to_store)
    passes = t + (answers * xt.shape[0] / n if xt is not None else 0.0)
    priced = dict(base, requested=kernel, memory=plan.memory, limit=float(limit),
                  features_seconds=passes * plan.seconds, note=plan.exact_note)
    if plan.exact is None:
        return KernelChoice(path="sketch", rule="memory", **priced)
    held = t * plan.exact_bytes
    kernels = t + 2 + answers * (1 + (o if forecasts else 0))
    if xt is not None:
        kernels += answers * xt.shape[0] / n
    priced.update(held_bytes=float(held), peak_bytes=float(plan.exact.peak_bytes),
                  kernels=float(kernels), kernel_seconds=float(plan.exact.seconds),
                  exact_seconds=float(kernels * plan.exact.seconds))
    if held + plan.exact.peak_bytes > plan.memory:
        return KernelChoice(path="sketch", rule="memory", **priced)
    if priced["exact_seconds"] > limit:
        return KernelChoice(path="sketch", rule="time", **priced)
    return KernelChoice(path="exact", rule="fits", **priced)
