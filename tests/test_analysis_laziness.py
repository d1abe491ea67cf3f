"""The laziness verdict against actual training runs (optax) and dense float64 references.

Runs: a tanh MLP in the NTK parameterization on 16 Gaussian inputs with targets sin(x·w), full-
batch optax.sgd on L = (1/N) Σ ½‖f − y‖². Wide networks at small learning rates stay close to
their linearization (Lee et al., NeurIPS 2019, arXiv:1902.06720); narrow ones at large learning
rates do not. Kernels of independent initializations come from different PRNG keys; the spread
between them is checked against its definition on dense jax.jacrev kernels (tests/helpers.py).
"""

from __future__ import annotations

import functools
import json
import warnings

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
from helpers import reference_full

import ntkcalc
from ntkcalc._analysis.forecast import forecast
from ntkcalc._analysis.laziness import (
    GAP_THRESHOLD,
    KERNEL_THRESHOLD,
    InitSpread,
    Laziness,
    init_spread,
    laziness,
    relative_change,
)

RNG = np.random.default_rng(0)
X = RNG.standard_normal((16, 3))
Y = np.sin(X @ RNG.standard_normal((3, 1)))


def _init(key, width):
    k1, k2 = jax.random.split(key)
    return {"w1": jax.random.normal(k1, (3, width)), "b1": 0.1 * jnp.ones(width),
            "w2": jax.random.normal(k2, (width, 1)), "b2": jnp.zeros(1)}


def _apply(p, x):
    h = jnp.tanh(x @ p["w1"] / np.sqrt(x.shape[-1]) + p["b1"][None, :])
    return h @ p["w2"] / np.sqrt(h.shape[-1]) + p["b2"][None, :]


def _kernel(net):
    return np.asarray(ntkcalc.ntk(net, X, progress=False))


@functools.cache
def _run(width: int, lr_fraction: float, steps: int) -> dict:
    """Train at ``lr_fraction`` of the stability limit 2N/λ_max; outputs and losses per step."""
    net = ntkcalc.Net(_apply, _init(jax.random.key(0), width))
    k0 = _kernel(net)
    f0 = np.asarray(_apply(net.params, X))
    lr = lr_fraction * 2 * len(X) / np.linalg.eigvalsh(k0)[-1]
    loss = lambda p: 0.5 * jnp.sum((_apply(p, X) - Y) ** 2) / len(X)
    opt = optax.sgd(lr)

    @jax.jit
    def step(p, state):
        updates, state = opt.update(jax.grad(loss)(p), state)
        return optax.apply_updates(p, updates), state

    params, state = net.params, opt.init(net.params)
    outs, losses = [], []
    for s in range(steps + 1):
        outs.append(np.asarray(_apply(params, X)))
        losses.append(float(loss(params)))
        if s < steps:
            params, state = step(params, state)
    inits = [net.replace(params=_init(jax.random.key(i), width)) for i in (1, 2)]
    return {"net": net, "k0": k0, "k_final": _kernel(net.replace(params=params)),
            "inits": inits, "k_inits": [_kernel(n) for n in inits],
            "forecast": forecast(k0, Y, f0, lr=lr, steps=steps),
            "outputs": np.stack(outs), "losses": np.array(losses)}


def _verdict(run) -> Laziness:
    from ntkcalc._analysis.alignment import kernel_distance

    k0, k1 = run["k0"], run["k_final"]
    return laziness(relative_change=relative_change(k1, k0), distance=kernel_distance(k1, k0),
                    forecast_gap=run["forecast"].departure(run["outputs"], tolerance=np.inf),
                    spread=init_spread([k0, *run["k_inits"]]))


def test_wide_net_tracking_its_forecast_reads_lazy():
    # Width 256, lr = max_stable_lr / 2, 1000 steps: the loss falls 50-fold. Measured: outputs
    # within 4.5% of the initial residual of the forecast, kernel change 2.3% (init spread
    # 6.6%), while the old relative loss gap |L_obs − L_lin| / L_lin reached 13.5%: the
    # issue's false "not lazy" as the loss goes to zero.
    run = _run(256, 0.5, 1000)
    fc, losses = run["forecast"], run["losses"]
    assert losses[-1] < losses[0] / 20
    old = np.max(np.abs(losses - fc.train_loss) / fc.train_loss)
    assert old > GAP_THRESHOLD
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        gap = fc.departure(run["outputs"])
        loss_gap = fc.departure(losses)
    assert gap < 0.06 and loss_gap <= gap + 1e-12  # from losses: a lower bound
    verdict = _verdict(run)
    assert verdict.lazy and verdict.failed == () and verdict.sentence.startswith("lazy:")
    assert verdict.relative_change < KERNEL_THRESHOLD and verdict.beyond_spread is False


def test_narrow_net_at_large_lr_reads_not_lazy():
    # Width 8, lr = 0.9·max_stable_lr, 300 steps. Measured: kernel change 29%, outputs off the
    # forecast by 84% of the initial residual; independent inits differ by 34%.
    run = _run(8, 0.9, 300)
    with pytest.warns(RuntimeWarning, match="not in the lazy"):
        gap = run["forecast"].departure(run["outputs"])
    assert gap > 0.5
    verdict = _verdict(run)
    assert not verdict.lazy and verdict.sentence.startswith("not lazy")
    assert verdict.relative_change > 0.2
    # the kernel's change is above the threshold but within the spread between inits, so the
    # forecast gap decides, and says the outputs left the forecast
    assert verdict.failed == ("forecast_gap",) and "relative_change" in verdict.within_spread
    assert verdict.beyond_spread is False and "outputs left the forecast" in verdict.sentence
    # from the kernels alone (as drift sees it) the run is not called lazy either
    kernels_only = laziness(relative_change=verdict.relative_change, distance=verdict.distance,
                            spread=verdict.spread)
    assert not kernels_only.lazy and "measure the forecast gap" in kernels_only.sentence


def test_init_spread_from_independent_inits():
    # Definition on dense float64 jax.jacrev kernels (tests/helpers.py) of the three inits:
    # mean over pairs of ‖K_a − K_b‖_F / √(‖K_a‖_F ‖K_b‖_F) and 1 − cos(K_a, K_b).
    narrow, wide = _run(8, 0.9, 300), _run(256, 0.5, 1000)
    nets = [narrow["net"], *narrow["inits"]]
    ks = [reference_full(n, X)[:, :, 0, 0] for n in nets]
    pairs = [(0, 1), (0, 2), (1, 2)]
    change = np.mean([np.linalg.norm(ks[a] - ks[b])
                      / np.sqrt(np.linalg.norm(ks[a]) * np.linalg.norm(ks[b])) for a, b in pairs])
    dist = np.mean([1 - np.sum(ks[a] * ks[b]) / (np.linalg.norm(ks[a]) * np.linalg.norm(ks[b]))
                    for a, b in pairs])
    spread = init_spread([narrow["k0"], *narrow["k_inits"]])
    assert isinstance(spread, InitSpread) and spread.count == 3
    np.testing.assert_allclose([spread.relative_change, spread.distance], [change, dist],
                               rtol=1e-9)
    # The init fluctuation shrinks as 1/√width (Lee et al. 2019): 8 → 256 is √32 ≈ 5.7
    # (measured 5.2 with three inits each).
    ratio = spread.relative_change / init_spread([wide["k0"], *wide["k_inits"]]).relative_change
    assert 3 < ratio < 10


def test_diverged_forecast_gives_inf_with_a_warning():
    # lr = 3·max_stable_lr: the top mode grows by |1 − 6| = 5 per step and overflows float64
    # within 500 steps; the gap is inf (never NaN) and a warning says the forecast diverged.
    run = _run(8, 0.9, 300)
    k0 = run["k0"]
    f0 = run["outputs"][0]
    lr = 3 * 2 * len(X) / np.linalg.eigvalsh(k0)[-1]
    with pytest.warns(RuntimeWarning) as log:  # numpy's overflow warnings come along
        fc = forecast(k0, Y, f0, lr=lr, steps=np.array([0, 10, 500]))
    assert any("stability limit" in str(w.message) for w in log)
    assert not np.all(np.isfinite(fc.train_outputs[-1]))
    observed = np.stack([f0, f0, f0])
    with pytest.warns(RuntimeWarning) as log:
        gap = fc.departure(observed)
    messages = " | ".join(str(w.message) for w in log)
    assert "linearized forecast diverged" in messages and "from step 500" in messages
    assert "not in the lazy" in messages and "inf (diverged)" in messages
    assert gap == np.inf
    observed = run["outputs"].copy()
    observed[-1] = np.nan  # a run that diverged at its last step
    with pytest.warns(RuntimeWarning) as log:
        assert run["forecast"].departure(observed) == np.inf
    assert "observed run (`observed`) diverged" in str(log[0].message)


def test_verdict_from_curves_names_the_first_failing_step():
    steps = np.array([0, 10, 20, 40])
    v = laziness(relative_change=[0.0, 0.02, 0.06, 0.09], distance=[0.0, 0.001, 0.01, 0.02],
                 steps=steps, forecast_gap=[0.0, 0.2], gap_steps=[0, 5])
    assert not v.lazy and v.failed == ("relative_change", "forecast_gap") and v.first_step == 5
    assert v.sentence.startswith("not lazy (from step 5)") and "the kernel moved" in v.sentence
    assert v.beyond_spread is None and "up to 9.00%" in v.sentence
    spread = InitSpread(relative_change=0.01, distance=0.001, count=3)
    v = laziness(relative_change=[0.0, 0.06], spread=spread)
    assert v.beyond_spread and "beyond what the initialization alone changes" in v.sentence
    v = laziness(distance=0.01)
    assert v.lazy and v.first_step is None and v.forecast_gap is None
    wide = InitSpread(relative_change=0.1, distance=0.01, count=3)  # the kernel within it
    v = laziness(relative_change=[0.0, 0.067], forecast_gap=[0.0, 0.03], spread=wide)
    assert v.lazy and v.within_spread == ("relative_change",) and v.beyond_spread is False
    assert "the outputs follow the forecast" in v.sentence
    json.dumps(laziness(relative_change=0.01, spread=spread).to_dict())
    # the kind and precision of the kernels compared are carried and shown
    v = laziness(relative_change=0.01, kind="trace", precision=np.float32)
    assert (v.kind, v.precision) == ("trace", "float32")
    assert "kind='trace', precision='float32'" in repr(v)
    assert laziness(distance=0.01).kind is None and laziness(distance=0.01).precision is None
    with pytest.raises(ValueError, match="`kind`='exact' is not known"):
        laziness(distance=0.1, kind="exact")
    with pytest.raises(ValueError, match="at least one criterion"):
        laziness()
    with pytest.raises(ValueError, match="`kernel_threshold` must be a finite number > 0"):
        laziness(distance=0.1, kernel_threshold=0)
    with pytest.raises(ValueError, match="`forecast_gap` has 2 values but its steps have 3"):
        laziness(forecast_gap=[0.1, 0.2], gap_steps=[0, 1, 2])
    with pytest.raises(ValueError, match="at least 2 kernels"):
        init_spread([np.eye(3)])


def test_estimates_decide_only_two_error_bars_clear_of_the_threshold():
    # A criterion given with standard errors σ (sketched features) passes below threshold − 2σ,
    # fails above threshold + 2σ, and is otherwise "not resolved" (neither lazy nor not lazy);
    # the sentence prints each estimate with its error bar. Two σ: our choice (module docstring).
    steps = [0, 10, 20]
    near_zero = laziness(distance=[0.0, 2.0e-5, 4.2e-5], distance_error=[0.0, 7.5e-5, 1.1e-4],
                         steps=steps)
    assert near_zero.lazy and near_zero.outcome == "lazy" and near_zero.unresolved == ()
    assert near_zero.distance == 4.2e-5 and near_zero.distance_error == 1.1e-4
    assert "up to 0.004% ± 0.011%" in near_zero.sentence  # to the error's 2nd digit
    assert "within 2 standard errors of 0 at every step: no change resolved" in near_zero.sentence
    # an estimate below 0 (noise) is accepted with its error bar, and printed as it is
    below = laziness(distance=[0.0, -3.0e-5], distance_error=[0.0, 1.0e-4])
    assert below.lazy and "up to -0.003% ± 0.010%" in below.sentence
    # within 2σ of the threshold: not resolved, whichever side of it the estimate is
    for value in (0.046, 0.054):
        v = laziness(distance=[0.0, value], distance_error=[0.0, 0.003], steps=[0, 5])
        assert not v.lazy and v.outcome == "not resolved" and v.failed == ()
        assert v.unresolved == ("distance",) and v.first_step is None
        assert v.sentence.startswith("not resolved: ") and "cannot tell" in v.sentence
        assert f"up to {value:.2%} ± 0.30%" in v.sentence
        assert v.to_dict()["outcome"] == "not resolved"
    # clear of it by more than 2σ: decided, the failing step named
    v = laziness(distance=[0.0, 0.049, 0.07], distance_error=[0.0, 0.003, 0.009], steps=steps)
    assert v.outcome == "not lazy" and v.failed == ("distance",) and v.first_step == 20
    assert v.sentence.startswith("not lazy (from step 20)")
    # the printed step is the one that decides: the widest interval, not the largest estimate
    v = laziness(distance=[0.0, 0.03, 0.028], distance_error=[0.0, 0.001, 0.02], steps=steps)
    assert v.outcome == "not resolved" and (v.distance, v.distance_error) == (0.028, 0.02)
    # a tiny threshold inside the interval around 0: not resolved either
    v = laziness(distance=[0.0, 3e-5], distance_error=[0.0, 2e-5], kernel_threshold=1e-5)
    assert v.outcome == "not resolved" and "threshold 0.001%" in v.sentence
    # without error bars nothing changes: no interval, the old verdict and wording
    v = laziness(distance=[0.0, 0.049])
    assert v.lazy and v.distance_error is None and "±" not in v.sentence
    with pytest.raises(ValueError, match="`distance` must be a non-negative number"):
        laziness(distance=[0.0, -1e-5])
    with pytest.raises(ValueError, match="`distance_error` must be finite standard errors"):
        laziness(distance=[0.0, 0.01], distance_error=[0.0])
    with pytest.raises(ValueError, match="`relative_change_error` was given without"):
        laziness(distance=0.01, relative_change_error=0.001)
