"""IngestError's shape (RFC 9457 'errors' entries), limits, and how examples are written."""

from __future__ import annotations

import json

import pytest

from service.ingest import DEFAULT_LIMITS, IngestError, Limits
from service.ingest.errors import MAX_EXAMPLES, content_error, show_text, show_value


def test_problem_errors_lists_this_problem_then_the_others():
    extra = IngestError(422, "ids", "ids: 2 holdout ids have no row", count=2, examples=['"a"'])
    err = IngestError(422, "ids", "ids: 1 submitted ids are not in the holdout", count=1,
                      examples=['"z"'], more=[extra])
    assert err.to_problem_errors() == [
        {"field": "ids", "message": "ids: 1 submitted ids are not in the holdout", "count": 1,
         "examples": ['"z"']},
        {"field": "ids", "message": "ids: 2 holdout ids have no row", "count": 2,
         "examples": ['"a"']},
    ]
    assert str(err) == err.message
    # reference: RFC 9457 section 3: problem details are JSON objects; every member we add
    # must be JSON-serializable
    json.dumps(err.to_problem_errors())


def test_content_error_keeps_at_most_ten_examples_and_says_how_many_were_shown():
    err = content_error("predictions", 25, "values are not numbers", [f"x{i}" for i in range(25)])
    assert err.count == 25
    assert len(err.examples) == MAX_EXAMPLES == 10
    assert "predictions" in err.message and "25" in err.message
    assert "first 10 of 25 shown" in err.message


def test_show_value_writes_json_spelling():
    # reference: RFC 8259 (JSON) literal spellings, via Python's json module
    for value in (None, True, False, "a b", 3, -0.5):
        assert show_value(value) == json.dumps(value)
    assert show_value(float("nan")) == "NaN"
    assert show_value(float("-inf")) == "-Infinity"
    assert show_value(10**400).startswith("an integer of about 401 digits")  # common practice


def test_show_text_cuts_long_text_and_survives_lone_surrogates():
    long = "x" * 500
    shown = show_text(long)
    assert shown.startswith('"' + "x" * 60 + '"') and "(500 characters)" in shown
    # reference: Python's json module escapes lone surrogates as \\udXXX
    assert show_text("a\ud800") == json.dumps("a\ud800")


def test_limits_defaults_match_the_contract():
    assert DEFAULT_LIMITS == Limits(
        max_body_bytes=512 * 1024 * 1024, max_seeds=64, max_id_length=256, max_rows=20_000_000
    )


@pytest.mark.parametrize("field", ["max_body_bytes", "max_seeds", "max_id_length", "max_rows"])
@pytest.mark.parametrize("bad", [0, -1, 1.5, True])
def test_limits_refuse_non_positive_or_non_integer(field, bad):
    with pytest.raises(ValueError, match=field):
        Limits(**{field: bad})
