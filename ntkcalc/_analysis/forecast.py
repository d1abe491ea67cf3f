"""Lazy-training forecast: what gradient descent on the linearized model does, without training.

A network linearized around its initial parameters θ₀, ``f_lin(θ, x) = f(θ₀, x) + J(x)(θ − θ₀)``,
trained by gradient descent moves in function space through its (fixed) neural tangent kernel
``Θ(x, x') = J(x) J(x')ᵀ`` (Jacot, Gabriel & Hongler, NeurIPS 2018, arXiv:1806.07572). Wide
networks trained with small learning rates stay close to it (Lee et al., "Wide Neural Networks of
Any Depth Evolve as Linear Models Under Gradient Descent", NeurIPS 2019, arXiv:1902.06720).

Convention (followed exactly). Loss over the N training examples,

    mse:            L = (1/N) Σ_i ½‖f(x_i) − y_i‖²          (summed over outputs)
    cross-entropy:  L = (1/N) Σ_i −Σ_a y_ia log softmax(f(x_i))_a

and one step ``θ ← θ − lr ∇_θ L``. In function space one step is

    f ← f − (lr/N) Θ g(f),        f_test ← f_test − (lr/N) Θ(test, train) g(f),

with ``g(f) = f − y`` (mse) or ``softmax(f) − y`` (cross-entropy). ``flow=True`` is gradient flow
``df/dt = −(1/N) Θ g(f)`` at times ``t = lr·steps``.
"""

from __future__ import annotations

import dataclasses
import warnings
from typing import Literal, get_args

import numpy as np
import scipy.integrate
import scipy.special

from .._engine.options import check_choice
from .._kind import describe, kind_of
from .._tiles.progress import bar
from .._words import counted
from . import _checks, rank
from ._eig import eigh_descending
from ._result import Result

Loss = Literal["mse", "cross-entropy"]

NON_LAZY = (
    "The observed training loss departs from the linearized forecast by {gap:.1%} (> {tol:.0%}) "
    "at step {step}: this run is not in the lazy (linearized) regime, and the forecast does not "
    "describe it. A wider network or a smaller learning rate brings it closer."
)


@dataclasses.dataclass(frozen=True, repr=False)
class Forecast(Result):
    """Predicted trajectory of the linearized model.

    Fields:
        steps: (T,) gradient steps requested.
        times: (T,) ``lr·steps``, the gradient-flow time.
        train_outputs: (T, N, O) outputs on the training set.
        test_outputs: (T, M, O) outputs on the test set, or None.
        train_loss: (T,) loss (in the module's convention) on the training set.
        test_loss: (T,) loss on the test set, or None without ``y_test``.
        train_accuracy, test_accuracy: (T,) fraction with ``argmax f == label``, for
            classification targets; else None.
        label_format: how the targets were read: "one-hot", "integer" (converted to one-hot) or
            None (regression targets).
        loss: "mse" or "cross-entropy".
        flow: True for gradient flow.
        lr: the learning rate.
        max_stable_lr: ``2N / λ_max(Θ)``: above it gradient descent on the mse loss diverges
            along the top eigenvector.
        stable: the stability verdict, ``lr <= max_stable_lr`` (mse) or ``lr <= 2·max_stable_lr``
            (cross-entropy; see `forecast`); always True for gradient flow.
        kernel: which kernel the forecast used: ``"full"`` (exact, the (N, N, O, O) kernel) or
            ``"per-output"`` (Θ = K ⊗ I_O), with how it was made when that is an assumption.
        kernel_dtype: the dtype the kernel was computed in (a float32 kernel carries about 7
            significant digits whatever the dtype of the forecast's own arithmetic).
    """

    steps: np.ndarray
    times: np.ndarray
    train_outputs: np.ndarray
    test_outputs: np.ndarray | None
    train_loss: np.ndarray
    test_loss: np.ndarray | None
    train_accuracy: np.ndarray | None
    test_accuracy: np.ndarray | None
    label_format: _checks.LabelFormat | None
    loss: Loss
    flow: bool
    lr: float
    max_stable_lr: float
    stable: bool = True
    kernel: str = "full"
    kernel_dtype: str = "float64"

    def departure(self, observed, *, tolerance: float | None = None) -> float:
        """The largest forecast gap over the steps, by the one laziness verdict
        (`ntkcalc._analysis.laziness`); never NaN.

        ``observed`` is what the real network did at ``steps`` while training:

        - (T, N, O) training outputs (or (T, N) for one output), the definition: the gap is
          ``max_t ‖f_obs(t) − f_lin(t)‖_F / ‖f_0 − y‖_F``, relative to the initial residual
          (``‖f_0 − y‖_F = √(2N·L_0)`` for mse). For cross-entropy, whose one-hot targets lie at
          infinite logits, the scale is instead ``max_t ‖f_lin(t) − f_0‖_F``, how far the
          forecast moves the outputs (our choice).
        - (T,) training losses in this module's convention, when outputs were not kept. mse:
          ``max_t |√L_obs − √L_lin| / √L_0 = | ‖f_obs − y‖ − ‖f_lin − y‖ | / ‖f_0 − y‖``, a lower
          bound of the output gap; cross-entropy: ``max_t |L_obs − L_lin| / L_0``.

        A forecast or run that diverged (non-finite values) gives inf, with a RuntimeWarning.
        Warns (RuntimeWarning) with the verdict when the gap exceeds ``tolerance`` (default
        `laziness.GAP_THRESHOLD`, 10%): the run is then not in the lazy regime.
        """
        from . import laziness  # imported here: laziness builds on this module's results

        tol = laziness.GAP_THRESHOLD if tolerance is None else tolerance
        if isinstance(tol, bool) or not isinstance(tol, int | float | np.floating) or tol <= 0:
            raise ValueError(f"`tolerance` must be a number > 0 (or None), got {tolerance!r}.")
        obs = np.asarray(observed, dtype=np.float64)
        outs = self.train_outputs
        if obs.ndim == 1:
            if obs.shape != self.train_loss.shape or np.any(obs < 0):
                raise ValueError(
                    f"`observed` is {obs.shape}: as losses it must hold {len(self.steps)} values "
                    ">= 0, the training loss at each of `steps`."
                )
            root = self.loss == "mse"
            obs_v = np.sqrt(obs) if root else obs
            fc_v = np.sqrt(self.train_loss) if root else self.train_loss
            gap = laziness.output_gap(obs_v[:, None], fc_v[:, None], scale=float(fc_v[0]),
                                      steps=self.steps)
        else:
            if obs.size == outs.size and obs.shape != outs.shape and outs.shape[-1] == 1:
                obs = obs.reshape(outs.shape)
            scale = gap_scale(outs, self.train_loss[0], loss=self.loss)
            gap = laziness.output_gap(obs, outs, scale=scale, steps=self.steps)
        worst = float(np.max(gap))
        if worst > tol:
            verdict = laziness.laziness(forecast_gap=gap, gap_steps=self.steps,
                                        gap_threshold=float(tol))
            warnings.warn(
                f"The training run departs from the linearized forecast — {verdict.sentence}. "
                "This run is not in the lazy (linearized) regime, and the forecast does not "
                "describe it. A wider network or a smaller learning rate brings it closer.",
                RuntimeWarning,
                stacklevel=2,
            )
        return worst


def gap_scale(outputs, initial_loss: float, *, loss: Loss) -> float:
    """The scale of the forecast gap ``‖f_obs − f_lin‖_F / scale`` (`Forecast.departure`).

    Args:
        outputs: (T, N, O) forecast outputs, ``outputs[0]`` the start ``f_0``.
        initial_loss: the forecast's loss at the start, ``L_0`` in this module's convention.
        loss: "mse" or "cross-entropy".

    Returns:
        mse: the initial residual ``‖f_0 − y‖_F = √(2N·L_0)``. Cross-entropy, whose one-hot
        targets lie at infinite logits: how far the forecast moves the outputs,
        ``max_t ‖f_lin(t) − f_0‖_F`` over the finite values (our choice).
    """
    outs = np.asarray(outputs)
    if loss == "mse":
        return float(np.sqrt(2 * outs.shape[1] * initial_loss))
    with np.errstate(invalid="ignore", over="ignore"):
        moved = np.sqrt(np.sum((outs - outs[:1]).reshape(len(outs), -1) ** 2, axis=1))
    return float(np.max(moved[np.isfinite(moved)], initial=0.0))


def _mode_factors(lam, steps, *, lr, n, flow):
    """Per eigenvalue and time: the residual decay and ``(lr/N) Σ_{s<t} decay_s`` (T, P) each.

    Discrete: decay ``q^t`` with ``q = 1 − lr·λ/N``; flow: ``exp(−lr·t·λ/N)``. Both integrals
    equal ``(1 − decay)/λ`` (limit ``lr·t/N`` at λ = 0), evaluated with expm1/log1p so small
    eigenvalues keep their digits.
    """
    x = lr * lam[None, :] / n  # (1, P)
    t = steps[:, None]
    if flow:
        expo = -t * x
        decay, one_minus = np.exp(expo), -np.expm1(expo)
    else:
        safe = x < 1
        logq = np.log1p(-np.where(safe, x, 0.0))
        power = np.power(1.0 - x, t.astype(np.int64)) if not np.all(safe) else None
        decay = np.where(safe, np.exp(t * logq), power if power is not None else 0.0)
        one_minus = np.where(safe, -np.expm1(t * logq), 1.0 - decay)
    zero = lam[None, :] == 0
    integral = np.where(zero, lr * t / n, one_minus / np.where(zero, 1.0, lam[None, :]))
    return decay, integral


def _softmax_residual(f, y):
    return scipy.special.softmax(f, axis=-1) - y


def _mse(f, y):
    return 0.5 * np.sum((f - y) ** 2, axis=(-2, -1)) / f.shape[-2]


def _cross_entropy(f, y):
    return -np.sum(y * scipy.special.log_softmax(f, axis=-1), axis=(-2, -1)) / f.shape[-2]


def _accuracy(f, y):
    return np.mean(np.argmax(f, axis=-1) == np.argmax(y, axis=-1), axis=-1)


def _flat(k_cross, *, n_out: int, full: bool):
    """A test-train kernel as the matrix acting on the training layout."""
    if not full:
        return k_cross
    m, n = k_cross.shape[:2]
    return k_cross.transpose(0, 2, 1, 3).reshape(m * n_out, n * n_out)


def _mse_closed_form(kmat, kx, r0, steps, *, lr, n, flow):
    """Residuals (T, P, C) and test-output changes (T, M', C) by one eigendecomposition."""
    lam, v = eigh_descending(kmat)
    decay, integral = _mode_factors(lam, steps, lr=lr, n=n, flow=flow)
    c0 = v.T @ r0  # (P, C)
    resid = np.einsum("pk,tk,kc->tpc", v, decay, c0)
    delta = None if kx is None else -np.einsum("mk,tk,kc->tmc", kx @ v, integral, c0)
    return resid, delta, lam


def _cross_entropy_path(kmat, kx, f0, y, steps, *, lr, n, flow, ode_rtol, progress):
    """Train outputs (T, N, O) and ``∫₀ᵗ g`` (flow) or ``lr·Σ_{s<t} g_s`` (T, N, O), cross-entropy.

    The test outputs follow as ``f_test,0 − (1/N) Θ(test, train) ∫ g``.
    """
    shape = f0.shape

    def kernel_times(g):
        return (kmat @ g.reshape(kmat.shape[0], -1)).reshape(shape)

    if flow:
        size = f0.size

        def rhs(_, state):
            g = _softmax_residual(state[:size].reshape(shape), y)
            return np.concatenate([-kernel_times(g).ravel() / n, g.ravel()])

        times = lr * steps.astype(np.float64)
        if times[-1] == 0:  # nothing to integrate
            return np.repeat(f0[None], len(times), axis=0), np.zeros((len(times), *shape))
        sol = scipy.integrate.solve_ivp(
            rhs, (0.0, float(times[-1])), np.concatenate([f0.ravel(), np.zeros(size)]),
            method="DOP853", t_eval=times, rtol=ode_rtol, atol=ode_rtol * 1e-3,
        )
        if not sol.success:
            raise RuntimeError(f"The ODE solver failed: {sol.message}")
        states = sol.y.T
        return states[:, :size].reshape(-1, *shape), states[:, size:].reshape(-1, *shape)
    f, summed = f0.copy(), np.zeros_like(f0)
    outs, sums = [], []
    want = iter(steps.tolist())
    target = next(want)
    last = int(steps[-1])
    with bar(last, enabled=progress, desc="ntkcalc forecast", unit="step") as shown:
        for s in range(last + 1):
            while target == s:  # only the requested steps are kept
                outs.append(f.copy())
                sums.append(summed.copy())
                target = next(want, None)
            if s == last:
                break
            g = _softmax_residual(f, y)
            f = f - (lr / n) * kernel_times(g)
            summed = summed + lr * g  # lr·Σ_{s<t} g_s, the discrete counterpart of ∫ g dt
            shown.update(1)
    return np.stack(outs), np.stack(sums)


#: Largest result the forecast builds without being asked differently (bytes): the outputs at
#: every requested step and the per-eigenvalue factors of the closed form.
MAX_RESULT_BYTES = 4 * 2**30

WRONG_KIND = (
    "`{name}` is {what}, but the forecast needs the kernel of each output: it takes an (N, N) "
    "kernel as K in Θ = K ⊗ I_{o} (the same kernel for every output, no cross-output terms), "
    "and {why}. Pass ntkcalc.ntk(net, x, outputs='full') (exact; (N, N, {o}, {o})), or "
    "ntkcalc.per_output_kernel({name}) (K = {how}, exact only if Θ = K ⊗ I_{o})."
)


def _per_output_or_full(name: str, k, *, num_outputs: int) -> str:
    """Which kernel ``k`` is for a forecast over ``num_outputs`` outputs, or a refusal.

    An (N, N, O, O) array is the full kernel (exact). An (N, N) array is accepted as the
    per-output kernel when the model has one output, or when it says it is one
    (`ntkcalc.per_output_kernel`); a trace, logit-sum or unlabelled (N, N) kernel of a model
    with several outputs is refused, since using it as K would be wrong by a factor of about O.
    """
    kind, o = kind_of(k)
    ndim = _checks.ndim_of(k)
    if kind is not None and o is not None and o != num_outputs:
        raise ValueError(
            f"`{name}` is {describe(kind, o)}, but the outputs have "
            f"{counted(num_outputs, 'column')}: "
            "the kernel and the outputs must come from the same model."
        )
    if ndim == 4:
        return "full"
    if ndim == 2 and (num_outputs == 1 or kind == "per-output"):
        note = getattr(k, "note", None) if kind == "per-output" else None
        return "per-output" + (f" ({note})" if note else "")
    if ndim == 2 and kind in ("trace", "logit-sum"):
        why = ("the trace Σ_a Θ_aa is O times K" if kind == "trace"
               else "the kernel of Σ_a f_a is O times K")
        how = f"{name} / {num_outputs}"
        raise ValueError(WRONG_KIND.format(name=name, what=describe(kind, o), o=num_outputs,
                                           why=f"{why} under that assumption", how=how))
    if ndim == 2 and np.shape(k)[0] == np.shape(k)[1] or ndim == 2 and name != "k_train":
        raise ValueError(
            f"`{name}` is an (N, N) array of unknown kind and the model has {num_outputs} "
            f"outputs. The forecast reads an (N, N) kernel as K in Θ = K ⊗ I_{num_outputs} (the "
            "same kernel for every output); a trace kernel read that way would make the forecast "
            f"{num_outputs} times too fast. Pass the array ntkcalc.ntk returned (it knows its "
            f"kind), the exact ntkcalc.ntk(net, x, outputs='full'), or, if this array is K, "
            f"ntkcalc.per_output_kernel({name}, num_outputs={num_outputs})."
        )
    if ndim == 3:
        raise ValueError(WRONG_KIND.format(
            name=name, what=describe("diagonal", num_outputs), o=num_outputs,
            why="the 'diagonal' kernel drops the cross-output terms of the exact kernel",
            how="the mean of the O output kernels"))
    return "full"  # other ranks are refused with their shape by the validation that follows


def _check_result_size(count: int, *, rows: int, n_out: int, cols: int) -> None:
    """Refuse, naming ``steps``, a request whose kept outputs would not fit in memory."""
    need = 8 * count * (2 * rows * n_out + 3 * cols)
    if need > MAX_RESULT_BYTES:
        raise ValueError(
            f"`steps` asks for {counted(count, 'snapshot')} of {rows:,} × "
            f"{counted(n_out, 'output')}, about "
            f"{need / 2**30:.1f} GiB. Only the requested steps are kept: pass the steps you "
            "want to see as a sorted array, e.g. np.unique(np.geomspace(1, S, 100).astype(int))."
        )


def _check_psd(lam: np.ndarray, *, dtype: str) -> None:
    """Refuse a kernel with an eigenvalue below zero by more than rounding.

    The yardstick is the one rank rule's: ``−rank.MARGIN · σ_max·n·ε(dtype)`` (`rank`); LAPACK's
    eigenvalues of a PSD matrix stored in precision ε are accurate to about n·ε·λ_max (Weyl's
    inequality; Golub & Van Loan, "Matrix Computations", 4th ed., §8.1).
    """
    if not lam.size:
        return
    tol = rank.MARGIN * rank.rounding_tolerance(float(np.max(np.abs(lam))), lam.shape, dtype)
    if lam[-1] < -tol:
        raise ValueError(
            f"`k_train` is not positive semi-definite: its smallest eigenvalue is "
            f"{lam[-1]:.3g}, below the rounding bound −{tol:.2g} for {dtype}. A neural tangent "
            "kernel is a Gram matrix J Jᵀ and has no negative eigenvalues; gradient descent "
            "through this matrix would diverge along that direction. Check how it was built "
            "(a sign, a difference of kernels, a test-train block passed as train-train)."
        )


def forecast(
    k_train,
    y_train,
    f0_train,
    *,
    lr: float,
    steps,
    k_test_train=None,
    f0_test=None,
    y_test=None,
    loss: Loss = "mse",
    flow: bool = False,
    ode_rtol: float = 1e-9,
    progress: bool = True,
) -> Forecast:
    """Forecast gradient descent (or flow) on the linearized model from its kernel.

    See the module docstring for the loss and step convention. For ``loss="mse"`` every step
    comes from one eigendecomposition ``Θ = V Λ Vᵀ``: the residual ``r = f − y`` evolves as
    ``V (1 − lr Λ/N)^t Vᵀ r₀`` (flow: ``V exp(−t Λ/N) Vᵀ r₀``) and the test outputs as
    ``f_test,0 − Θ(test, train) V ((1 − decay_t)/Λ) Vᵀ r₀``, the closed-form sum over past steps
    (Lee et al., NeurIPS 2019, arXiv:1902.06720, eqs. for the linearized dynamics). For
    ``loss="cross-entropy"`` the function-space map is iterated (discrete, exact for the
    linearized model) or integrated by ``scipy.integrate.solve_ivp`` (DOP853, ``rtol=ode_rtol``).

    Which kernel: the exact forecast takes the full kernel, ``ntkcalc.ntk(net, x,
    outputs="full")``, of shape (N, N, O, O). An (N, N) kernel is read as K in ``Θ = K ⊗ I_O``
    (the same kernel for every output): a model with one output, or a kernel made by
    `ntkcalc.per_output_kernel` (e.g. from the trace kernel at scale, an approximation that the
    result's ``kernel`` field names). A trace, logit-sum or diagonal kernel of a model with
    several outputs, or a plain (N, N) array whose kind is unknown, is refused: read as K, the
    trace kernel would make the forecast O times too fast.

    Args:
        k_train: the full (N, N, O, O) kernel ``Θ[i, j, a, b]``, or an (N, N) per-output kernel
            (see above).
        y_train: targets: (N,) or (N, O) values, (N,) integer labels in ``[0, O)`` (converted to
            one-hot) or (N, O) one-hot. Cross-entropy needs labels (integer or one-hot).
        f0_train: (N,) or (N, O) outputs of the network at initialization.
        lr: learning rate > 0.
        steps: an int S (meaning 0, 1, ..., S) or a sorted (T,) array of step counts >= 0
            (whole numbers unless ``flow``).
        k_test_train: optional (M, N) (or (M, N, O, O), matching ``k_train``) test-train kernel.
        f0_test: (M,) or (M, O) initial test outputs; required with ``k_test_train``.
        y_test: optional test targets, in the same format as ``y_train``.
        loss: "mse" or "cross-entropy".
        flow: gradient flow at times ``lr·steps`` instead of discrete steps.
        ode_rtol: relative tolerance of the ODE solver (cross-entropy flow only).
        progress: a progress bar over steps for the iterated cross-entropy path, shown once it
            lasts over a second.

    Returns:
        `Forecast`.

    Raises:
        ValueError for a kernel of the wrong kind (above), a kernel that is not positive
        semi-definite beyond rounding, or ``steps`` whose snapshots would not fit in memory.

    Warns:
        RuntimeWarning if ``lr`` exceeds ``max_stable_lr = 2N/λ_max`` (mse, discrete): gradient
        descent then diverges along the top eigenvector and so would the real network. For
        cross-entropy the curvature of the loss in the outputs is at most ½ (Gershgorin bound on
        ``diag(p) − ppᵀ``), so the warning comes above ``2·max_stable_lr``.
    """
    check_choice("loss", loss, get_args(Loss))
    lr = _checks.positive("lr", lr)
    f0 = _checks.finite_array("f0_train", f0_train, ndim=(1, 2))
    n = f0.shape[0]
    f0 = f0.reshape(n, -1)
    n_out = f0.shape[1]
    if isinstance(steps, int | np.integer) and not isinstance(steps, bool) and steps >= 0:
        # S means 0, 1, ..., S: refuse a huge S before allocating the list of steps
        _check_result_size(int(steps) + 1, rows=n, n_out=n_out, cols=n)
    steps = _checks.sorted_times("steps", steps, integer=not flow)
    kernel_used = _per_output_or_full("k_train", k_train, num_outputs=n_out)
    kernel_dtype = str(rank.precision_of(k_train))
    kmat, block = _checks.kernel_to_flat("k_train", k_train, num_outputs=n_out)
    kshape = np.shape(k_train)
    if kmat.shape[0] != (n if block else n * n_out):
        raise ValueError(_checks.ROWS_MISMATCH.format(
            name="f0_train", rows=n, kname="k_train", kshape=kshape))
    onehot, fmt = _checks.labels("y_train", y_train, n=n, num_classes=n_out, kname="k_train",
                                 kshape=kshape)
    y = onehot if onehot is not None else _checks.targets(
        "y_train", y_train, n=n, kname="k_train", kshape=kshape)
    _checks.same_outputs("y_train", y, want=n_out, ref="`f0_train`")
    if loss == "cross-entropy" and fmt is None:
        raise ValueError(
            "`loss='cross-entropy'` needs classification targets: `y_train` must be (N,) "
            "integer labels or (N, O) one-hot rows. Got real-valued targets; use loss='mse'."
        )

    kx = f0_t = y_t = None
    if (k_test_train is None) != (f0_test is None):
        raise ValueError(
            "`k_test_train` and `f0_test` go together: the test outputs evolve from `f0_test` "
            "through `k_test_train`. Pass both or neither."
        )
    if y_test is not None and k_test_train is None:
        raise ValueError("`y_test` needs `k_test_train` and `f0_test` to forecast test outputs.")
    if k_test_train is not None:
        _per_output_or_full("k_test_train", k_test_train, num_outputs=n_out)
        tail = () if block else (n_out, n_out)
        kx_raw = _checks.cross_kernel("k_test_train", k_test_train, n=n, kname="k_train",
                                      tail=tail)
        m = kx_raw.shape[0]
        f0_t = _checks.targets("f0_test", f0_test, n=m, kname="k_test_train",
                               kshape=kx_raw.shape)
        _checks.same_outputs("f0_test", f0_t, want=n_out, ref="`f0_train`")
        kx = _flat(kx_raw, n_out=n_out, full=not block)
        if y_test is not None:
            oh_t, _ = _checks.labels("y_test", y_test, n=m, num_classes=n_out,
                                     kname="k_test_train", kshape=kx_raw.shape)
            y_t = oh_t if fmt is not None and oh_t is not None else _checks.targets(
                "y_test", y_test, n=m, kname="k_test_train", kshape=kx_raw.shape)
            _checks.same_outputs("y_test", y_t, want=n_out, ref="`f0_train`")

    _check_result_size(len(steps), rows=n + (0 if f0_t is None else f0_t.shape[0]),
                       n_out=n_out, cols=kmat.shape[0])
    if loss == "mse":
        cols = kmat.shape[0]
        resid, delta, lam = _mse_closed_form(
            kmat, kx, (f0 - y).reshape(cols, -1), steps, lr=lr, n=n, flow=flow)
        train = y[None] + resid.reshape(-1, n, n_out)
        test = None if kx is None else f0_t[None] + delta.reshape(-1, *f0_t.shape)
        loss_fn = _mse
    else:
        lam = eigh_descending(kmat, vectors=False)
        train, summed = _cross_entropy_path(
            kmat, kx, f0, y, steps, lr=lr, n=n, flow=flow, ode_rtol=ode_rtol, progress=progress)
        test = None if kx is None else f0_t[None] - np.einsum(
            "mp,tpc->tmc", kx, summed.reshape(len(steps), kmat.shape[0], -1)
        ).reshape(-1, *f0_t.shape) / n
        loss_fn = _cross_entropy
    _check_psd(lam, dtype=kernel_dtype)
    lam_max = float(lam[0])
    max_lr = 2.0 * n / lam_max if lam_max > 0 else float("inf")
    limit = max_lr if loss == "mse" else 2.0 * max_lr
    stable = bool(flow or lr <= limit)
    if not stable:
        warnings.warn(
            f"`lr`={lr:g} exceeds the stability limit {limit:.4g} (2N/λ_max = {max_lr:.4g}"
            f"{'' if loss == 'mse' else ', doubled for cross-entropy'}): gradient descent "
            "diverges along the top kernel eigenvector, and the forecast (like the training run) "
            "blows up. Use a smaller learning rate.",
            RuntimeWarning,
            stacklevel=2,
        )
    return Forecast(
        steps=steps,
        times=lr * steps.astype(np.float64),
        train_outputs=train,
        test_outputs=test,
        train_loss=loss_fn(train, y),
        test_loss=None if y_t is None else loss_fn(test, y_t),
        train_accuracy=None if fmt is None else _accuracy(train, y),
        test_accuracy=None if fmt is None or y_t is None else _accuracy(test, y_t),
        label_format=fmt,
        loss=loss,
        flow=bool(flow),
        lr=lr,
        max_stable_lr=max_lr,
        stable=stable,
        kernel=kernel_used,
        kernel_dtype=kernel_dtype,
    )
