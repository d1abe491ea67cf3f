"""A seeded generator of pump condition-monitoring readings, the built-in data of the demo.

Each example is one snapshot of a centrifugal pump: its operating point (shaft speed, load,
ambient temperature) and what its sensors read (vibration velocity at 1× and 2× running speed,
axial vibration, high-frequency envelope acceleration, kurtosis of the acceleration signal,
bearing temperature, motor current and its sideband level). The label is the pump's condition:

- ``healthy``;
- ``bearing wear``: high-frequency envelope energy, kurtosis and bearing temperature rise;
- ``imbalance``: 1× vibration grows with the square of the speed;
- ``misalignment``: 2× and axial vibration rise, with some 1× and extra current.

Faults come with a random severity in ``[0.15, 1]``, so mild faults overlap healthy pumps and the
task is not separable. The model inputs are log amplitudes and temperatures, centered and scaled
with the training set's statistics. The data are invented for demonstrations and notebooks; they
describe no real machine.
"""

from __future__ import annotations

import dataclasses

import numpy as np

CLASS_NAMES = ("healthy", "bearing wear", "imbalance", "misalignment")

FEATURES = (
    ("speed", "rpm"),
    ("load", "fraction of rated"),
    ("ambient temperature", "°C"),
    ("vibration 1×", "mm/s"),
    ("vibration 2×", "mm/s"),
    ("axial vibration", "mm/s"),
    ("envelope acceleration", "g"),
    ("kurtosis", "1"),
    ("bearing temperature", "°C"),
    ("motor current", "A"),
    ("current sideband", "dB"),
)

#: Features whose logarithm is the model input (positive amplitudes).
_LOG_FEATURES = (3, 4, 5, 6, 7)


@dataclasses.dataclass(frozen=True, repr=False)
class PumpReadings:
    """Sensor snapshots of pumps and their conditions.

    Fields:
        x: (N, F) model inputs: log amplitudes and temperatures, standardized with the training
            set's mean and standard deviation.
        raw: (N, F) readings in the units of `units`.
        labels: (N,) integer condition in ``[0, C)``, an index into `class_names`.
        severity: (N,) fault severity in [0, 1] (0 for healthy pumps).
        feature_names: (F,) names of the columns.
        units: (F,) units of the raw columns.
        class_names: (C,) names of the conditions.
    """

    x: np.ndarray
    raw: np.ndarray
    labels: np.ndarray
    severity: np.ndarray
    feature_names: tuple[str, ...]
    units: tuple[str, ...]
    class_names: tuple[str, ...]

    @property
    def one_hot(self) -> np.ndarray:
        """(N, C) one-hot targets."""
        return np.eye(len(self.class_names))[self.labels]

    def __len__(self) -> int:
        return int(self.labels.shape[0])

    def __repr__(self) -> str:
        counts = np.bincount(self.labels, minlength=len(self.class_names))
        parts = ", ".join(f"{c}: {k}" for c, k in zip(self.class_names, counts, strict=True))
        return f"PumpReadings({len(self)} examples × {self.x.shape[1]} features; {parts})"


def _simulate(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Raw readings (n, F), labels (n,) and severities (n,)."""
    labels = rng.integers(0, len(CLASS_NAMES), size=n)
    severity = np.where(labels == 0, 0.0, rng.uniform(0.15, 1.0, size=n))
    bearing, imbalance, misalign = ((labels == c) * severity for c in (1, 2, 3))

    speed = rng.choice([1480.0, 2960.0], size=n) * rng.normal(1.0, 0.01, size=n)
    s = speed / 2960.0  # fraction of the top speed
    load = rng.uniform(0.35, 1.0, size=n)
    ambient = rng.normal(24.0, 6.0, size=n)

    def lognormal(median, spread):
        return median * np.exp(rng.normal(0.0, spread, size=n))

    vib_1x = lognormal(1.2, 0.35) * (0.5 + 0.5 * s) * (1 + 5.0 * imbalance * s**2 + 1.2 * misalign)
    vib_2x = lognormal(0.5, 0.35) * (1 + 3.5 * misalign + 0.3 * imbalance)
    axial = lognormal(0.6, 0.35) * (1 + 3.0 * misalign)
    envelope = lognormal(0.15, 0.4) * (0.4 + 0.6 * s) * (1 + 6.0 * bearing)
    kurtosis = 3.0 + lognormal(0.3, 0.5) * (1 + 12.0 * bearing**2)
    bearing_temp = (ambient + 18.0 + 12.0 * load * s + 20.0 * bearing + 4.0 * misalign
                    + rng.normal(0.0, 3.0, size=n))
    current = (14.0 + 26.0 * load * s**1.5) * (1 + 0.06 * misalign + 0.03 * imbalance) + rng.normal(
        0.0, 0.8, size=n)
    sideband = -52.0 + 9.0 * bearing + 3.0 * imbalance + rng.normal(0.0, 2.5, size=n)

    raw = np.stack([speed, load, ambient, vib_1x, vib_2x, axial, envelope, kurtosis,
                    bearing_temp, current, sideband], axis=1)
    return raw, labels.astype(np.int64), severity


def _inputs(raw: np.ndarray) -> np.ndarray:
    out = raw.copy()
    out[:, _LOG_FEATURES] = np.log(raw[:, _LOG_FEATURES])
    return out


def pump_readings(
    n_train: int, n_test: int, *, seed: int = 0
) -> tuple[PumpReadings, PumpReadings]:
    """Simulated train and test readings of pumps in four conditions.

    Args:
        n_train: number of training examples (>= 8).
        n_test: number of test examples (>= 1), drawn from the same distribution.
        seed: seed of the generator; the same seed gives the same readings.

    Returns:
        ``(train, test)`` `PumpReadings`; both are standardized with the training statistics.
    """
    for name, value, low in (("n_train", n_train, 8), ("n_test", n_test, 1)):
        if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < low:
            raise ValueError(f"`{name}` must be an integer >= {low}, got {value!r}.")
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer):
        raise TypeError(f"`seed` must be an integer, got {type(seed).__name__}.")
    rng = np.random.default_rng(seed)
    raw, labels, severity = _simulate(rng, int(n_train) + int(n_test))
    inputs = _inputs(raw)
    mean = inputs[:n_train].mean(axis=0)
    std = inputs[:n_train].std(axis=0)
    x = (inputs - mean) / np.where(std > 0, std, 1.0)

    def part(rows: slice) -> PumpReadings:
        return PumpReadings(
            x=x[rows], raw=raw[rows], labels=labels[rows], severity=severity[rows],
            feature_names=tuple(name for name, _ in FEATURES),
            units=tuple(unit for _, unit in FEATURES), class_names=CLASS_NAMES,
        )

    return part(slice(0, n_train)), part(slice(n_train, None))
