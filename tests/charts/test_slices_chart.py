"""The owner's slices chart: feedback against reserve, with the side that means "tuned to the
feedback slice" shaded according to the metric's direction."""

from __future__ import annotations

import numpy as np
import pytest
from chartdata import SVG_NS, diabetes, marks, parse_svg, slice_rows, tree_predictions
from sklearn.metrics import r2_score, root_mean_squared_error

from service.charts import ChartInputError, slices_chart
from service.scoring import feedback_mask


def _rows(metric: str) -> list[dict]:
    if metric == "rmse":
        return [dict(r) for r in slice_rows()]
    return [dict(r, value=r["value_r2"], reserve_value=r["reserve_r2"]) for r in slice_rows()]


# Directions: RMSE lower is better, R^2 higher is better (common practice; scikit-learn's
# scorers are named "neg_root_mean_squared_error" and "r2" for this reason).
@pytest.mark.parametrize(("metric", "tuned_side"), [("rmse", "above"), ("r2", "below")])
def test_shaded_side_follows_the_metric_direction(metric: str, tuned_side: str) -> None:
    rows = _rows(metric)
    chart = slices_chart(rows, metric=metric)
    found = marks(chart.svg())
    assert found["region-tuned-0"]["data-side"] == tuned_side
    assert f"Points {tuned_side} the line look better on the feedback slice" in chart.alt_text
    for i, row in enumerate(rows):
        attrs = found[f"point-group-{i}"]
        feedback, reserve = float(attrs["data-x"]), float(attrs["data-value"])
        assert (feedback, reserve) == (row["value"], row["reserve_value"])
        above = reserve > feedback
        feedback_better = feedback < reserve if metric == "rmse" else feedback > reserve
        # a point on the shaded side is exactly a group whose feedback score looks better
        assert (above == (tuned_side == "above")) == feedback_better
        side = chart.table[i]["side"]
        assert side == ("above" if above else "below")
        assert chart.table[i]["difference"] == reserve - feedback


def test_direction_can_be_given_for_a_metric_outside_the_catalog() -> None:
    rows = _rows("rmse")
    chart = slices_chart(rows, metric="custom_loss", higher_is_better=False)
    assert marks(chart.svg())["region-tuned-0"]["data-side"] == "above"
    with pytest.raises(ChartInputError) as error:
        slices_chart(rows, metric="custom_loss")
    assert error.value.field == "higher_is_better"


def test_values_match_scikit_learn_on_the_slices() -> None:
    _, _, _, y_te = diabetes()
    mask = feedback_mask(y_te.size, feedback_fraction=0.3, seed=7)
    test, _ = tree_predictions(2, 3)
    row = slice_rows()[0]
    assert row["group"] == "shallow-trees"
    found = marks(slices_chart(_rows("rmse"), metric="rmse").svg())["point-group-0"]
    # reference: sklearn.metrics.root_mean_squared_error, mean over the 3 seeds, then the
    # headline RMSE is the square root of the mean MSE (scoring core's documented rule)
    feedback = np.sqrt(np.mean([root_mean_squared_error(y_te[mask], p[mask]) ** 2 for p in test]))
    reserve = np.sqrt(np.mean([root_mean_squared_error(y_te[~mask], p[~mask]) ** 2 for p in test]))
    assert float(found["data-x"]) == pytest.approx(feedback, rel=1e-12)
    assert float(found["data-value"]) == pytest.approx(reserve, rel=1e-12)
    r2 = np.mean([r2_score(y_te[mask], p[mask]) for p in test])  # reference: sklearn r2_score
    assert row["value_r2"] == pytest.approx(r2, rel=1e-12)


def test_flags_and_labels_are_drawn() -> None:
    rows = _rows("rmse")
    flagged = [r["feedback_tuned"]["flagged"] for r in rows]
    assert any(flagged) and not all(flagged)  # both drawing paths (precondition)
    svg = slices_chart(rows, metric="rmse").svg()
    found = marks(svg)
    texts = {t.text for t in parse_svg(svg).iter(f"{SVG_NS}text")}
    for i, row in enumerate(rows):
        attrs = found[f"point-group-{i}"]
        assert attrs["data-flagged"] == ("true" if flagged[i] else "false")
        assert float(attrs["data-p-value"]) == row["feedback_tuned"]["p_value"]
        assert attrs["data-label"] == row["group"]
        assert row["group"] in texts  # labelled on the chart, as text


def test_rows_missing_a_slice_are_listed_not_drawn() -> None:
    rows = _rows("rmse")
    rows[1] = dict(rows[1], reserve_value=None, feedback_tuned=None)
    chart = slices_chart(rows, metric="rmse")
    found = marks(chart.svg())
    assert "point-group-1" not in found
    assert {"point-group-0", "point-group-2", "point-group-3"} <= set(found)
    assert f"{rows[1]['group']}: not drawn" in chart.alt_text
    assert chart.table[1]["reserve"] is None and chart.table[1]["side"] is None


def test_no_groups_still_draws() -> None:
    chart = slices_chart([], metric="rmse")
    assert "No groups yet." in chart.alt_text
    assert marks(chart.svg())["region-tuned-0"]["data-side"] == "above"
