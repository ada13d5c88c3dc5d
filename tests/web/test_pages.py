"""The pages through Flask's test client: sign-in and its cookie, CSRF, CSP, sign-out, and
that each role's pages show what the API's JSON shows that token (and nothing more).

References: the JSON endpoints answering the same token (what a page may show); RFC 6265bis
for the cookie attributes (HttpOnly, SameSite=Strict, Secure); the CSP Level 3 directive
names (W3C). Numbers on a page are written with six significant digits (``'%.6g'``, the
pages' documented format), so a JSON number is looked for in that form.
"""

from __future__ import annotations

from typing import Any

import pytest
from webdata import MARKUP_MODEL, SECRET_KEY, csrf_of

from service.web.session import COOKIE_NAME


def _num(value: float) -> str:
    return f"{value:.6g}"


def signed_in_client(site: Any, who: str, **kw: Any) -> Any:
    client = site.app.test_client(**kw)
    page = client.get("/sign-in")
    r = client.post(
        "/sign-in",
        data={"csrf_token": csrf_of(page.get_data(as_text=True)), "token": site.tokens[who]},
    )
    assert r.status_code == 303, r.get_data(as_text=True)
    return client


def _api(site: Any, who: str, path: str) -> Any:
    r = site.app.test_client().get(path, headers={"Authorization": f"Bearer {site.tokens[who]}"})
    assert r.status_code == 200, r.get_json()
    return r.get_json()


def _html(client: Any, path: str, status: int = 200) -> str:
    r = client.get(path)
    assert r.status_code == status, (path, r.status_code, r.get_data(as_text=True)[:500])
    return r.get_data(as_text=True)


def test_pages_need_a_session(site: Any) -> None:
    client = site.app.test_client()
    h = site.scenario.holdout_id
    for path in ("/holdouts", f"/holdouts/{h}", f"/submissions/{site.scenario.own[0]}"):
        r = client.get(path)
        assert r.status_code == 303
        assert r.headers["Location"].startswith("/sign-in?next=")
    # a bearer token is not a session: pages take the cookie only
    r = client.get("/holdouts", headers={"Authorization": f"Bearer {site.tokens['owner']}"})
    assert r.status_code == 303


def test_content_security_policy_and_frame_headers(site: Any) -> None:
    r = site.app.test_client().get("/sign-in")
    directives = {
        d.strip().split(" ", 1)[0]: d.strip().split(" ", 1)[1]
        for d in r.headers["Content-Security-Policy"].split(";")
    }
    # reference: CSP Level 3 directive names (W3C)
    assert directives["default-src"] == "'none'"
    assert directives["style-src"] == "'self'"
    assert directives["img-src"] == "'self'"
    assert directives["form-action"] == "'self'"
    assert directives["frame-ancestors"] == "'none'"
    assert "script-src" not in directives  # default-src 'none': no script at all
    assert r.headers["X-Frame-Options"] == "DENY"
    assert r.headers["Cache-Control"] == "no-store"
    assert "<script" not in r.get_data(as_text=True)


def test_sign_in_cookie_flags_and_contents(site: Any) -> None:
    client = site.app.test_client()
    form = client.get("/sign-in")
    r = client.post(
        "/sign-in",
        data={
            "csrf_token": csrf_of(form.get_data(as_text=True)),
            "token": site.tokens["g1"],
            "next": "/holdouts",
        },
    )
    assert r.status_code == 303 and r.headers["Location"] == "/holdouts"
    [cookie] = [c for c in r.headers.getlist("Set-Cookie") if c.startswith(COOKIE_NAME + "=")]
    attributes = {a.strip().split("=")[0].lower() for a in cookie.split(";")[1:]}
    # reference: RFC 6265bis cookie attributes
    assert "httponly" in attributes
    assert "samesite=strict" in cookie.lower()
    assert "secure" not in attributes  # plain HTTP here; see the HTTPS test
    # the signed cookie holds the token's id and a check value, never the token
    value = cookie.split(";")[0].split("=", 1)[1]
    data = site.app.session_interface.get_signing_serializer(site.app).loads(value)
    assert set(data) == {"tid", "chk", "iat", "csrf"}
    assert site.tokens["g1"] not in repr(data)
    assert site.tokens["g1"] not in cookie


def test_cookie_is_secure_over_https(site: Any) -> None:
    client = site.app.test_client()
    https = "https://pages.test"
    html = client.get("/sign-in", base_url=https).get_data(as_text=True)
    r = client.post(
        "/sign-in",
        base_url=https,
        data={"csrf_token": csrf_of(html), "token": site.tokens["owner"]},
        headers={"Origin": https},
    )
    assert r.status_code == 303
    [cookie] = [c for c in r.headers.getlist("Set-Cookie") if c.startswith(COOKIE_NAME + "=")]
    attributes = {a.strip().lower() for a in cookie.split(";")[1:]}
    # reference: RFC 6265bis, the Secure attribute
    assert "secure" in attributes and "httponly" in attributes


def test_sign_in_refuses_missing_or_wrong_csrf_and_foreign_origin(site: Any) -> None:
    client = site.app.test_client()
    token = site.tokens["owner"]
    html = client.get("/sign-in").get_data(as_text=True)
    good = csrf_of(html)
    assert client.post("/sign-in", data={"token": token}).status_code == 400
    assert (
        client.post("/sign-in", data={"token": token, "csrf_token": "x" + good}).status_code == 400
    )
    r = client.post(
        "/sign-in",
        data={"token": token, "csrf_token": good},
        headers={"Origin": "https://elsewhere.example"},
    )
    assert r.status_code == 400
    assert client.get("/holdouts").status_code == 303  # none of those signed in
    # a fresh client (no session, so no CSRF token) cannot post at all
    assert (
        site.app.test_client()
        .post("/sign-in", data={"token": token, "csrf_token": good})
        .status_code
        == 400
    )
    # an unknown token: 401 and the form again
    r = client.post("/sign-in", data={"token": "hdt_not-a-token", "csrf_token": good})
    assert r.status_code == 401 and 'id="sign-in-failed"' in r.get_data(as_text=True)


def test_sign_in_redirects_only_within_the_site(site: Any) -> None:
    client = site.app.test_client()
    for target in ("https://evil.example/", "//evil.example/x", "/\\evil.example"):
        html = client.get("/sign-in").get_data(as_text=True)
        r = client.post(
            "/sign-in",
            data={"csrf_token": csrf_of(html), "token": site.tokens["owner"], "next": target},
        )
        assert r.status_code == 303 and r.headers["Location"] == "/holdouts"


def test_sign_out_needs_csrf_and_ends_the_session(site: Any) -> None:
    client = signed_in_client(site, "owner")
    html = _html(client, "/holdouts")
    assert client.post("/sign-out").status_code == 400
    assert client.get("/holdouts").status_code == 200  # still signed in
    r = client.post("/sign-out", data={"csrf_token": csrf_of(html)})
    assert r.status_code == 303 and r.headers["Location"] == "/sign-in"
    assert client.get("/holdouts").status_code == 303


def test_revoking_the_token_ends_its_sessions(site: Any) -> None:
    store = site.app.extensions["heldout_store"]
    record, secret = store.create_token("submitter", "g1", "to revoke")
    client = site.app.test_client()
    html = client.get("/sign-in").get_data(as_text=True)
    assert (
        client.post("/sign-in", data={"csrf_token": csrf_of(html), "token": secret}).status_code
        == 303
    )
    assert client.get("/holdouts").status_code == 200
    store.revoke_token(record.id)
    assert client.get("/holdouts").status_code == 303


def test_sign_in_is_off_without_a_secret_key(tmp_path: Any) -> None:
    from service import create_app

    app = create_app(
        {"DATABASE_URL": f"sqlite:///{tmp_path / 'x.sqlite3'}", "TESTING": True, "SECRET_KEY": ""}
    )
    app.extensions["heldout_store"].init_schema()
    client = app.test_client()
    html = client.get("/sign-in").get_data(as_text=True)
    assert 'id="sign-in-off"' in html and '<form method="post" action="/sign-in"' not in html
    assert client.post("/sign-in", data={"token": "x", "csrf_token": "y"}).status_code == 403


def test_owner_pages_show_feedback_and_reserve_side_by_side(site: Any) -> None:
    h = site.scenario.holdout_id
    client = signed_in_client(site, "owner")
    html = _html(client, f"/holdouts/{h}")
    standings = _api(site, "owner", f"/v1/holdouts/{h}/standings")
    holdout = _api(site, "owner", f"/v1/holdouts/{h}")
    assert holdout["fingerprint"] in html
    assert f'id="holdout-rows">{holdout["n_rows"]}' in html
    for entry in standings["entries"]:
        assert _num(entry["value"]) in html
        assert _num(entry["reserve_value"]) in html
        assert _num(entry["feedback_tuned"]["p_value"]) in html
    assert site.scenario.other_model in html  # owners see every group's model
    assert 'id="slices"' in html and "/charts/slices.svg" in html
    slices = client.get(f"/holdouts/{h}/charts/slices.svg")
    assert slices.status_code == 200 and slices.mimetype == "image/svg+xml"


def test_submitter_pages_show_only_what_its_json_shows(site: Any) -> None:
    h = site.scenario.holdout_id
    client = signed_in_client(site, "g1")
    html = _html(client, f"/holdouts/{h}")
    mine = _api(site, "g1", f"/v1/holdouts/{h}/standings")
    owners = _api(site, "owner", f"/v1/holdouts/{h}/standings")
    for entry in mine["entries"]:
        assert _num(entry["value"]) in html
        assert entry["reserve_value"] is None
    for entry in owners["entries"]:  # no reserve figure reaches a submitter before close
        assert _num(entry["reserve_value"]) not in html
    assert "Reserve" not in html and 'id="slices"' not in html
    assert site.scenario.other_model not in html  # another group's details stay hidden
    for sid in site.scenario.other:
        assert sid not in html
        _html(client, f"/submissions/{sid}", 404)
    assert client.get(f"/holdouts/{h}/charts/slices.svg").status_code == 403
    # the submission page: every number is the guarded feedback view of the API
    sid = site.scenario.own[0]
    page = _html(client, f"/submissions/{sid}")
    view = _api(site, "g1", f"/v1/submissions/{sid}")
    assert view["slice"] == "feedback"
    for name, value in view["scores"].items():
        assert f'<th scope="row">{name}</th><td class="num">{_num(value)}</td>' in page
    assert "max_error" not in page  # one row's residual: never shown to submitters
    for flag in view["flags"]:
        assert flag["message"] in page
    assert view["guard"]["message"] in page
    if view.get("verdict"):
        assert 'id="verdict"' in page
        for reason in view["verdict"]["reasons"]:
            assert (reason["message"] if isinstance(reason, dict) else reason) in page


def test_markup_in_a_model_name_is_text(site: Any) -> None:
    sid = site.scenario.own[2]
    client = signed_in_client(site, "g1")
    page = _html(client, f"/submissions/{sid}")
    assert MARKUP_MODEL not in page
    assert "<b>bold-model</b>" not in page and 'onerror="alert' not in page
    assert "&lt;img src=x onerror=&#34;alert(1)&#34;&gt;&lt;b&gt;bold-model&lt;/b&gt;" in page
    owner_page = _html(signed_in_client(site, "owner"), f"/holdouts/{site.scenario.holdout_id}")
    assert MARKUP_MODEL not in owner_page and "&lt;b&gt;bold-model&lt;/b&gt;" in owner_page


@pytest.mark.parametrize("who", ["owner", "g1"])
def test_sweep_page_matches_the_sweep_json(site: Any, who: str) -> None:
    h = site.scenario.holdout_id
    query = "?group=g1" if who == "owner" else ""
    client = signed_in_client(site, who)
    sweep = _api(site, who, f"/v1/holdouts/{h}/sweeps/inverse-alpha{query}")
    html = _html(client, f"/holdouts/{h}/sweeps/inverse-alpha{query}")
    assert f'id="best-complexity">{_num(sweep["best_complexity"])}' in html
    assert f'id="one-se-complexity">{_num(sweep["one_se_complexity"])}' in html
    for point in sweep["points"]:
        assert _num(point["test_loss"]) in html and _num(point["variance"]) in html
    src = f"/holdouts/{h}/charts/sweeps/inverse-alpha.svg{query}"
    assert f'<img src="{src}"' in html
    image = client.get(src)
    assert image.status_code == 200 and image.mimetype == "image/svg+xml"


def test_page_chart_images_follow_the_session(site: Any) -> None:
    sid = site.scenario.own[0]
    client = signed_in_client(site, "g1")
    own = client.get(f"/submissions/{sid}/charts/seed-spread.svg")
    api = site.app.test_client().get(
        f"/v1/submissions/{sid}/charts/seed-spread.svg",
        headers={"Authorization": f"Bearer {site.tokens['g1']}"},
    )
    assert own.status_code == 200 and own.data == api.data  # the same chart as the API's
    assert (
        client.get(f"/submissions/{site.scenario.other[0]}/charts/seed-spread.png").status_code
        == 404
    )
    assert (
        site.app.test_client().get(f"/submissions/{sid}/charts/seed-spread.svg").status_code == 303
    )
    assert SECRET_KEY not in own.get_data(as_text=True)


def test_submission_page_views_follow_the_json(site: Any) -> None:
    sid = site.scenario.own[1]
    owner = signed_in_client(site, "owner")
    view = _api(site, "owner", f"/v1/submissions/{sid}")
    for name in ("feedback", "reserve", "full"):
        page = _html(owner, f"/submissions/{sid}?slice={name}")
        part = view["views"][name]
        assert f'id="submission-slice">{name} slice, {part["n_rows"]} rows' in page
        for metric, value in part["scores"].items():
            assert f'<th scope="row">{metric}</th><td class="num">{_num(value)}</td>' in page
        assert f"/submissions/{sid}/charts/decomposition.svg?slice={name}" in page
    # a submitter's views hold no reserve before close: the page refuses it as the JSON does
    g1 = signed_in_client(site, "g1")
    assert "reserve" not in _api(site, "g1", f"/v1/submissions/{sid}")["views"]
    page = _html(g1, f"/submissions/{sid}?slice=reserve", 422)
    assert "slice" in page
    _html(g1, f"/submissions/{sid}?slice=nonsense", 422)


def test_holdout_page_pages_through_submissions(site: Any) -> None:
    h = site.scenario.holdout_id
    client = signed_in_client(site, "admin")
    listing = _api(site, "admin", f"/v1/holdouts/{h}/submissions?limit=2&offset=2")
    page = _html(client, f"/holdouts/{h}?limit=2&offset=2")
    assert f"Showing 3 to {2 + len(listing['submissions'])} of {listing['total']}" in page
    for s in listing["submissions"]:
        assert f"/submissions/{s['id']}" in page
    first = _api(site, "admin", f"/v1/holdouts/{h}/submissions?limit=2")["submissions"]
    for s in first:
        assert f'href="/submissions/{s["id"]}"' not in page.split('id="submissions"')[1]
    _html(client, f"/holdouts/{h}?limit=0", 422)
