"""The sweep chart marks the minimum and the one-standard-error choice, and shades underfit
and overfit regions exactly where the sweep has such points."""

from __future__ import annotations

import math

import numpy as np
import pytest
from chartdata import diabetes, floats, marks, sweep_result, tree_predictions
from sklearn.linear_model import Ridge
from sklearn.metrics import mean_squared_error
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import PolynomialFeatures, StandardScaler

from service.charts import ChartInputError, format_number, sweep_chart
from service.scoring import sweep_from_predictions, to_jsonable

SUBSETS = [tuple(range(1, 9)), (1,), (1, 2, 3), (2, 3, 4)]


def _drawn_points(found: dict[str, dict[str, str]]) -> list[tuple[float, float, float]]:
    """(complexity, test loss, SE) of every drawn test-loss point, by complexity."""
    points = [
        (float(a["data-x"]), float(a["data-value"]), float(a["data-se"]))
        for gid, a in found.items()
        if gid.startswith("point-test_loss-")
    ]
    return sorted(points)


def test_marks_the_minimum_and_the_one_se_choice() -> None:
    sweep = sweep_result()
    chart = sweep_chart(sweep)
    found = marks(chart.svg())
    points = _drawn_points(found)
    # the rule (Breiman et al. 1984; ESL 7.10), applied by the test to the drawn points:
    # lowest test loss, then the smallest complexity within one SE of it
    best = min(points, key=lambda p: p[1])
    threshold = best[1] + best[2]
    one_se = min(p[0] for p in points if p[1] <= threshold)
    assert float(found["marker-best-0"]["data-x"]) == best[0]
    assert float(found["marker-best-0"]["data-value"]) == best[1]
    assert float(found["marker-one_se-0"]["data-x"]) == one_se
    assert float(found["marker-threshold-0"]["data-value"]) == threshold
    assert one_se < best[0]  # this sweep tells the two apart (precondition of the test)
    # the same complexities as the scoring core's result
    assert (best[0], one_se) == (sweep["best_complexity"], sweep["one_se_complexity"])
    rows = {row["complexity"]: row for row in chart.table}
    assert rows[best[0]]["lowest_test_loss"] and rows[one_se]["one_se_choice"]
    assert sum(row["lowest_test_loss"] for row in chart.table) == 1
    assert sum(row["one_se_choice"] for row in chart.table) == 1
    assert f"one-standard-error choice is complexity {format_number(one_se)}" in chart.alt_text


def test_test_loss_points_match_scikit_learn() -> None:
    _, _, _, y_te = diabetes()
    found = marks(sweep_chart(sweep_result()).svg())
    for complexity, loss, se in _drawn_points(found):
        test, _ = tree_predictions(int(complexity))
        # reference: sklearn.metrics.mean_squared_error, averaged over seeds
        reference = np.mean([mean_squared_error(y_te, p) for p in test])
        assert loss == pytest.approx(reference, rel=1e-12)
        # the SE: sd (ddof=1) of the per-row loss over sqrt(n), the scoring core's definition
        row_losses = np.mean((test - y_te) ** 2, axis=0)
        assert se == pytest.approx(row_losses.std(ddof=1) / math.sqrt(y_te.size), rel=1e-9)


@pytest.mark.parametrize("depths", SUBSETS, ids=lambda d: "-".join(map(str, d)))
def test_regions_shaded_exactly_where_points_are_underfit_or_overfit(
    depths: tuple[int, ...],
) -> None:
    sweep = sweep_result(depths)
    found = marks(sweep_chart(sweep).svg())
    complexities = sorted(p["complexity"] for p in sweep["points"])
    for region in ("underfit", "overfit"):
        members = {p["complexity"] for p in sweep["points"] if p["region"] == region}
        shaded = {gid: a for gid, a in found.items() if gid.startswith(f"region-{region}-")}
        assert bool(shaded) == bool(members), (region, depths)
        covered: set[float] = set()
        for attrs in shaded.values():
            inside = set(floats(attrs["data-complexities"]))
            covered |= inside
            x0, x1 = float(attrs["data-x0"]), float(attrs["data-x1"])
            # the span holds exactly its points: every point's complexity inside it is one
            assert {c for c in complexities if x0 < c < x1} == inside
        assert covered == members


def test_region_subsets_cover_both_cases() -> None:
    """Precondition of the parametrized test: some subsets shade nothing, some shade both."""
    kinds = [{p["region"] for p in sweep_result(d)["points"]} for d in SUBSETS]
    assert any(not ({"underfit", "overfit"} & k) for k in kinds)
    assert any({"underfit", "overfit"} <= k for k in kinds)


def _ridge_sweep() -> dict:
    """Complexity 1/alpha of ridge regression on degree-2 features, spanning 1e-3 to 1e3."""
    X_tr, y_tr, X_te, y_te = diabetes()
    entries = []
    for alpha in (1e3, 1e2, 10.0, 1.0, 0.1, 0.01, 1e-3):
        rng = np.random.default_rng(0)
        test = []
        for _ in range(3):
            rows = rng.integers(0, y_tr.size, y_tr.size)
            model = make_pipeline(PolynomialFeatures(2), StandardScaler(), Ridge(alpha=alpha))
            test.append(model.fit(X_tr[rows], y_tr[rows]).predict(X_te))
        entries.append((1.0 / alpha, np.array(test), None, None))
    return to_jsonable(sweep_from_predictions(y_te, entries))


def test_wide_complexity_range_uses_geometric_region_edges_and_no_train_line() -> None:
    sweep = _ridge_sweep()
    chart = sweep_chart(sweep)
    found = marks(chart.svg())
    xs = sorted(p["complexity"] for p in sweep["points"])
    edges = {math.sqrt(a * b) for a, b in zip(xs, xs[1:], strict=False)}
    regions = [a for gid, a in found.items() if gid.startswith("region-")]
    assert regions  # this sweep overfits at large 1/alpha (precondition)
    for attrs in regions:
        inner = [float(attrs[k]) for k in ("data-x0", "data-x1")]
        assert any(e in edges for e in inner)  # a logarithmic axis: geometric midpoints
    assert not any(gid.startswith("point-train_loss-") for gid in found)
    assert all(row["train_loss"] is None for row in chart.table)
    assert "train loss" not in chart.alt_text


def test_points_out_of_order_keep_their_input_positions() -> None:
    sweep = sweep_result((1, 2, 3))
    shuffled = dict(sweep, points=list(reversed(sweep["points"])))
    found = marks(sweep_chart(shuffled).svg())
    for i, p in enumerate(shuffled["points"]):
        assert float(found[f"point-test_loss-{i}"]["data-x"]) == p["complexity"]


@pytest.mark.parametrize(
    ("change", "field"),
    [
        ({"points": []}, "sweep.points"),
        ({"best_complexity": 99.0}, "sweep.best_complexity"),
        ({"one_se_complexity": None}, "sweep.one_se_complexity"),
    ],
)
def test_bad_sweeps_are_refused_with_the_field(change: dict, field: str) -> None:
    sweep = dict(sweep_result((1, 2, 3)), **change)
    with pytest.raises(ChartInputError) as error:
        sweep_chart(sweep)
    assert error.value.field == field


def test_unknown_region_is_refused() -> None:
    sweep = sweep_result((1, 2, 3))
    points = [dict(p) for p in sweep["points"]]
    points[1]["region"] = "sideways"
    with pytest.raises(ChartInputError, match="underfit, optimal, overfit, neutral"):
        sweep_chart(dict(sweep, points=points))
