"""Every chart: well-formed SVG, byte-identical renders, each drawn number in the SVG with its
exact value, decodable PNG, and alt text and table carrying the numbers.

Inputs are real results (``chartdata``); expected values are read from those inputs, and
where a number is also checkable against an outside library the check says so.
"""

from __future__ import annotations

import copy
import io
import statistics
from dataclasses import dataclass
from typing import Any

import numpy as np
import pytest
from chartdata import (
    SVG_NS,
    breast_cancer_seeds,
    classification_result,
    diabetes,
    floats,
    mark_titles,
    marks,
    noise_estimate,
    parse_svg,
    regression_result,
    regression_result_with_noise,
    slice_rows,
    sweep_result,
    tree_predictions,
)
from PIL import Image
from sklearn.metrics import accuracy_score, mean_squared_error, root_mean_squared_error

from service.charts import (
    Chart,
    decomposition_chart,
    format_number,
    seed_spread_chart,
    slices_chart,
    sweep_chart,
)

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # reference: PNG specification (W3C), section 5.2


@dataclass
class Case:
    """A chart built from an input, and what its SVG must hold, read from that input."""

    build: Any  # () -> Chart
    expected: dict[str, dict[str, float | str | list[float]]]
    numbers: list[float]  # every number the alt text must state
    name: str = ""


def _decomposition_case(result: dict[str, Any], loss: str) -> Case:
    d = result["bias_variance"][loss]
    expected: dict[str, dict[str, Any]] = {
        "point-bias-0": {"data-value": d["bias"]},
        "point-expected_loss-0": {"data-value": d["expected_loss"]},
        "point-ensemble_loss-0": {"data-value": d["ensemble_loss"]},
        "point-ensemble_gain-0": {"data-value": d["expected_loss"] - d["ensemble_loss"]},
    }
    if loss == "zero_one":
        for term in ("unbiased_variance", "biased_variance"):
            expected[f"point-{term}-0"] = {"data-value": d["extra"][term]}
    else:
        expected["point-variance-0"] = {"data-value": d["variance"]}
    if d["noise"] is not None:
        expected["point-noise-0"] = {"data-value": d["noise"]}
    numbers = [d["bias"], d["variance"], d["expected_loss"], d["ensemble_loss"]]
    return Case(
        lambda: decomposition_chart(copy.deepcopy(result["bias_variance"]), loss=loss),
        expected,
        numbers,
    )


def _seed_case(result: dict[str, Any], metric: str) -> Case:
    values = result["details"]["per_seed"][metric]
    interval = result["intervals"][metric]
    expected: dict[str, dict[str, Any]] = {
        f"point-seed-{k}": {"data-value": v, "data-label": str(k)} for k, v in enumerate(values)
    }
    expected["point-mean-0"] = {"data-value": statistics.fmean(values)}  # reference: stdlib
    expected["point-ensemble-0"] = {"data-value": result["ensemble"][metric]}
    expected["point-score-0"] = {"data-value": result["scores"][metric]}
    expected["band-interval-0"] = {"data-low": interval["low"], "data-high": interval["high"]}
    numbers = [*values, result["ensemble"][metric], interval["low"], interval["high"]]
    return Case(
        lambda: seed_spread_chart(
            list(values),
            metric=metric,
            ensemble_value=result["ensemble"][metric],
            interval=dict(interval),
            score=result["scores"][metric],
        ),
        expected,
        numbers,
    )


def _sweep_case(sweep: dict[str, Any]) -> Case:
    expected: dict[str, dict[str, Any]] = {}
    numbers: list[float] = []
    for i, p in enumerate(sweep["points"]):
        expected[f"point-test_loss-{i}"] = {
            "data-value": p["test_loss"],
            "data-x": p["complexity"],
            "data-se": p["test_loss_se"],
            "data-region": p["region"],
        }
        for key in ("train_loss", "bias", "variance"):
            if p[key] is not None:
                expected[f"point-{key}-{i}"] = {"data-value": p[key], "data-x": p["complexity"]}
                numbers.append(p[key])
        numbers += [p["test_loss"], p["test_loss_se"]]
    expected["marker-best-0"] = {"data-x": sweep["best_complexity"]}
    expected["marker-one_se-0"] = {"data-x": sweep["one_se_complexity"]}
    expected["band-test_loss-0"] = {
        "data-low": [p["test_loss"] - p["test_loss_se"] for p in sweep["points"]],
        "data-high": [p["test_loss"] + p["test_loss_se"] for p in sweep["points"]],
    }
    return Case(lambda: sweep_chart(copy.deepcopy(sweep)), expected, numbers)


def _slices_case(rows: tuple[dict[str, Any], ...]) -> Case:
    expected = {
        f"point-group-{i}": {
            "data-x": r["value"],
            "data-value": r["reserve_value"],
            "data-label": r["group"],
            "data-flagged": "true" if r["feedback_tuned"]["flagged"] else "false",
        }
        for i, r in enumerate(rows)
    }
    numbers = [r[k] for r in rows for k in ("value", "reserve_value")]
    return Case(lambda: slices_chart(copy.deepcopy(list(rows)), metric="rmse"), expected, numbers)


CASES = {
    "decomposition_squared": lambda: _decomposition_case(regression_result(), "squared"),
    "decomposition_noise": lambda: _decomposition_case(regression_result_with_noise(), "squared"),
    "decomposition_zero_one": lambda: _decomposition_case(classification_result(), "zero_one"),
    "decomposition_log": lambda: _decomposition_case(classification_result(), "log"),
    "seed_spread_rmse": lambda: _seed_case(regression_result(), "rmse"),
    "seed_spread_r2": lambda: _seed_case(regression_result(), "r2"),
    "sweep": lambda: _sweep_case(sweep_result()),
    "slices": lambda: _slices_case(slice_rows()),
}


@pytest.fixture(scope="module", params=sorted(CASES))
def case(request: pytest.FixtureRequest) -> Case:
    built = CASES[request.param]()
    built.name = request.param
    return built


@pytest.fixture(scope="module")
def chart(case: Case) -> Chart:
    return case.build()


def _matches(actual: str, wanted: float | str | list[float]) -> bool:
    if isinstance(wanted, str):
        return actual == wanted
    if isinstance(wanted, list):
        return floats(actual) == wanted
    return float(actual) == wanted  # exact: the SVG holds repr(value)


def test_svg_is_well_formed_with_title_and_description(chart: Chart) -> None:
    root = parse_svg(chart.svg())  # reference: XML 1.0 well-formedness (xml.etree parser)
    assert root.tag == f"{SVG_NS}svg"
    assert root.get("role") == "img"
    assert root.find(f"{SVG_NS}title").text == chart.title
    assert root.find(f"{SVG_NS}desc").text == chart.alt_text


def test_renders_are_byte_identical(case: Case, chart: Chart) -> None:
    again = case.build()  # a fresh Chart from a fresh copy of the input
    assert again is not chart
    assert again.svg() == chart.svg()


def test_png_and_narrow_renders_are_byte_identical() -> None:
    sweep = sweep_result((1, 2, 3))
    first, second = sweep_chart(copy.deepcopy(sweep)), sweep_chart(copy.deepcopy(sweep))
    assert first.png() == second.png()
    assert first.png(dpi=60, size="narrow") == second.png(dpi=60, size="narrow")
    assert first.svg(size="narrow") == second.svg(size="narrow")


def test_every_number_is_in_the_svg_with_its_exact_value(case: Case, chart: Chart) -> None:
    # the narrow layout moves labels, not data; checked for two kinds to keep the suite fast
    narrow = case.name in ("decomposition_squared", "seed_spread_rmse")
    for size in ("wide", "narrow") if narrow else ("wide",):
        found = marks(chart.svg(size=size))
        for gid, attrs in case.expected.items():
            assert gid in found, f"{gid} missing ({size})"
            for name, wanted in attrs.items():
                assert _matches(found[gid][name], wanted), (gid, name, found[gid][name], wanted)
        drawn_points = {g for g in found if g.startswith("point-")}
        assert drawn_points == {g for g in case.expected if g.startswith("point-")}
    titles = mark_titles(chart.svg())
    assert all(titles[g] for g in case.expected)  # every element has a tooltip


def test_png_decodes_at_the_figure_size(case: Case, chart: Chart) -> None:
    sizes = [(110, "wide", (7.0, 4.0))]
    if case.name in ("slices", "seed_spread_rmse"):
        sizes.append((60, "narrow", (4.2, 5.6)))
    for dpi, size, inches in sizes:
        png = chart.png(dpi, size=size)
        assert png.startswith(PNG_SIGNATURE)
        image = Image.open(io.BytesIO(png))
        image.load()
        # matplotlib: pixel size = figure size in inches x dpi
        assert image.size == (round(inches[0] * dpi), round(inches[1] * dpi))
        assert image.mode == "RGBA"
        pixels = np.ascontiguousarray(np.asarray(image)).view(np.uint32)
        assert np.unique(pixels).size > 10  # drawn, not blank


def test_alt_text_and_table_carry_the_numbers(case: Case, chart: Chart) -> None:
    for value in case.numbers:
        assert format_number(value) in chart.alt_text, (value, chart.alt_text)
    table_values = {v for row in chart.table for v in row.values() if isinstance(v, float)}
    for attrs in case.expected.values():
        for wanted in attrs.values():
            if isinstance(wanted, float):
                assert (
                    wanted in table_values
                    or any(wanted == row.get("value") for row in chart.table)
                    or _derived(wanted, chart)
                ), wanted
    assert chart.table and all(set(row) == set(chart.table[0]) for row in chart.table)


def _derived(value: float, chart: Chart) -> bool:
    """Band edges (test loss +- SE) are derived: the table holds both of their parts."""
    for row in chart.table:
        if "test_loss" in row and value in (
            row["test_loss"] - row["test_loss_se"],
            row["test_loss"] + row["test_loss_se"],
        ):
            return True
    return False


# ------------------------------------------------------- the numbers against outside sources


def test_decomposition_numbers_match_scikit_learn() -> None:
    _, _, _, y_te = diabetes()
    test, _ = tree_predictions(4)
    found = marks(decomposition_chart(regression_result()["bias_variance"], loss="squared").svg())
    # reference: sklearn.metrics.mean_squared_error; the ensemble is the seed-mean prediction
    ensemble = mean_squared_error(y_te, test.mean(axis=0))
    expected = np.mean([mean_squared_error(y_te, p) for p in test])
    assert float(found["point-ensemble_loss-0"]["data-value"]) == pytest.approx(ensemble, 1e-12)
    assert float(found["point-expected_loss-0"]["data-value"]) == pytest.approx(expected, 1e-12)
    # ESL 7.3 (REFERENCES.md): without a noise term, bias term = ensemble loss, and the
    # drawn segments end at the expected loss
    bias = float(found["point-bias-0"]["data-value"])
    variance = float(found["point-variance-0"]["data-value"])
    assert bias == pytest.approx(ensemble, 1e-12)
    assert bias + variance == pytest.approx(expected, 1e-12)


def test_noise_is_drawn_apart_and_the_segments_add_up() -> None:
    d = regression_result_with_noise()["bias_variance"]["squared"]
    assert d["noise"] == noise_estimate()
    found = marks(decomposition_chart({"squared": d}, loss="squared").svg())
    noise = float(found["point-noise-0"]["data-value"])
    bias = float(found["point-bias-0"]["data-value"])
    variance = float(found["point-variance-0"]["data-value"])
    assert float(found["point-bias-0"]["data-start"]) == noise  # bias starts where noise ends
    assert float(found["point-variance-0"]["data-start"]) == noise + bias
    # ESL 7.3: expected loss = noise + bias^2 + variance
    assert noise + bias + variance == pytest.approx(d["expected_loss"], 1e-12)


def test_zero_one_decomposition_matches_accuracy() -> None:
    y_te, labels, _ = breast_cancer_seeds()
    result = classification_result()
    found = marks(decomposition_chart(result["bias_variance"], loss="zero_one").svg())
    # reference: sklearn.metrics.accuracy_score; the expected zero-one loss is the mean over
    # seeds of 1 - accuracy
    expected = float(found["point-expected_loss-0"]["data-value"])
    reference = np.mean([1.0 - accuracy_score(y_te, k) for k in labels])
    assert expected == pytest.approx(reference, abs=1e-12)
    # Domingos 2000 (REFERENCES.md): expected = bias + unbiased variance - biased variance;
    # the hatched piece cut back from the bar's end ends exactly there
    terms = {
        k: float(found[f"point-{k}-0"]["data-value"])
        for k in ("bias", "unbiased_variance", "biased_variance")
    }
    assert terms["bias"] + terms["unbiased_variance"] - terms["biased_variance"] == (
        pytest.approx(expected, abs=1e-12)
    )
    assert float(found["point-biased_variance-0"]["data-start"]) == (
        terms["bias"] + terms["unbiased_variance"]
    )


def test_seed_values_match_scikit_learn() -> None:
    _, _, _, y_te = diabetes()
    test, _ = tree_predictions(4)
    result = regression_result()
    chart = seed_spread_chart(
        result["details"]["per_seed"]["rmse"],
        metric="rmse",
        ensemble_value=result["ensemble"]["rmse"],
        interval=result["intervals"]["rmse"],
    )
    found = marks(chart.svg())
    for k, p in enumerate(test):
        # reference: sklearn.metrics.root_mean_squared_error
        drawn = float(found[f"point-seed-{k}"]["data-value"])
        assert drawn == pytest.approx(root_mean_squared_error(y_te, p), rel=1e-12)
    ensemble = root_mean_squared_error(y_te, test.mean(axis=0))
    assert float(found["point-ensemble-0"]["data-value"]) == pytest.approx(ensemble, rel=1e-12)
    assert "point-score-0" not in found  # no headline score given, none drawn
