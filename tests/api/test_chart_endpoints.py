"""The chart endpoints: well-formed SVG whose data points are the API's own JSON numbers for
the same token, PNG, who may see which chart, ETag/304 caching, and chart errors as problems.

References: the JSON endpoints each chart is drawn from (``GET /v1/submissions/{id}``,
``.../sweeps/{name}``, ``.../standings``) answering the same token: every ``data-*``
number of a drawn element must equal the JSON number it stands for, bit for bit (the SVG
writes ``repr`` of the float). XML well-formedness: Python's ``xml.etree`` parser. PNG
signature: the PNG specification (ISO/IEC 15948, section 5.2), from memory.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from typing import Any

import pytest
from apidata import (
    classification_body,
    probability_submission,
    register,
    regression_body,
    regression_submission,
)

SVG_NS = "{http://www.w3.org/2000/svg}"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # reference: PNG specification, section 5.2 (from memory)


def marks(svg: bytes) -> dict[str, dict[str, str]]:
    """Every annotated element of an SVG chart: id -> its data-* attributes."""
    root = ET.fromstring(svg)  # raises on malformed XML
    assert root.tag == f"{SVG_NS}svg"
    out = {}
    for element in root.iter(f"{SVG_NS}g"):
        attrs = {k[5:]: v for k, v in element.attrib.items() if k.startswith("data-")}
        if attrs:
            out[element.attrib["id"]] = attrs
    return out


def _submit(user: Any, holdout_id: str, body: dict[str, Any]) -> dict[str, Any]:
    r = user.post(f"/v1/holdouts/{holdout_id}/submissions", json=body)
    assert r.status_code == 201, r.get_json()
    return r.get_json()


def _svg(user: Any, path: str) -> dict[str, dict[str, str]]:
    r = user.get(path)
    assert r.status_code == 200, r.get_data(as_text=True)
    assert r.mimetype == "image/svg+xml"
    return marks(r.data)


@pytest.fixture
def swept(owner: Any, submitter: Any) -> dict[str, Any]:
    """A regression holdout with a three-point sweep of group g1 (three seeds each)."""
    h = register(owner, regression_body("charted"))
    subs = []
    for depth in (1, 2, 4):
        body, _ = regression_submission(
            h, seed=depth, model=f"tree-{depth}", sweep={"name": "depth", "complexity": depth}
        )
        subs.append(_submit(submitter, h.id, body))
    return {"holdout": h, "submissions": subs}


def test_decomposition_points_are_the_json_numbers_for_each_role(
    swept: dict[str, Any], owner: Any, submitter: Any
) -> None:
    sid = swept["submissions"][-1]["id"]
    for user in (owner, submitter):
        view = user.get(f"/v1/submissions/{sid}").get_json()
        squared = view["bias_variance"]["squared"]
        got = _svg(user, f"/v1/submissions/{sid}/charts/decomposition.svg")
        # reference: the same token's JSON (submitters: the guarded, rounded feedback view)
        assert float(got["point-bias-0"]["value"]) == squared["bias"]
        assert float(got["point-variance-0"]["value"]) == squared["variance"]
        assert float(got["point-expected_loss-0"]["value"]) == squared["expected_loss"]
        assert float(got["point-ensemble_loss-0"]["value"]) == squared["ensemble_loss"]
    owner_view = owner.get(f"/v1/submissions/{sid}").get_json()
    for name in ("feedback", "reserve", "full"):
        got = _svg(owner, f"/v1/submissions/{sid}/charts/decomposition.svg?slice={name}")
        want = owner_view["views"][name]["bias_variance"]["squared"]
        assert float(got["point-bias-0"]["value"]) == want["bias"]
    r = owner.get(f"/v1/submissions/{sid}/charts/decomposition.png")
    assert r.status_code == 200 and r.mimetype == "image/png"
    assert r.data.startswith(PNG_SIGNATURE)


def test_seed_spread_dots_are_the_per_seed_values(
    swept: dict[str, Any], owner: Any, submitter: Any
) -> None:
    sid = swept["submissions"][0]["id"]
    for user in (owner, submitter):
        view = user.get(f"/v1/submissions/{sid}").get_json()
        metric = view["primary_metric"]
        got = _svg(user, f"/v1/submissions/{sid}/charts/seed-spread.svg")
        values = view["details"]["per_seed"][metric]
        assert len(values) == 3
        for k, value in enumerate(values):
            assert float(got[f"point-seed-{k}"]["value"]) == value
            assert got[f"point-seed-{k}"]["label"] == view["seeds"][k]
        assert float(got["point-ensemble-0"]["value"]) == view["ensemble"][metric]
        band = got["band-interval-0"]
        assert float(band["low"]) == view["intervals"][metric]["low"]
        assert float(band["high"]) == view["intervals"][metric]["high"]
    r = submitter.get(f"/v1/submissions/{sid}/charts/seed-spread.png?size=narrow")
    assert r.status_code == 200 and r.data.startswith(PNG_SIGNATURE)


def test_seed_spread_of_a_classifier(owner: Any, submitter: Any) -> None:
    h = register(owner, classification_body("leaves"))
    body, _ = probability_submission(h, n_seeds=3)
    sid = _submit(submitter, h.id, body)["id"]
    view = owner.get(f"/v1/submissions/{sid}").get_json()
    got = _svg(owner, f"/v1/submissions/{sid}/charts/seed-spread.svg?metric=log_loss")
    for k, value in enumerate(view["details"]["per_seed"]["log_loss"]):
        assert float(got[f"point-seed-{k}"]["value"]) == value
    got = _svg(owner, f"/v1/submissions/{sid}/charts/decomposition.svg?loss=zero_one")
    want = view["bias_variance"]["zero_one"]
    assert float(got["point-bias-0"]["value"]) == want["bias"]


def test_sweep_points_are_the_sweep_json(swept: dict[str, Any], owner: Any, submitter: Any) -> None:
    hid = swept["holdout"].id
    for user, query in ((owner, "?group=g1"), (submitter, "")):
        sweep = user.get(f"/v1/holdouts/{hid}/sweeps/depth{query}").get_json()
        got = _svg(user, f"/v1/holdouts/{hid}/charts/sweeps/depth.svg{query}")
        assert sweep["points"]
        for i, point in enumerate(sweep["points"]):
            mark = got[f"point-test_loss-{i}"]
            assert float(mark["x"]) == point["complexity"]
            assert float(mark["value"]) == point["test_loss"]
            assert float(mark["se"]) == point["test_loss_se"]
            assert float(got[f"point-bias-{i}"]["value"]) == point["bias"]
            assert float(got[f"point-variance-{i}"]["value"]) == point["variance"]
        assert float(got["marker-best-0"]["x"]) == sweep["best_complexity"]
        assert float(got["marker-one_se-0"]["x"]) == sweep["one_se_complexity"]
    # the owner may ask for the reserve; the submitter may not before close (as the JSON)
    assert (
        owner.get(f"/v1/holdouts/{hid}/charts/sweeps/depth.svg?group=g1&slice=reserve").status_code
        == 200
    )
    r = submitter.get(f"/v1/holdouts/{hid}/charts/sweeps/depth.svg?slice=reserve")
    assert r.status_code == 422
    assert submitter.get(f"/v1/holdouts/{hid}/sweeps/depth?slice=reserve").status_code == 422


def test_slices_chart_is_for_owners(
    swept: dict[str, Any], owner: Any, other_owner: Any, submitter: Any, admin: Any
) -> None:
    hid = swept["holdout"].id
    standings = owner.get(f"/v1/holdouts/{hid}/standings").get_json()
    got = _svg(owner, f"/v1/holdouts/{hid}/charts/slices.svg")
    for i, entry in enumerate(standings["entries"]):
        mark = got[f"point-group-{i}"]
        assert mark["label"] == entry["group"]
        assert float(mark["x"]) == entry["value"]
        assert float(mark["value"]) == entry["reserve_value"]
    assert admin.get(f"/v1/holdouts/{hid}/charts/slices.png").data.startswith(PNG_SIGNATURE)
    # submitters never see reserve figures before close: no slices chart at all
    assert submitter.get(f"/v1/holdouts/{hid}/charts/slices.svg").status_code == 403
    assert other_owner.get(f"/v1/holdouts/{hid}/charts/slices.svg").status_code == 404


def test_role_matrix(
    swept: dict[str, Any],
    owner: Any,
    other_owner: Any,
    submitter: Any,
    other_submitter: Any,
    client: Any,
) -> None:
    sid = swept["submissions"][0]["id"]
    hid = swept["holdout"].id
    path = f"/v1/submissions/{sid}/charts/decomposition.svg"
    assert client.get(path).status_code == 401
    # another group's or another owner's submission: 404, exactly like its JSON
    for user in (other_submitter, other_owner):
        assert user.get(f"/v1/submissions/{sid}").status_code == 404
        r = user.get(path)
        assert r.status_code == 404 and r.mimetype == "application/problem+json"
    assert other_submitter.get(f"/v1/holdouts/{hid}/charts/sweeps/depth.svg").status_code == 404
    # before close a submitter's views hold no reserve: its chart is refused
    assert submitter.get(f"{path}?slice=reserve").status_code == 422
    assert submitter.get(f"{path}?slice=full").status_code == 422
    closed = owner.post(f"/v1/holdouts/{hid}/close")
    assert closed.status_code == 200
    view = submitter.get(f"/v1/submissions/{sid}").get_json()
    got = _svg(submitter, f"{path}?slice=reserve")
    want = view["views"]["reserve"]["bias_variance"]["squared"]
    assert float(got["point-bias-0"]["value"]) == want["bias"]


def test_etag_and_cache_headers(swept: dict[str, Any], owner: Any, submitter: Any) -> None:
    sid = swept["submissions"][0]["id"]
    hid = swept["holdout"].id
    path = f"/v1/submissions/{sid}/charts/decomposition.svg"
    first = owner.get(path)
    etag = first.headers["ETag"]
    assert first.headers["Cache-Control"].startswith("private, max-age=")
    again = owner.get(path, headers={"If-None-Match": etag})
    assert again.status_code == 304 and again.data == b""
    assert again.headers["ETag"] == etag
    assert owner.get(path, headers={"If-None-Match": '"other"'}).status_code == 200
    # other bytes, other tag: the PNG, and the submitter's rounded feedback view
    assert owner.get(path.replace(".svg", ".png")).headers["ETag"] != etag
    assert submitter.get(path).headers["ETag"] != etag
    # a 304 still needs the right to see the chart
    r = submitter.get(
        f"/v1/submissions/{sid}/charts/decomposition.svg?slice=full",
        headers={"If-None-Match": etag},
    )
    assert r.status_code == 422
    # sweeps change with new submissions: validated, never stored
    sweep = owner.get(f"/v1/holdouts/{hid}/charts/sweeps/depth.svg?group=g1")
    assert sweep.headers["Cache-Control"] == "no-store"
    assert (
        owner.get(
            f"/v1/holdouts/{hid}/charts/sweeps/depth.svg?group=g1",
            headers={"If-None-Match": sweep.headers["ETag"]},
        ).status_code
        == 304
    )


def test_chart_input_error_is_a_problem(app: Any, client: Any) -> None:
    from service.charts import render_chart

    def undrawable() -> Any:
        return render_chart("sweep", {"sweep": {"loss": "squared", "points": []}})

    app.add_url_rule("/test-undrawable", view_func=undrawable)
    r = client.get("/test-undrawable")
    assert r.status_code == 422
    assert r.mimetype == "application/problem+json"
    body = r.get_json()
    assert body["errors"][0]["field"] == "sweep.points"
    assert "at least one point" in body["errors"][0]["message"]
