"""The demo scenario: a made-up ferry operator predicting crossing times.

Everything here is invented for the demo. The fictional operator "Saltmarsh Ferries" runs a
short crossing; a crossing's duration in minutes depends on wind speed, wave height, the
vehicle load and the hour of departure, plus noise of a known variance (so the demo can show
the irreducible part of the error separately). The operator's data-science team holds back
the last season's crossings as the sealed holdout; modelling groups submit predictions from
scikit-learn models of increasing complexity, each trained on several bootstrap draws of the
training crossings, together with their predictions on those training rows.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray
from sklearn.linear_model import LinearRegression
from sklearn.tree import DecisionTreeRegressor

NOISE_SD = 1.5
"""Standard deviation (minutes) of the crossing-time noise the generator adds; its square is
the known noise variance the demo passes along."""

FEATURES = ("wind_speed_kn", "wave_height_m", "vehicle_load_pct", "departure_hour")


@dataclass(frozen=True)
class Crossings:
    ids: list[str]
    features: NDArray[np.float64]
    minutes: NDArray[np.float64]


@dataclass(frozen=True)
class DemoSubmission:
    """One model's predictions: K bootstrap fits, on the holdout and on their training rows."""

    model: str
    complexity: float | None
    predictions: NDArray[np.float64]  # (K, n_holdout)
    train_minutes: NDArray[np.float64]  # (m,)
    train_predictions: NDArray[np.float64]  # (K, m)
    notes: dict[str, str] = field(default_factory=dict)


def crossing_minutes(x: NDArray[np.float64]) -> NDArray[np.float64]:
    """The (invented) true mean crossing time for feature rows x."""
    wind, waves, load, hour = x.T
    rush = np.exp(-0.5 * ((hour - 8.0) / 1.2) ** 2) + np.exp(-0.5 * ((hour - 17.5) / 1.5) ** 2)
    return (
        22.0
        + 0.18 * wind
        + 3.5 * np.sin(1.7 * waves) * waves
        + 0.04 * load
        + 4.0 * rush
        + 0.002 * wind**2 * (waves > 1.5)
    )


def sample_crossings(n: int, rng: np.random.Generator, prefix: str) -> Crossings:
    """Draw n crossings with noisy durations."""
    x = np.column_stack(
        [
            rng.gamma(2.0, 6.0, n),  # wind speed, knots
            rng.uniform(0.2, 3.0, n),  # wave height, metres
            rng.uniform(10.0, 100.0, n),  # vehicle deck load, percent
            rng.uniform(5.0, 23.0, n),  # departure hour
        ]
    )
    y = crossing_minutes(x) + rng.normal(0.0, NOISE_SD, n)
    ids = [f"{prefix}-{i:05d}" for i in range(n)]
    return Crossings(ids, x, y)


def fit_bootstrap(
    make_model, train: Crossings, test: Crossings, n_seeds: int, rng: np.random.Generator
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Fit one model per bootstrap draw of the training rows; predict test and training rows."""
    m = train.minutes.size
    test_pred = np.empty((n_seeds, test.minutes.size))
    train_pred = np.empty((n_seeds, m))
    for k in range(n_seeds):
        rows = rng.integers(0, m, m)
        model = make_model(k).fit(train.features[rows], train.minutes[rows])
        test_pred[k] = model.predict(test.features)
        train_pred[k] = model.predict(train.features)
    return test_pred, train_pred


def build(
    n_train: int = 600, n_holdout: int = 2000, n_seeds: int = 5, seed: int = 7
) -> tuple[Crossings, list[DemoSubmission], list[DemoSubmission]]:
    """Return the holdout, the named submissions, and the tree-depth sweep submissions."""
    rng = np.random.default_rng(seed)
    train = sample_crossings(n_train, rng, "train")
    holdout = sample_crossings(n_holdout, rng, "crossing")

    def submission(model: str, make_model, complexity: float | None = None) -> DemoSubmission:
        test_pred, train_pred = fit_bootstrap(make_model, train, holdout, n_seeds, rng)
        return DemoSubmission(model, complexity, test_pred, train.minutes, train_pred)

    named = [
        submission("straight-line", lambda k: LinearRegression()),
        submission("deep-tree", lambda k: DecisionTreeRegressor(random_state=k)),
        submission("pruned-tree", lambda k: DecisionTreeRegressor(max_depth=6, random_state=k)),
    ]
    sweep = [
        submission(f"tree-depth-{d}", lambda k, d=d: DecisionTreeRegressor(max_depth=d, random_state=k), d)
        for d in (1, 2, 3, 4, 5, 6, 8, 10, 14)
    ]
    return holdout, named, sweep
