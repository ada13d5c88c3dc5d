"""The wire format: one marshmallow schema per request body, query and response.

The OpenAPI document is generated from these schemas, and every response body is dumped
through its schema, so a field leaves the service only if a schema here declares it.
Large arrays (ids, labels, predictions, probabilities) are ``JsonArray`` fields: the schema
checks that they are arrays and documents their shape, and ``service.ingest`` converts and
validates their elements without a Python-level pass per value in marshmallow.
"""

from __future__ import annotations

import math
import re
from typing import Any

from marshmallow import (
    RAISE,
    Schema,
    ValidationError,
    fields,
    validate,
    validates,
    validates_schema,
)

GROUP_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$"
_GROUP_RE = re.compile(GROUP_PATTERN)
TASKS = ("regression", "binary", "multiclass")
_CONTROL = re.compile(r"[\x00-\x1f\x7f]")


def check_group_name(value: str) -> str:
    """Raise ValueError unless ``value`` is a valid group name (letters, digits, ``._-``)."""
    if not _GROUP_RE.match(value):
        raise ValueError(
            f"group {value!r} must be 1-64 characters: letters, digits, '.', '_' or '-', "
            "starting with a letter or digit"
        )
    return value


def _no_control_characters(value: str) -> None:
    if _CONTROL.search(value):
        raise ValidationError("Must not contain control characters.")


class JsonArray(fields.Raw):
    """A JSON array, passed through as parsed; its elements are checked by service.ingest."""

    default_error_messages = {"invalid": "Must be a JSON array."}

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> Any:
        if not isinstance(value, list):
            raise self.make_error("invalid")
        return value


class FiniteFloat(fields.Float):
    """A float that must be finite (JSON has no NaN or infinity, but ``1e999`` parses as inf)."""

    def _validated(self, value: Any) -> float:
        number = super()._validated(value)
        if number is None or not math.isfinite(number):
            raise self.make_error("special")
        return number

    default_error_messages = {"special": "Must be a finite number."}


def _name_field(description: str, **kwargs: Any) -> fields.String:
    return fields.String(
        validate=[validate.Length(min=1, max=200), _no_control_characters],
        metadata={"description": description},
        **kwargs,
    )


GATES_DESCRIPTION = """\
Gates that decide each submission's `verdict` (`pass`, `warn` or `fail`), checked in order,
one reason per gate. Three kinds of JSON object:

- bound: `{"metric": M, "op": OP, "value": V}` with M a metric of the task (not
  `max_error` or `median_absolute_error`), a bias-variance term `bias_variance.<loss>.<term>`
  or the shorthand `bias`, `variance`, `variance_share` (the primary decomposition); OP one
  of `<`, `<=`, `>`, `>=`; V a finite number. Examples: `{"metric":"rmse","op":"<=","value":3.2}`,
  `{"metric":"variance_share","op":"<=","value":0.5}`.
- flag: `{"flag": CODE, "min_severity": "warning"|"critical"}`: trips when the submission
  carries that flag at that severity or worse; an absent flag passes. Example:
  `{"flag":"generalization_gap","min_severity":"critical"}`.
- comparison with the reference submission (named in the submission's `reference`, else the
  holdout-wide one, `PUT /v1/holdouts/{id}/reference`): `{"compare": "non_inferior", "metric":
  M, "margin": D, "alpha": A}` (not worse than the reference by more than D on the metric's
  scale, one-sided at A) or `{"compare": "superior", "metric": M, "alpha": A}`. A defaults
  to 0.05, in (0, 0.5). The reference is compared on its stored per-row loss of the primary
  metric, so M must be decidable from it: regression `mse`, `rmse`, `r2`; classification by
  a label metric: `accuracy`; by `log_loss`: `log_loss`; by `brier`, `roc_auc`,
  `average_precision` or `ece`: `brier`.
  Example: `{"compare":"non_inferior","metric":"rmse","margin":0.05,"alpha":0.05}`.

Every gate takes `"severity": "fail"` (default) or `"warn"`: what a tripped gate does. A
gate that cannot be checked (value hidden or undefined, no reference, no finite bound)
warns. A bad gate is refused at registration with 422 naming `policy.gates[i].<key>`."""


# --------------------------------------------------------------------------------- holdouts


class HoldoutPolicy(Schema):
    """How a holdout is scored and who may submit. Later versions add fields."""

    class Meta:
        unknown = RAISE

    primary_metric = fields.String(
        load_default=None,
        allow_none=True,
        metadata={
            "description": "Metric that ranks standings; must suit the task (see the metric "
            "catalog). Default: rmse for regression, accuracy for classification."
        },
    )
    groups = fields.List(
        fields.String(validate=validate.Regexp(GROUP_PATTERN)),
        load_default=None,
        allow_none=True,
        metadata={"description": "Submitter groups allowed to submit; absent or null: all."},
    )
    feedback_fraction = FiniteFloat(
        load_default=None,
        allow_none=True,
        validate=validate.Range(min=0, max=1, min_inclusive=False, max_inclusive=False),
        metadata={
            "description": "Share of rows in the feedback slice, whose scores submitters see; "
            "the rest is the sealed reserve. Split at random once, at registration "
            "(stratified by class for classification). Default 0.3."
        },
    )
    guard = fields.String(
        load_default=None,
        allow_none=True,
        validate=validate.OneOf(["ladder", "rounded", "none"]),
        metadata={
            "description": "What submitters are told: `ladder` (default; the parameter-free "
            "Ladder per group on the primary metric's per-row loss: a submission that does "
            "not beat the group's best by the margin is answered with the best's scores), "
            "`rounded` (every number rounded to `decimals`) or `none` (exact; trusted "
            "pipelines)."
        },
    )
    decimals = fields.Integer(
        load_default=None,
        allow_none=True,
        strict=True,
        validate=validate.Range(min=0, max=12),
        metadata={
            "description": "Decimals of every number submitters see (ladder, rounded). Default 4."
        },
    )
    daily_quota = fields.Integer(
        load_default=None,
        allow_none=True,
        strict=True,
        validate=validate.Range(min=1),
        metadata={
            "description": "Scored submissions per group per UTC day; more get 429 with "
            "Retry-After. Default null: no quota."
        },
    )
    min_rows = fields.Integer(
        load_default=None,
        allow_none=True,
        strict=True,
        validate=validate.Range(min=1),
        metadata={
            "description": "Fewest rows each slice may have; registration fails with 422 when "
            "the split would leave fewer. Default 30."
        },
    )

    gates = fields.List(
        fields.Raw(metadata={"type": "object"}),
        load_default=None,
        allow_none=True,
        metadata={"description": GATES_DESCRIPTION},
    )


class HoldoutPolicyOut(Schema):
    primary_metric = fields.String(required=True)
    groups = fields.List(fields.String(), allow_none=True, required=True)
    feedback_fraction = fields.Float(required=True)
    guard = fields.String(required=True)
    decimals = fields.Integer(required=True)
    daily_quota = fields.Integer(allow_none=True, required=True)
    min_rows = fields.Integer(required=True)
    gates = fields.List(
        fields.Dict(keys=fields.String()),
        required=True,
        metadata={"description": "The gates as registered (empty: every verdict passes)."},
    )


class HoldoutSplitOut(Schema):
    feedback_rows = fields.Integer(allow_none=True, required=True)
    reserve_rows = fields.Integer(allow_none=True, required=True)
    seed = fields.String(
        allow_none=True,
        required=True,
        metadata={
            "description": "Seed of the split (decimal text): shown to owners and admins, and "
            "to everyone once the holdout is closed. With the labels it reproduces the mask "
            "(service.scoring.split.feedback_mask)."
        },
    )


class HoldoutCreate(Schema):
    """Register a holdout from JSON."""

    class Meta:
        unknown = RAISE

    name = _name_field(
        "Unique per owner; registering the same name again is idempotent.", required=True
    )
    task = fields.String(required=True, validate=validate.OneOf(TASKS))
    ids = JsonArray(
        required=True,
        metadata={
            "description": "Row ids (strings, or integers read as their decimal text), unique.",
            "items": {"type": ["string", "integer"]},
        },
    )
    y_true = JsonArray(
        required=True,
        metadata={
            "description": "One label per id, same order: numbers for regression, class names "
            "(strings, or numbers read as their canonical text) for classification.",
            "items": {"type": ["number", "string"]},
        },
    )
    classes = fields.List(
        fields.Raw(metadata={"type": ["string", "number"]}),
        load_default=None,
        allow_none=True,
        metadata={
            "description": "Classification: every class, in the order probabilities use. "
            "Default: the distinct labels sorted (numerically if all are numbers). Binary: "
            "the second class is the positive one."
        },
    )
    policy = fields.Nested(HoldoutPolicy, load_default=None, allow_none=True)


class HoldoutUploadFields(Schema):
    """Registration metadata sent beside a CSV or Parquet table.

    Multipart form fields, or query parameters when the table is the raw request body.
    ``classes`` and ``policy`` are JSON text.
    """

    class Meta:
        unknown = RAISE

    name = _name_field("As in the JSON form.", required=True)
    task = fields.String(required=True, validate=validate.OneOf(TASKS))
    id_column = fields.String(load_default="id", validate=validate.Length(min=1, max=200))
    target_column = fields.String(load_default="y_true", validate=validate.Length(min=1, max=200))
    classes = fields.String(
        load_default=None, metadata={"description": 'JSON array text, e.g. ["cat","dog"].'}
    )
    policy = fields.String(
        load_default=None, metadata={"description": "JSON object text, as the JSON form."}
    )


class HoldoutMultipart(HoldoutUploadFields):
    """Multipart form: the metadata fields and the table as ``file``."""

    file = fields.Raw(
        required=True,
        metadata={
            "type": "string",
            "contentMediaType": "application/octet-stream",
            "description": "The table: CSV (text/csv) or Parquet "
            "(application/vnd.apache.parquet), told apart by the part's content type or the "
            "file name's extension (.csv, .parquet).",
        },
    )


class HoldoutOut(Schema):
    id = fields.String(required=True)
    name = fields.String(required=True)
    task = fields.String(required=True)
    n_rows = fields.Integer(required=True)
    classes = fields.List(fields.String(), allow_none=True, required=True)
    fingerprint = fields.String(
        required=True,
        metadata={
            "description": "SHA-256 (hex) of a secret 32-byte salt followed by the canonical "
            "encoding of ids and labels (README). The salt is revealed when the holdout closes."
        },
    )
    policy = fields.Nested(HoldoutPolicyOut, required=True)
    owner = fields.String(required=True, metadata={"description": "group:<name> or token:<id>"})
    created_at = fields.DateTime(required=True)
    split = fields.Nested(HoldoutSplitOut, required=True)
    closed_at = fields.DateTime(
        allow_none=True,
        required=True,
        metadata={"description": "When the holdout was closed; null while it takes submissions."},
    )
    salt = fields.String(
        allow_none=True,
        required=True,
        metadata={
            "description": "The fingerprint's salt (hex), revealed when the holdout closes; "
            "null before."
        },
    )


class HoldoutList(Schema):
    holdouts = fields.List(fields.Nested(HoldoutOut), required=True)


class HoldoutIds(Schema):
    holdout_id = fields.String(required=True)
    n_rows = fields.Integer(required=True)
    order = fields.String(
        required=True,
        metadata={"description": "Always 'ascending': by Unicode code point, not registration."},
    )
    ids = fields.List(fields.String(), required=True)


# ------------------------------------------------------------------------------ submissions


class TrainPart(Schema):
    """The model's own training rows, for the generalization gap and underfit flags."""

    class Meta:
        unknown = RAISE

    y_true = JsonArray(required=True, metadata={"description": "Training targets (m,)."})
    predictions = JsonArray(
        load_default=None,
        allow_none=True,
        metadata={"description": "(m,) or (K, m): the same K seeds as the held-out predictions."},
    )
    probabilities = JsonArray(
        load_default=None, allow_none=True, metadata={"description": "(m, C) or (K, m, C)."}
    )


class SweepSpec(Schema):
    """Marks the submission as one point of a complexity sweep."""

    class Meta:
        unknown = RAISE

    name = _name_field("The sweep's name, chosen by the group.", required=True)
    complexity = FiniteFloat(
        required=True,
        metadata={"description": "Position on the complexity axis (depth, degree, 1/lambda)."},
    )


_REFERENCE = {
    "description": "A submission id (sub_...) to compare with for the holdout's comparison "
    "gates: one of your own group's submissions on this holdout (under the Ladder one whose "
    "feedback scores were reported, guard.improved true). Default: the holdout-wide "
    "reference its owner set, if any."
}


class SubmissionCreate(Schema):
    """Predictions for every holdout row, from one model and one or more seeds."""

    class Meta:
        unknown = RAISE

    model = _name_field("Model name, free text.", required=True)
    ids = JsonArray(
        required=True,
        metadata={
            "description": "Every holdout id exactly once, in any order.",
            "items": {"type": ["string", "integer"]},
        },
    )
    predictions = JsonArray(
        load_default=None,
        allow_none=True,
        metadata={
            "description": "One list of n values (one seed) or K lists of n. Regression: "
            "numbers. Classification: class names. Optional for classification when "
            "probabilities are given."
        },
    )
    seeds = fields.List(
        fields.String(validate=validate.Length(min=1, max=100)),
        load_default=None,
        allow_none=True,
        metadata={"description": "K distinct seed labels; default '0', '1', ..."},
    )
    probabilities = JsonArray(
        load_default=None,
        allow_none=True,
        metadata={"description": "(n, C) or (K, n, C), columns in the holdout's class order."},
    )
    train = fields.Nested(TrainPart, load_default=None, allow_none=True)
    sweep = fields.Nested(SweepSpec, load_default=None, allow_none=True)
    reference = fields.String(
        load_default=None,
        allow_none=True,
        validate=validate.Length(min=1, max=64),
        metadata=_REFERENCE,
    )

    @validates("seeds")
    def _distinct_seeds(self, value: list[str] | None, **_: Any) -> None:
        if value is not None and len(set(value)) != len(value):
            raise ValidationError("Seed labels must be distinct.")


class SubmissionUploadQuery(Schema):
    """Query parameters of a submission sent as a raw CSV or Parquet body."""

    class Meta:
        unknown = RAISE

    model = _name_field("Model name, free text.", required=True)
    sweep_name = _name_field("Sweep name (with sweep_complexity).", load_default=None)
    sweep_complexity = FiniteFloat(load_default=None)
    reference = fields.String(
        load_default=None, validate=validate.Length(min=1, max=64), metadata=_REFERENCE
    )

    @validates_schema
    def _sweep_together(self, data: dict[str, Any], **_: Any) -> None:
        if (data.get("sweep_name") is None) != (data.get("sweep_complexity") is None):
            raise ValidationError(
                "Give sweep_name and sweep_complexity together, or neither.", "sweep_name"
            )


class SubmissionMultipart(SubmissionUploadQuery):
    """Multipart form: the query fields as form fields and the table as ``file``."""

    file = fields.Raw(
        required=True,
        metadata={
            "type": "string",
            "contentMediaType": "application/octet-stream",
            "description": "CSV or Parquet table (content type or .csv/.parquet file name).",
        },
    )


class IntervalOut(Schema):
    low = fields.Float(allow_none=True, required=True)
    high = fields.Float(allow_none=True, required=True)
    level = fields.Float(required=True)
    method = fields.String(required=True)
    note = fields.String(required=True)


class SpreadOut(Schema):
    mean = fields.Float(allow_none=True, required=True)
    sd = fields.Float(allow_none=True, required=True)
    min = fields.Float(allow_none=True, required=True)
    max = fields.Float(allow_none=True, required=True)


class DecompositionOut(Schema):
    loss = fields.String(required=True)
    expected_loss = fields.Float(allow_none=True, required=True)
    bias = fields.Float(allow_none=True, required=True)
    variance = fields.Float(allow_none=True, required=True)
    variance_share = fields.Float(allow_none=True, required=True)
    ensemble_loss = fields.Float(allow_none=True, required=True)
    noise = fields.Float(allow_none=True, required=True)
    extra = fields.Dict(keys=fields.String(), values=fields.Float(allow_none=True), required=True)


class FlagOut(Schema):
    code = fields.String(required=True)
    severity = fields.String(
        required=True, validate=validate.OneOf(["info", "warning", "critical"])
    )
    message = fields.String(required=True)
    evidence = fields.Dict(keys=fields.String(), required=True)


class SweepSpecOut(Schema):
    name = fields.String(required=True)
    complexity = fields.Float(required=True)


_SCORES = {"description": "Metric name to value; null where the metric is undefined."}


class GuardOut(Schema):
    """What the holdout's guard told the group about a submission."""

    kind = fields.String(required=True, validate=validate.OneOf(["ladder", "rounded", "none"]))
    improved = fields.Boolean(
        allow_none=True,
        required=True,
        metadata={"description": "Ladder: whether this submission became the group's best."},
    )
    message = fields.String(required=True)
    best_submission_id = fields.String(
        allow_none=True,
        required=True,
        metadata={
            "description": "Ladder: the group's best submission at scoring time, whose "
            "feedback scores are shown (this one when it improved)."
        },
    )
    reported_loss = fields.Float(
        allow_none=True,
        required=True,
        metadata={"description": "Ladder: the reported (rounded) mean per-row loss of the best."},
    )
    decimals = fields.Integer(allow_none=True, required=True)


class ReportNumbersOut(Schema):
    """The scoring core's numbers, as every report shape carries them (shared fields)."""

    scores = fields.Dict(
        keys=fields.String(), values=fields.Float(allow_none=True), required=True, metadata=_SCORES
    )
    intervals = fields.Dict(keys=fields.String(), values=fields.Nested(IntervalOut), required=True)
    seed_spread = fields.Dict(keys=fields.String(), values=fields.Nested(SpreadOut), required=True)
    ensemble = fields.Dict(
        keys=fields.String(), values=fields.Float(allow_none=True), required=True, metadata=_SCORES
    )
    bias_variance = fields.Dict(
        keys=fields.String(), values=fields.Nested(DecompositionOut), required=True
    )
    flags = fields.List(fields.Nested(FlagOut), required=True)
    train_scores = fields.Dict(
        keys=fields.String(), values=fields.Float(allow_none=True), allow_none=True, required=True
    )


class SliceViewOut(ReportNumbersOut):
    """The scoring core's report of a submission on one slice of the holdout's rows."""

    slice = fields.String(required=True, validate=validate.OneOf(["feedback", "reserve", "full"]))
    n_rows = fields.Integer(required=True)
    primary_value = fields.Float(allow_none=True, required=True)
    details = fields.Dict(keys=fields.String(), required=True)


class ReasonIntervalOut(Schema):
    low = fields.Float(allow_none=True, required=True)
    high = fields.Float(allow_none=True, required=True)
    level = fields.Float(
        required=True,
        metadata={
            "description": "1 - 2 alpha: the end on the gate's side is the one-sided "
            "(1 - alpha) confidence bound."
        },
    )


class GateReasonOut(Schema):
    """What one gate found."""

    gate = fields.String(
        required=True,
        metadata={
            "description": "The gate in text form, e.g. `rmse <= 3.2`, "
            "`flag generalization_gap at critical`, `rmse non_inferior margin 0.05 "
            "alpha 0.05`."
        },
    )
    spec = fields.Dict(
        keys=fields.String(), required=True, metadata={"description": "The gate as registered."}
    )
    kind = fields.String(required=True, validate=validate.OneOf(["bound", "flag", "compare"]))
    status = fields.String(required=True, validate=validate.OneOf(["pass", "warn", "fail"]))
    severity = fields.String(
        required=True,
        validate=validate.OneOf(["fail", "warn"]),
        metadata={"description": "What this gate does to the verdict when it trips."},
    )
    metric = fields.String(
        required=True, metadata={"description": "The metric, bias-variance term or flag code."}
    )
    value = fields.Float(
        allow_none=True,
        required=True,
        metadata={
            "description": "The submission's value (null when hidden or undefined; "
            "for a flag null); for a comparison the candidate's score."
        },
    )
    op = fields.String(
        allow_none=True,
        required=True,
        metadata={
            "description": "Bound: the gate's operator. Comparison: the relation the "
            "one-sided confidence bound of the difference must have to `bound`."
        },
    )
    bound = fields.Float(
        allow_none=True,
        required=True,
        metadata={
            "description": "Bound: the threshold. Comparison: the threshold of the "
            "difference (-margin for scores, +margin for errors and losses, 0 for "
            "superior)."
        },
    )
    message = fields.String(required=True)
    difference = fields.Float(
        allow_none=True,
        required=True,
        metadata={
            "description": "Comparison: metric(this) - metric(reference) on the rows "
            "of the verdict's slice."
        },
    )
    interval = fields.Nested(ReasonIntervalOut, allow_none=True, required=True)
    p_value = fields.Float(
        allow_none=True,
        required=True,
        metadata={"description": "Comparison: two-sided p-value of no difference."},
    )
    alpha = fields.Float(allow_none=True, required=True)
    reference = fields.String(
        allow_none=True,
        required=True,
        metadata={
            "description": "Comparison: the reference submission compared with "
            "(`holdout-reference` in a group's verdict when it is another group's)."
        },
    )
    details = fields.Dict(
        keys=fields.String(),
        required=True,
        metadata={
            "description": "Comparison: method, confidence_bound, one-sided p-value "
            "(t-based methods), n_rows. Flag: flag_severity."
        },
    )


class VerdictOut(Schema):
    """One word a pipeline can branch on, and why."""

    status = fields.String(required=True, validate=validate.OneOf(["pass", "warn", "fail"]))
    slice = fields.String(
        required=True,
        validate=validate.OneOf(["feedback", "reserve", "full"]),
        metadata={"description": "Rows the verdict's numbers and comparisons describe."},
    )
    based_on = fields.String(
        required=True,
        metadata={
            "description": "The submission whose numbers the verdict reads: this one, "
            "or under the Ladder the group's best when this one did not improve (its "
            "verdict is then the best's, as its scores are)."
        },
    )
    reference = fields.String(
        allow_none=True,
        required=True,
        metadata={
            "description": "The reference submission of the comparison gates, or null. A "
            "group's own verdict names another group's submission (the owner's holdout-wide "
            "reference) `holdout-reference`, not by its id."
        },
    )
    note = fields.String(
        required=True,
        metadata={"description": "Empty, or why the verdict is another submission's (Ladder)."},
    )
    reasons = fields.List(fields.Nested(GateReasonOut), required=True)


_VERDICT = {
    "description": "The verdict as the group that submitted is told: on the feedback slice, "
    "through the holdout's guard (rounded numbers; under the Ladder a non-improving "
    "submission gets its group's best's verdict). Owners and admins see the same here."
}
_VERDICTS_BY_SLICE = {
    "description": "Owners and admins: exact verdicts on `feedback`, `reserve` and `full`. "
    "Submitters: empty while the holdout is open; `reserve` (rounded) after it is closed."
}


class SubmissionResult(ReportNumbersOut):
    """A scored submission: everything the scoring core reports, and nothing per row."""

    id = fields.String(required=True)
    holdout_id = fields.String(required=True)
    group = fields.String(required=True)
    model = fields.String(required=True)
    task = fields.String(required=True)
    n_rows = fields.Integer(required=True)
    n_seeds = fields.Integer(required=True)
    seeds = fields.List(fields.String(), required=True)
    created_at = fields.DateTime(required=True)
    primary_metric = fields.String(required=True)
    primary_value = fields.Float(allow_none=True, required=True)
    details = fields.Dict(
        keys=fields.String(),
        required=True,
        metadata={
            "description": "Structured results (classification: classes, per-class "
            "metrics, confusion matrix)."
        },
    )
    sweep = fields.Nested(SweepSpecOut, allow_none=True, required=True)
    fingerprint = fields.String(
        required=True, metadata={"description": "The holdout's fingerprint at scoring time."}
    )
    slice = fields.String(
        required=True,
        validate=validate.OneOf(["feedback", "full"]),
        metadata={
            "description": "Rows the top-level numbers describe: `full` for owners and admins; "
            "`feedback` for submitters, as the guard reports them."
        },
    )
    guard = fields.Nested(GuardOut, allow_none=True, required=True)
    views = fields.Dict(
        keys=fields.String(),
        values=fields.Nested(SliceViewOut),
        required=True,
        metadata={
            "description": "Owners and admins: `feedback`, `reserve` and `full`. Submitters: "
            "empty while the holdout is open; `reserve` after it is closed."
        },
    )
    verdict = fields.Nested(VerdictOut, required=True, metadata=_VERDICT)
    verdicts_by_slice = fields.Dict(
        keys=fields.String(),
        values=fields.Nested(VerdictOut),
        required=True,
        metadata=_VERDICTS_BY_SLICE,
    )


class SubmissionSummary(Schema):
    id = fields.String(required=True)
    holdout_id = fields.String(required=True)
    group = fields.String(required=True)
    model = fields.String(required=True)
    n_seeds = fields.Integer(required=True)
    created_at = fields.DateTime(required=True)
    primary_metric = fields.String(required=True)
    primary_value = fields.Float(allow_none=True, required=True)
    sweep = fields.Nested(SweepSpecOut, allow_none=True, required=True)
    slice = fields.String(
        required=True,
        metadata={"description": "`full` (owners, admins) or `feedback` as the guard reports."},
    )
    guard = fields.Nested(GuardOut, allow_none=True, required=True)
    verdict_status = fields.String(
        required=True,
        validate=validate.OneOf(["pass", "warn", "fail"]),
        metadata={
            "description": "Status of the submission's `verdict`: the verdict as its group "
            "was told (under the Ladder a non-improving submission's is its group's best's)."
        },
    )


class PageQuery(Schema):
    class Meta:
        unknown = RAISE

    limit = fields.Integer(load_default=100, validate=validate.Range(min=1, max=1000))
    # Bounded so that every database takes it as a 64-bit integer (schemathesis found a
    # 500 from SQLite on a larger offset).
    offset = fields.Integer(load_default=0, validate=validate.Range(min=0, max=2**62))


class SubmissionList(Schema):
    submissions = fields.List(fields.Nested(SubmissionSummary), required=True)
    total = fields.Integer(required=True)
    limit = fields.Integer(required=True)
    offset = fields.Integer(required=True)


class FeedbackTunedOut(Schema):
    """Welch's one-sided test that the best's feedback loss is below its reserve loss."""

    code = fields.String(required=True)
    flagged = fields.Boolean(required=True)
    loss = fields.String(required=True, metadata={"description": "The per-row loss tested."})
    feedback_loss = fields.Float(required=True)
    reserve_loss = fields.Float(required=True)
    difference = fields.Float(required=True)
    statistic = fields.Float(allow_none=True, required=True)
    df = fields.Float(allow_none=True, required=True)
    p_value = fields.Float(required=True)
    alpha = fields.Float(required=True)
    n_feedback = fields.Integer(required=True)
    n_reserve = fields.Integer(required=True)


class StandingsEntry(Schema):
    rank = fields.Integer(required=True, metadata={"description": "1 is best; ties share."})
    group = fields.String(required=True)
    value = fields.Float(allow_none=True, required=True)
    interval = fields.Nested(IntervalOut, allow_none=True, required=True)
    submission_id = fields.String(
        allow_none=True,
        required=True,
        metadata={"description": "Shown to the holdout's owners and to the group itself."},
    )
    model = fields.String(allow_none=True, required=True)
    n_submissions = fields.Integer(required=True)
    created_at = fields.DateTime(required=True)
    reserve_value = fields.Float(
        allow_none=True,
        required=True,
        metadata={"description": "Owners and admins: the same submission on the reserve slice."},
    )
    reserve_interval = fields.Nested(IntervalOut, allow_none=True, required=True)
    feedback_tuned = fields.Nested(
        FeedbackTunedOut,
        allow_none=True,
        required=True,
        metadata={"description": "Owners and admins: adaptive overfitting to the feedback slice."},
    )
    verdict_status = fields.String(
        allow_none=True,
        required=True,
        metadata={
            "description": "The best submission's verdict status as its group was told "
            "(pass, warn, fail)."
        },
    )
    reserve_verdict_status = fields.String(
        allow_none=True,
        required=True,
        metadata={"description": "Owners and admins: its exact verdict on the reserve slice."},
    )


class FinalStandingsEntry(Schema):
    rank = fields.Integer(required=True, metadata={"description": "1 is best; ties share."})
    group = fields.String(required=True)
    value = fields.Float(
        allow_none=True,
        required=True,
        metadata={"description": "The group's best submission (as in entries) on the reserve."},
    )
    interval = fields.Nested(IntervalOut, allow_none=True, required=True)
    submission_id = fields.String(allow_none=True, required=True)
    model = fields.String(allow_none=True, required=True)
    n_submissions = fields.Integer(required=True)
    created_at = fields.DateTime(required=True)
    verdict_status = fields.String(
        allow_none=True,
        required=True,
        metadata={
            "description": "Its verdict status on the reserve slice (rounded numbers "
            "for submitters)."
        },
    )


class Standings(Schema):
    holdout_id = fields.String(required=True)
    primary_metric = fields.String(required=True)
    higher_is_better = fields.Boolean(required=True)
    slice = fields.String(
        required=True, metadata={"description": "Rows the entries rank on: `feedback`."}
    )
    guard = fields.String(required=True)
    closed_at = fields.DateTime(allow_none=True, required=True)
    entries = fields.List(fields.Nested(StandingsEntry), required=True)
    final = fields.List(
        fields.Nested(FinalStandingsEntry),
        allow_none=True,
        required=True,
        metadata={
            "description": "After close: the groups ranked on the reserve slice; shown to owners, "
            "admins and the groups that submitted. Null before close."
        },
    )


class SweepQuery(Schema):
    class Meta:
        unknown = RAISE

    group = fields.String(
        load_default=None,
        validate=validate.Regexp(GROUP_PATTERN),
        metadata={
            "description": "Owners and admins: the group whose sweep to show (required "
            "for them). Submitters always see their own group's."
        },
    )
    slice = fields.String(
        load_default=None,
        validate=validate.OneOf(["feedback", "reserve", "full"]),
        metadata={
            "description": "Rows the curve is computed on. Owners and admins: any (default "
            "full). Submitters: feedback (the default), and reserve once the holdout is closed."
        },
    )


class SweepPointOut(Schema):
    complexity = fields.Float(required=True)
    test_loss = fields.Float(required=True)
    test_loss_se = fields.Float(required=True)
    train_loss = fields.Float(allow_none=True, required=True)
    bias = fields.Float(required=True)
    variance = fields.Float(required=True)
    region = fields.String(
        required=True, validate=validate.OneOf(["underfit", "optimal", "overfit", "neutral"])
    )
    submission_id = fields.String(required=True)
    model = fields.String(required=True)


class SweepOut(Schema):
    holdout_id = fields.String(required=True)
    group = fields.String(required=True)
    name = fields.String(required=True)
    loss = fields.String(required=True)
    points = fields.List(fields.Nested(SweepPointOut), required=True)
    best_complexity = fields.Float(required=True)
    one_se_complexity = fields.Float(required=True)
    slice = fields.String(required=True)
    n_withheld = fields.Integer(
        required=True,
        metadata={
            "description": "Submissions of the sweep left out: under the Ladder a submitter's "
            "feedback curve uses only the submissions the Ladder accepted."
        },
    )


class ReferenceSet(Schema):
    """The holdout-wide reference submission (the current champion)."""

    class Meta:
        unknown = RAISE

    submission = fields.String(
        required=True,
        validate=validate.Length(min=1, max=64),
        metadata={
            "description": "A submission id on this holdout, of any group (under the "
            "Ladder one whose feedback scores were reported, guard.improved true)."
        },
    )


class ReferenceOut(Schema):
    holdout_id = fields.String(required=True)
    submission = fields.String(
        allow_none=True,
        required=True,
        metadata={"description": "The holdout-wide reference submission id; null: none."},
    )
    group = fields.String(allow_none=True, required=True)
    model = fields.String(allow_none=True, required=True)


# ----------------------------------------------------------------------------------- health


class Health(Schema):
    status = fields.String(required=True)


class Ready(Schema):
    status = fields.String(required=True)
    database = fields.String(required=True)


# ---------------------------------------------------------------------------------- errors


class ProblemError(Schema):
    field = fields.String(required=True, metadata={"description": "Which input is wrong."})
    message = fields.String(required=True)
    count = fields.Integer(required=True, metadata={"description": "How many items; 0 if n/a."})
    examples = fields.List(
        fields.String(),
        required=True,
        metadata={"description": "Up to 10 offending values, from the caller's own input."},
    )


class Problem(Schema):
    """RFC 9457 problem details."""

    type = fields.String(required=True)
    title = fields.String(required=True)
    status = fields.Integer(required=True)
    detail = fields.String(required=True)
    errors = fields.List(fields.Nested(ProblemError), required=True)
