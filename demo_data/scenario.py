"""The demo scenario: a made-up ferry operator predicting crossing times.

Everything here is invented for the demo. The fictional operator "Saltmarsh Ferries" runs a
short crossing; a crossing's duration in minutes depends on wind speed, wave height, the
vehicle load and the hour of departure, plus noise of a known variance (so the demo can show
the irreducible part of the error separately). The operator's data-science team holds back
the last season's crossings as the sealed holdout; two modelling groups submit predictions
from scikit-learn models of increasing complexity, each trained on several bootstrap draws
of the training crossings (the seeds), together with their predictions on those training
rows.

The cast (``build``):

- ``pruned-tree`` (group harbour-models): the model in service today, a depth-6 tree; the
  owner makes it the holdout-wide reference (the champion);
- ``straight-line``: a linear model, too simple for the curved effect of the waves and the
  rush hours: high bias, almost no variance;
- ``random-split-tree``: one fully grown tree splitting on a random feature at each node:
  its five bootstrap fits disagree, high variance;
- ``full-depth-tree``: a fully grown tree that reproduces its training crossings almost
  exactly: overfit (its held-out loss is several times its training loss);
- the ``tree-depth`` sweep (group tide-lab): trees of depth 1 to 14;
- ``spline-ridge`` (tide-lab): smooth splines per feature with a ridge penalty, a challenger
  that is at least as good as the champion;
- ``shallow-tree`` (tide-lab): a depth-3 tree, cheaper to run, but worse than the champion
  by more than the owner's margin.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray
from sklearn.linear_model import LinearRegression, Ridge
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import SplineTransformer
from sklearn.tree import DecisionTreeRegressor, ExtraTreeRegressor

NOISE_SD = 1.5
"""Standard deviation (minutes) of the crossing-time noise the generator adds; its square is
the known noise variance the demo passes along."""

FEATURES = ("wind_speed_kn", "wave_height_m", "vehicle_load_pct", "departure_hour")

SWEEP_DEPTHS = (1, 2, 3, 4, 5, 6, 8, 10, 14)
"""Tree depths of tide-lab's complexity sweep."""


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
    make_model: Callable[[int], Any],
    train: Crossings,
    test: Crossings,
    n_seeds: int,
    rng: np.random.Generator,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Fit one model per bootstrap draw of the training rows; predict test and training rows.

    Returns predictions of shape (n_seeds, n_test) and (n_seeds, n_train).
    """
    m = train.minutes.size
    test_pred = np.empty((n_seeds, test.minutes.size))
    train_pred = np.empty((n_seeds, m))
    for k in range(n_seeds):
        rows = rng.integers(0, m, m)
        model = make_model(k).fit(train.features[rows], train.minutes[rows])
        test_pred[k] = model.predict(test.features)
        train_pred[k] = model.predict(train.features)
    return test_pred, train_pred


def _spline_ridge(k: int) -> Any:
    return make_pipeline(SplineTransformer(n_knots=6), Ridge(alpha=1e-3))


MODELS: dict[str, tuple[str, Callable[[int], Any], str]] = {
    "pruned-tree": (
        "harbour-models",
        lambda k: DecisionTreeRegressor(max_depth=6, random_state=k),
        "the model in service today (depth-6 tree); becomes the reference",
    ),
    "straight-line": (
        "harbour-models",
        lambda k: LinearRegression(),
        "a linear model: high bias",
    ),
    "random-split-tree": (
        "harbour-models",
        lambda k: ExtraTreeRegressor(max_features=1, random_state=k),
        "one fully grown tree with random splits: high variance",
    ),
    "full-depth-tree": (
        "harbour-models",
        lambda k: DecisionTreeRegressor(random_state=k),
        "a fully grown tree: overfit to its training crossings",
    ),
    "spline-ridge": (
        "tide-lab",
        _spline_ridge,
        "splines per feature with a ridge penalty: the challenger",
    ),
    "shallow-tree": (
        "tide-lab",
        lambda k: DecisionTreeRegressor(max_depth=3, random_state=k),
        "a depth-3 tree, cheaper to run than the champion",
    ),
}
"""The named models: group, model factory (seed -> estimator), and what each shows."""


def build(
    n_train: int = 600, n_holdout: int = 2000, n_seeds: int = 5, seed: int = 7
) -> tuple[Crossings, dict[str, DemoSubmission], list[DemoSubmission]]:
    """Return the holdout, the named submissions (``MODELS``) and the tree-depth sweep.

    ``n_holdout`` rows of the last season (ids ``crossing-00000``, ...); ``n_train`` training
    crossings; ``n_seeds`` bootstrap fits per model.
    """
    rng = np.random.default_rng(seed)
    train = sample_crossings(n_train, rng, "train")
    holdout = sample_crossings(n_holdout, rng, "crossing")

    def submission(
        model: str, make_model: Callable[[int], Any], complexity: float | None = None,
        notes: dict[str, str] | None = None,
    ) -> DemoSubmission:
        test_pred, train_pred = fit_bootstrap(make_model, train, holdout, n_seeds, rng)
        return DemoSubmission(model, complexity, test_pred, train.minutes, train_pred,
                              dict(notes or {}))

    named = {
        name: submission(name, make, notes={"group": group, "about": about})
        for name, (group, make, about) in MODELS.items()
    }
    sweep = [
        submission(
            f"tree-depth-{d}",
            lambda k, d=d: DecisionTreeRegressor(max_depth=d, random_state=k),
            d,
            {"group": "tide-lab"},
        )
        for d in SWEEP_DEPTHS
    ]
    return holdout, named, sweep
