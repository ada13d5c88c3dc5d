"""The demo (demo_data/run_demo.py) end to end against a real gunicorn server on SQLite.

The demo prints what a user looks at; this test checks the printed verdicts and the
relations the demo is there to show, computed from the numbers it printed and returned:
the high-bias model's error is mostly bias, the high-variance model's mostly variance, the
overfit model fails the flag gate on a critical generalization gap, the first submission
warns for want of a reference, the challenger passes non-inferiority and the cheaper model
does not, and the sweep's one-standard-error choice follows the rule from the printed curve.
Every wait is bounded.
"""

from __future__ import annotations

import io
import re
from collections.abc import Iterator
from typing import Any

import pytest
from gunicorn_server import running_gunicorn

from demo_data.run_demo import MARGIN, run
from service.store import Store

N_HOLDOUT = 2000  # the demo's default. The feedback/reserve split is drawn at random at
# registration; with 1000 rows the model in service tripped the critical-gap gate on about
# 13% of random splits (measured over 200 splits with the scoring core), with 2000 rows and
# the demo's half-and-half split on none of 150.


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Iterator[dict[str, Any]]:
    tmp = tmp_path_factory.mktemp("demo-server")
    settings = {
        "HELDOUT_DATABASE_URL": f"sqlite:///{tmp / 'heldout.sqlite3'}",
        "HELDOUT_WORKERS": "2",
        "HELDOUT_BOOTSTRAP_RESAMPLES": "200",
    }
    store = Store(settings["HELDOUT_DATABASE_URL"])
    try:
        store.init_schema()
        owner = store.create_token("owner", None, "demo owner")[1]
        harbour = store.create_token("submitter", "harbour-models", "demo")[1]
        tide = store.create_token("submitter", "tide-lab", "demo")[1]
    finally:
        store.dispose()
    with running_gunicorn(tmp, settings) as server:
        out = io.StringIO()
        returned = run(server.base, owner, harbour, tide, n_holdout=N_HOLDOUT, out=out)
        yield {"out": out.getvalue(), **returned}


def block(out: str, model: str) -> str:
    """The printed block of one submission (from its '== model' line to the next '==')."""
    start = out.index(f"\n== {model} ")
    end = out.find("\n== ", start + 1)
    return out[start : end if end >= 0 else None]


def printed_decomposition(text: str) -> dict[str, float]:
    """The squared-loss decomposition as the demo prints it, or as ``heldout submit``
    prints it (its table row ``squared``)."""
    keys = ("expected", "bias", "bias_share", "variance", "variance_share")
    match = re.search(
        r"squared loss (\S+) = bias term (\S+) \(share (\S+)\) \+ variance (\S+) "
        r"\(share (\S+)\)",
        text,
    )
    if match:
        return {k: float(v) for k, v in zip(keys, match.groups(), strict=True)}
    row = re.search(r"^\s+squared\s+(\S+)\s+(\S+)\s+(\S+)\s+(\S+)", text, flags=re.MULTILINE)
    assert row, text
    expected, bias, variance, share = (float(v) for v in row.groups())
    return dict(zip(keys, (expected, bias, bias / expected, variance, share), strict=True))


def gate_lines(text: str) -> dict[str, str]:
    """Gate phrase -> printed status, from the lines under 'verdict:'."""
    lines = text[text.index("verdict: "):].splitlines()[1:]
    found = {}
    for line in lines:
        m = re.match(r"\s+(pass|warn|fail)\s+(.+?)\s{2,}", line)
        if not m:
            break
        found[m.group(2)] = m.group(1)
    return found


def test_every_submission_prints_a_verdict_and_its_decomposition(demo) -> None:
    out, results = demo["out"], demo["results"]
    for model in ("pruned-tree", "straight-line", "random-split-tree", "full-depth-tree",
                  "spline-ridge", "shallow-tree"):
        text = block(out, model)
        status = results[model]["verdict"]["status"]
        assert f"verdict: {status.upper()}" in text
        printed = printed_decomposition(text)
        d = results[model]["bias_variance"]["squared"]
        # the printed numbers are the returned ones (4 significant digits)
        assert printed["bias"] == pytest.approx(d["bias"], rel=1e-3)
        assert printed["variance"] == pytest.approx(d["variance"], rel=1e-3, abs=1e-4)
        # expected loss = bias term + variance (the squared-loss decomposition; common
        # practice, Geman, Bienenstock & Doursat 1992)
        assert printed["expected"] == pytest.approx(printed["bias"] + printed["variance"],
                                                    rel=2e-3)
        # one printed line per gate, with the returned status
        assert list(gate_lines(text).values()) == [
            r["status"] for r in results[model]["verdict"]["reasons"]
        ]


def test_high_bias_and_high_variance_are_told_apart_by_the_decomposition(demo) -> None:
    out = demo["out"]
    high_bias = printed_decomposition(block(out, "straight-line"))
    high_variance = printed_decomposition(block(out, "random-split-tree"))
    assert high_bias["bias"] > high_bias["variance"]
    assert high_variance["variance"] > high_variance["bias"]
    assert high_variance["variance_share"] > high_bias["variance_share"]
    assert high_bias["bias_share"] > high_variance["bias_share"]
    # the variance-share gate (a warning) trips only for the high-variance model
    assert gate_lines(block(out, "random-split-tree"))["variance_share <= 0.5 (warn)"] == "warn"
    assert gate_lines(block(out, "straight-line"))["variance_share <= 0.5 (warn)"] == "pass"


def test_the_overfit_submission_fails_the_flag_gate(demo) -> None:
    text = block(demo["out"], "full-depth-tree")
    assert "verdict: FAIL" in text
    assert "[critical] generalization_gap" in text
    assert gate_lines(text)["flag generalization_gap at critical"] == "fail"
    assert demo["exit_statuses"]["full-depth-tree"] == 1
    result = demo["results"]["full-depth-tree"]
    # its training loss is far below its held-out loss: the gap the flag reports
    assert result["train_scores"]["mse"] < result["bias_variance"]["squared"]["expected_loss"]


def test_reference_and_non_inferiority(demo) -> None:
    out, results, statuses = demo["out"], demo["results"], demo["exit_statuses"]
    gate = f"rmse non_inferior margin {MARGIN:g} alpha 0.05"
    # before the owner sets a reference the comparison gate cannot be checked: warn, exit 3
    assert gate_lines(block(out, "pruned-tree"))[gate] == "warn"
    assert results["pruned-tree"]["verdict"]["status"] == "warn"
    assert statuses["pruned-tree"] == 3
    assert "`heldout submit` exits 3 (1 with --strict)" in block(out, "pruned-tree")
    champion = results["pruned-tree"]["id"]
    for model, expected in (("spline-ridge", "pass"), ("shallow-tree", "fail")):
        verdict = results[model]["verdict"]
        # the champion is the other group's: this group's verdict does not show its id
        assert verdict["reference"] == "holdout-reference" and champion not in str(verdict)
        (reason,) = [r for r in verdict["reasons"] if r["kind"] == "compare"]
        assert reason["status"] == expected
        assert gate_lines(block(out, model))[gate] == expected
        # non-inferior exactly when the upper confidence bound of RMSE(model) -
        # RMSE(reference) lies below the margin (the rule in service/scoring/verdict.py)
        assert (reason["interval"]["high"] < MARGIN) == (expected == "pass")
    assert statuses["spline-ridge"] == 0
    # the cheaper model went through `heldout submit`: its printed exit status is the verdict
    assert statuses["shallow-tree"] == 1
    assert "$ echo $?\n   1  (fail)" in out


def test_sweep_minimum_and_one_standard_error_choice(demo) -> None:
    out, curve = demo["out"], demo["sweep"]
    points = curve["points"]
    printed = re.findall(
        r"^\s+(\d+)\s+(\d+\.\d+)\s+(\d+\.\d+)\s+\S+\s+\S+\s+\S+\s+"
        r"(underfit|optimal|overfit|neutral)$",
        out,
        flags=re.MULTILINE,
    )
    # the printed curve is the returned one (3 decimals)
    assert [float(p[0]) for p in printed] == [p["complexity"] for p in points]
    for row, point in zip(printed, points, strict=True):
        assert float(row[1]) == pytest.approx(point["test_loss"], abs=5e-4)
        assert float(row[2]) == pytest.approx(point["test_loss_se"], abs=5e-4)
        assert row[3] == point["region"]
    # the one-standard-error rule (Breiman et al. 1984; Hastie, Tibshirani & Friedman, ESL
    # section 7.10): the simplest depth within one standard error of the minimum
    best = min(points, key=lambda p: (p["test_loss"], p["complexity"]))
    band = best["test_loss"] + best["test_loss_se"]
    one_se = min(p["complexity"] for p in points if p["test_loss"] <= band)
    assert curve["best_complexity"] == best["complexity"]
    assert curve["one_se_complexity"] == one_se <= best["complexity"]
    assert f"minimum at depth {best['complexity']:g};" in out
    assert f"the minimum): depth {one_se:g}" in out


def test_standings_list_both_groups_with_their_verdicts(demo) -> None:
    out, standings = demo["out"], demo["standings"]
    text = out[out.index("== Standings"):]
    groups = [e["group"] for e in standings["entries"]]
    assert sorted(groups) == ["harbour-models", "tide-lab"]
    for entry in standings["entries"]:
        assert re.search(rf"^\s+{entry['rank']}\s+{entry['group']}\s", text, flags=re.MULTILINE)
        assert entry["verdict_status"] in ("pass", "warn", "fail")
    # lower RMSE ranks first (the primary metric's direction)
    values = [e["value"] for e in sorted(standings["entries"], key=lambda e: e["rank"])]
    assert values == sorted(values)
