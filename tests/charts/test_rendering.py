"""Rendering as a pure, safe function: cache keys, the kind dispatcher, process and thread
independence, untouched global settings, text from users shown as text, input errors."""

from __future__ import annotations

import hashlib
import json
import math
import os
import subprocess
import sys
import threading
from pathlib import Path

import matplotlib
import numpy as np
import pytest
from chartdata import SVG_NS, marks, parse_svg, regression_result, slice_rows, sweep_result
from hypothesis import given, settings
from hypothesis import strategies as st

import service.charts
from service.charts import (
    CHART_KINDS,
    ChartInputError,
    cache_key,
    decomposition_chart,
    format_number,
    render_chart,
    seed_spread_chart,
    slices_chart,
    sweep_chart,
)

MARKUP = '<script>alert("x")</script> & $\\alpha$ </title>'


def _seed_payload() -> dict:
    r = regression_result()
    return {
        "per_seed_values": r["details"]["per_seed"]["mae"],
        "metric": "mae",
        "ensemble_value": r["ensemble"]["mae"],
        "interval": r["intervals"]["mae"],
        "seeds": [f"s{k}" for k in range(r["n_seeds"])],
    }


def test_public_names() -> None:
    for name in service.charts.__all__:
        assert hasattr(service.charts, name), name
    assert set(CHART_KINDS) == {"decomposition", "seed_spread", "sweep", "slices"}


def test_cache_key_is_canonical_and_sensitive() -> None:
    payload = _seed_payload()
    key = cache_key("seed_spread", payload)
    assert len(key) == 64 and int(key, 16) >= 0  # SHA-256 hex digest
    reordered = dict(reversed(list(payload.items())))
    assert cache_key("seed_spread", reordered) == key
    as_numpy = dict(payload, per_seed_values=np.array(payload["per_seed_values"]).tolist())
    as_numpy["ensemble_value"] = np.float64(payload["ensemble_value"])
    assert cache_key("seed_spread", as_numpy) == key
    assert (
        cache_key("seed_spread", dict(payload, per_seed_values=tuple(payload["per_seed_values"])))
        == key
    )
    nudged = list(payload["per_seed_values"])
    nudged[0] = np.nextafter(nudged[0], np.inf)  # one unit in the last place
    assert cache_key("seed_spread", dict(payload, per_seed_values=nudged)) != key
    assert cache_key("sweep", payload) != key
    with pytest.raises(ChartInputError):
        cache_key("seed_spread", dict(payload, ensemble_value=float("nan")))


def test_render_chart_draws_what_the_function_draws() -> None:
    payload = _seed_payload()
    assert render_chart("seed_spread", payload).svg() == seed_spread_chart(**payload).svg()
    sweep = sweep_result((1, 2, 3))
    assert render_chart("sweep", {"sweep": sweep}).alt_text == sweep_chart(sweep).alt_text
    with pytest.raises(ChartInputError) as error:
        render_chart("pie", payload)
    assert error.value.field == "kind"
    with pytest.raises(ChartInputError) as error:
        render_chart("seed_spread", dict(payload, colour="red"))
    assert error.value.field == "payload" and "colour" in error.value.message


def test_same_bytes_in_a_fresh_process_without_pyplot_or_web_modules(tmp_path: Path) -> None:
    """Another process (another hash seed) renders identical bytes, so a cache shared by
    server workers never mixes versions; and neither importing nor rendering loads pyplot
    (a GUI backend) or a web or database module."""
    sweep = sweep_result()
    source = tmp_path / "sweep.json"
    source.write_text(json.dumps(sweep))
    code = (
        "import hashlib, json, sys; from service.charts import sweep_chart; "
        "c = sweep_chart(json.load(open(sys.argv[1]))); "
        "print(hashlib.sha256(c.svg()).hexdigest(), hashlib.sha256(c.png()).hexdigest()); "
        "print(','.join(m for m in ('matplotlib.pyplot', 'flask', 'sqlalchemy', 'werkzeug') "
        "if m in sys.modules))"
    )
    out = subprocess.run(
        [sys.executable, "-c", code, str(source)],
        capture_output=True,
        text=True,
        check=True,
        cwd=Path(__file__).resolve().parents[2],
        env={**os.environ, "PYTHONHASHSEED": "12345"},
    )
    here = sweep_chart(json.loads(source.read_text()))
    expected = f"{hashlib.sha256(here.svg()).hexdigest()} {hashlib.sha256(here.png()).hexdigest()}"
    digests, loaded = (out.stdout.split("\n") + [""])[:2]
    assert digests == expected
    assert loaded == ""


def test_rendering_neither_reads_nor_changes_global_settings() -> None:
    payload = _seed_payload()
    before = dict(matplotlib.rcParams)
    reference = seed_spread_chart(**payload).svg()
    assert dict(matplotlib.rcParams) == before
    with matplotlib.rc_context({"font.size": 30, "lines.linewidth": 9, "svg.fonttype": "path"}):
        assert seed_spread_chart(**payload).svg() == reference


def test_threads_render_the_same_bytes() -> None:
    builders = [
        lambda: seed_spread_chart(**_seed_payload()),
        lambda: sweep_chart(sweep_result((1, 2, 3))),
        lambda: slices_chart(list(slice_rows()), metric="rmse"),
        lambda: decomposition_chart(regression_result()["bias_variance"], loss="squared"),
    ]
    serial = [build().svg() for build in builders]
    results: list[bytes | None] = [None] * len(builders)
    errors: list[BaseException] = []

    def work(i: int) -> None:
        try:
            results[i] = builders[i]().svg()
        except BaseException as error:  # reported below
            errors.append(error)

    threads = [threading.Thread(target=work, args=(i,)) for i in range(len(builders))]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors
    assert results == serial


def test_text_from_users_is_shown_as_text() -> None:
    """Seed labels and sweep names are free text: they reach the SVG escaped, never as
    markup, and never as math."""
    payload = dict(_seed_payload(), seeds=[MARKUP] + [f"s{k}" for k in range(1, 5)])
    svg = seed_spread_chart(**payload).svg()
    root = parse_svg(svg)
    assert not any(e.tag.endswith("script") for e in root.iter())
    assert marks(svg)["point-seed-0"]["data-label"] == MARKUP
    sweep = dict(sweep_result((1, 2, 3)), name=MARKUP)
    chart = sweep_chart(sweep)
    root = parse_svg(chart.svg())
    assert not any(e.tag.endswith("script") for e in root.iter())
    texts = [t.text for t in root.iter(f"{SVG_NS}text")]
    assert f"Squared loss against complexity: {MARKUP}" in texts  # verbatim, no math
    assert root.find(f"{SVG_NS}title").text == chart.title


def test_narrow_size_and_bad_size() -> None:
    chart = sweep_chart(sweep_result((1, 2, 3)))
    assert set(marks(chart.svg(size="narrow"))) == set(marks(chart.svg()))
    with pytest.raises(ValueError, match="wide, narrow"):
        chart.svg(size="huge")
    with pytest.raises(ValueError, match="dpi"):
        chart.png(dpi=5000)


def test_decomposition_input_errors_name_the_field() -> None:
    terms = regression_result()["bias_variance"]
    with pytest.raises(ChartInputError, match="it has: squared") as error:
        decomposition_chart(terms, loss="log")
    assert error.value.field == "loss"
    broken = {"squared": dict(terms["squared"], expected_loss=None)}
    with pytest.raises(ChartInputError) as error:
        decomposition_chart(broken, loss="squared")
    assert error.value.field == "bias_variance.squared.expected_loss"


def test_seed_spread_input_errors_and_undefined_seeds() -> None:
    payload = _seed_payload()
    with pytest.raises(ChartInputError) as error:
        seed_spread_chart(**dict(payload, seeds=["a"]))
    assert error.value.field == "seeds"
    low_high = dict(payload["interval"], low=payload["interval"]["high"] + 1.0)
    with pytest.raises(ChartInputError) as error:
        seed_spread_chart(**dict(payload, interval=low_high))
    assert error.value.field == "interval"
    values = list(payload["per_seed_values"])
    values[2] = None  # an undefined metric for one seed
    chart = seed_spread_chart(**dict(payload, per_seed_values=values))
    found = marks(chart.svg())
    assert "point-seed-2" not in found and "point-seed-1" in found
    assert "Undefined for seed s2." in chart.alt_text
    no_interval = dict(payload["interval"], low=None, high=None, method="none", note="why not")
    chart = seed_spread_chart(**dict(payload, interval=no_interval))
    assert "band-interval-0" not in marks(chart.svg())
    assert "No interval: why not." in chart.alt_text


def test_sweep_in_the_api_shape() -> None:
    """``SweepOut`` adds ids, model names and the slice to each point and to the sweep: the
    chart draws the same, never shows a model name, and states the slice and withheld count."""
    sweep = sweep_result((1, 2, 3))
    api = dict(
        sweep,
        holdout_id="h1",
        group="g1",
        name="depth",
        slice="feedback",
        n_withheld=2,
        points=[
            dict(p, submission_id=f"s{i}", model=MARKUP) for i, p in enumerate(sweep["points"])
        ],
    )
    plain_svg, api_chart = sweep_chart(sweep).svg(), sweep_chart(api)
    assert marks(api_chart.svg()).keys() == marks(plain_svg).keys()
    assert b"script" not in api_chart.svg() and "script" not in api_chart.alt_text
    assert "on the feedback slice" in api_chart.alt_text
    assert "2 submissions of the sweep are withheld" in api_chart.alt_text


@settings(max_examples=300, derandomize=True, deadline=None)
@given(st.floats(min_value=-1e12, max_value=1e12, allow_nan=False, allow_infinity=False))
def test_format_number_keeps_four_significant_digits(value: float) -> None:
    text = format_number(value)
    if value == 0.0 or abs(value) < 1e-300:
        assert float(text) == pytest.approx(value, abs=1e-300)
        return
    # four significant digits: within half a unit of the 4th digit (common practice)
    magnitude = math.floor(math.log10(abs(value)))
    unit = 10.0 ** (magnitude - 3)
    assert abs(float(text) - value) <= 0.5 * unit * (1 + 1e-9)
    digits = text.lstrip("-").split("e")[0].replace(".", "").lstrip("0")
    assert len(digits) <= max(4, magnitude + 2)  # no more digits than the integer part needs


def test_format_number_of_missing_values() -> None:
    assert format_number(None) == "n/a"
    assert format_number(float("nan")) == "n/a"
    assert format_number(float("inf")) == "n/a"
