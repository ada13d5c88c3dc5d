"""Gates an owner sets in a holdout's policy, and the verdict a pipeline can branch on.

A gate is one JSON object in the policy's ``gates`` list; ``parse_gates`` validates the list
for a task and returns frozen dataclasses; ``evaluate_gates`` turns a submission's scores,
bias-variance terms, flags and (optionally) paired comparisons with a reference submission
into a ``Verdict``: ``pass``, ``warn`` or ``fail``, with one ``GateReason`` per gate.

Gate grammar (every key not listed is refused):

- **bound**: ``{"metric": M, "op": OP, "value": V, "severity": S}``

  - ``M``: a score key of the task (``catalog.metrics_for(task)``, except the metrics that
    are one row's residual, ``catalog.REVEALS_ROW``: a verdict on them would reveal it), or
    a bias-variance term ``"bias_variance.<loss>.<term>"`` with ``<loss>`` a key of the
    report's ``bias_variance`` (regression: ``squared``; classification: ``zero_one``,
    ``log``, ``squared``) and ``<term>`` one of ``expected_loss``, ``bias``, ``variance``,
    ``variance_share``, ``ensemble_loss``, ``noise`` (``zero_one`` also
    ``unbiased_variance``, ``biased_variance``, ``net_variance``);
  - shorthand: ``"bias"``, ``"variance"``, ``"variance_share"`` name that term of the
    *primary decomposition*, the one the report's own flags use: ``squared`` for
    regression; for classification ``log`` when the submission has probabilities, else
    ``zero_one``;
  - ``OP``: ``"<"``, ``"<="``, ``">"``, ``">="`` (the gate passes when ``value OP V``);
    ``V`` a finite number;
  - ``S``: ``"fail"`` (default) or ``"warn"``.

- **flag**: ``{"flag": CODE, "min_severity": "warning" | "critical", "severity": S}``: the
  gate trips when the submission carries flag ``CODE`` (``flags.FLAG_CODES``) at
  ``min_severity`` (default ``warning``) or worse. A flag that is absent, including one
  whose check could not run (no training rows for ``generalization_gap``), passes: flags
  report evidence, and no evidence is not a trip.

- **comparison**: ``{"compare": "non_inferior", "metric": M, "margin": D, "alpha": A,
  "severity": S}`` or ``{"compare": "superior", "metric": M, "alpha": A, "severity": S}``
  against a reference submission on the same rows. ``M`` a score key of the task (not a
  row residual), ``D`` a finite margin >= 0 on the metric's own scale (required for
  ``non_inferior``, refused for ``superior``), ``A`` in (0, 0.5), default 0.05.
  Non-inferior: the one-sided (1 - A) confidence bound of metric(candidate) -
  metric(reference) lies on the good side of ``-D`` (scores) or ``+D`` (errors and
  losses); superior: on the good side of 0 (``comparison.non_inferiority``).

Which paired test decides a comparison (``plan_comparison``, ``compare_for_gate``); each is
computed at level 1 - 2A, whose interval end is the one-sided (1 - A) bound:

- ``mse``, ``log_loss``, ``brier``: paired t on the per-row losses (``paired_loss_test``);
- ``rmse``: the margin is on the RMSE scale, the scale the owner wrote. The difference
  ``sqrt(mse_c) - sqrt(mse_r)`` gets a delta-method standard error from the per-row squared
  losses, ``sd(l_c / (2 rmse_c) - l_r / (2 rmse_r)) / sqrt(n)`` (the sample variance of the
  linearised difference, so the pairing is kept), and a t interval with n - 1 degrees of
  freedom like the paired t test it approximates;
- ``r2``: on the same rows ``r2_c - r2_r = -(mse_c - mse_r) / mean((y - mean(y))^2)``
  exactly, so the paired t test on the per-row squared losses scaled by that constant
  decides it without predictions;
- ``mae``, ``mape``: paired t on the per-row absolute (percentage) errors averaged over
  seeds, computed here from ``y_true`` and the predictions;
- ``accuracy``: McNemar's test with Newcombe's interval when both sides have one seed
  (per-row correctness is 0 or 1), else the paired t test on correctness averaged over
  seeds (McNemar needs 0/1 pairs);
- every other metric (explained variance, F1, ROC AUC, ...): ``paired_bootstrap`` with the
  caller's metric function.

Verdict rule: any tripped ``fail`` gate gives ``fail``; else any tripped ``warn`` gate, any
value that is missing (hidden from this caller, or undefined: null or NaN), any comparison
gate without a reference submission and any comparison without a finite bound give
``warn`` (a gate that cannot be checked is not passed silently, but not failed either);
else ``pass``. No gates: ``pass`` with no reasons.
"""

from __future__ import annotations

import copy
import dataclasses
import math
import operator
from collections.abc import Callable, Collection, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from . import catalog
from ._checks import ScoringInputError, as_seed_predictions, as_targets
from .comparison import MetricFn, mcnemar_test, non_inferiority, paired_bootstrap, paired_loss_test
from .flags import FLAG_CODES
from .intervals import no_interval
from .options import ScoringOptions
from .results import Comparison, Flag, Interval

OPS: Mapping[str, Callable[[float, float], bool]] = {
    "<": operator.lt,
    "<=": operator.le,
    ">": operator.gt,
    ">=": operator.ge,
}
"""Comparison operators of bound gates."""

SEVERITIES = ("fail", "warn")
"""What a tripped gate does to the verdict."""

FLAG_SEVERITIES = ("warning", "critical")
"""Values of a flag gate's ``min_severity``, least severe first."""

_FLAG_RANK = {"info": 0, "warning": 1, "critical": 2}

COMPARE_KINDS = ("non_inferior", "superior")

DEFAULT_ALPHA = 0.05
"""Alpha of a comparison gate that states none (common practice)."""

DECOMPOSITION_TERMS = (
    "expected_loss",
    "bias",
    "variance",
    "variance_share",
    "ensemble_loss",
    "noise",
)
"""Terms of every ``Decomposition``."""

ZERO_ONE_TERMS = ("unbiased_variance", "biased_variance", "net_variance")
"""Further terms of the zero-one decomposition (``Decomposition.extra``)."""

SHORTHAND_TERMS = ("bias", "variance", "variance_share")
"""Bound-gate metrics that name a term of the primary decomposition."""

DECOMPOSITIONS: Mapping[str, tuple[str, ...]] = {
    catalog.REGRESSION: ("squared",),
    catalog.BINARY: ("zero_one", "log", "squared"),
    catalog.MULTICLASS: ("zero_one", "log", "squared"),
}
"""Keys of ``Report.bias_variance`` by task."""

PRIMARY_DECOMPOSITION: Mapping[str, tuple[str, ...]] = {
    catalog.REGRESSION: ("squared",),
    catalog.BINARY: ("log", "zero_one"),
    catalog.MULTICLASS: ("log", "zero_one"),
}
"""The shorthand's decomposition: the first of these the submission has (as the flags)."""

_BOUND_KEYS = frozenset({"metric", "op", "value", "severity"})
_FLAG_KEYS = frozenset({"flag", "min_severity", "severity"})
_COMPARE_KEYS = frozenset({"compare", "metric", "margin", "alpha", "severity"})


# ------------------------------------------------------------------------------ gates


@dataclass(frozen=True)
class BoundGate:
    """``metric op value``. ``losses`` is empty for a score; for a bias-variance term it
    holds the decomposition key (or, for a shorthand, the candidates in order of
    preference) and ``term`` the term. ``given`` is the gate as the owner wrote it."""

    metric: str
    op: str
    value: float
    severity: str = "fail"
    losses: tuple[str, ...] = ()
    term: str | None = None
    given: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class FlagGate:
    """Trips when flag ``flag`` is raised at ``min_severity`` or worse."""

    flag: str
    min_severity: str = "warning"
    severity: str = "fail"
    given: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class CompareGate:
    """Candidate against a reference submission: ``non_inferior`` within ``margin``
    (metric scale), or ``superior`` (``margin`` 0), one-sided at ``alpha``."""

    compare: str
    metric: str
    margin: float
    alpha: float = DEFAULT_ALPHA
    severity: str = "fail"
    given: dict[str, Any] = field(default_factory=dict)

    @property
    def level(self) -> float:
        """Level of the two-sided interval whose end is the one-sided (1 - alpha) bound."""
        return 1.0 - 2.0 * self.alpha


Gate = BoundGate | FlagGate | CompareGate


class GateSpecError(ScoringInputError):
    """The policy's gates are invalid. ``problems`` lists every ``(field, message)`` found,
    fields named ``gates[<index>].<key>``; ``field`` and ``message`` are the first one's."""

    def __init__(self, problems: list[tuple[str, str]]) -> None:
        super().__init__(problems[0][0], problems[0][1])
        self.problems = problems
        self.args = ("; ".join(f"{f}: {m}" for f, m in problems),)


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _choices(values: Sequence[str]) -> str:
    return ", ".join(repr(v) for v in values)


class _Parser:
    """Collects every problem of one gate list, then raises them together."""

    def __init__(self, task: str, comparable_row_losses: Collection[str] | None) -> None:
        self.task = task
        self.comparable = comparable_row_losses
        self.problems: list[tuple[str, str]] = []

    def problem(self, where: str, message: str) -> None:
        self.problems.append((where, message))

    def severity(self, item: Mapping[str, Any], where: str) -> str:
        value = item.get("severity", "fail")
        if value not in SEVERITIES:
            self.problem(
                f"{where}.severity", f"must be one of {_choices(SEVERITIES)}, got {value!r}"
            )
            return "fail"
        return str(value)

    def unknown_keys(self, item: Mapping[str, Any], allowed: frozenset[str], where: str) -> None:
        for key in sorted(set(item) - allowed, key=str):
            self.problem(
                f"{where}.{key}",
                f"unknown key for this kind of gate; allowed: {_choices(sorted(allowed))}",
            )

    def score_metric(self, name: Any, where: str, *, purpose: str) -> catalog.MetricInfo | None:
        allowed = [m.name for m in catalog.metrics_for(self.task) if not m.reveals_row]
        info = catalog.METRICS.get(name) if isinstance(name, str) else None
        if info is None or self.task not in info.tasks:
            extra = ""
            if purpose == "bound":
                extra = (
                    ", a bias-variance term 'bias_variance.<loss>.<term>', or one of "
                    f"{_choices(SHORTHAND_TERMS)}"
                )
            self.problem(
                f"{where}.metric",
                f"{name!r} is not a metric of a {self.task} holdout; use one of "
                f"{', '.join(allowed)}{extra}",
            )
            return None
        if info.reveals_row:
            self.problem(
                f"{where}.metric",
                f"{name!r} is one row's residual, which a verdict would reveal; use one of "
                f"{', '.join(allowed)}",
            )
            return None
        return info

    def bound(self, item: Mapping[str, Any], where: str) -> BoundGate | None:
        self.unknown_keys(item, _BOUND_KEYS, where)
        before = len(self.problems)
        metric = item.get("metric")
        losses: tuple[str, ...] = ()
        term: str | None = None
        if isinstance(metric, str) and metric in SHORTHAND_TERMS:
            losses, term = PRIMARY_DECOMPOSITION[self.task], metric
        elif isinstance(metric, str) and metric.startswith("bias_variance."):
            parts = metric.split(".")
            loss_keys = DECOMPOSITIONS[self.task]
            if len(parts) != 3:
                self.problem(
                    f"{where}.metric",
                    f"{metric!r}: write a bias-variance term as 'bias_variance.<loss>.<term>'",
                )
            elif parts[1] not in loss_keys:
                self.problem(
                    f"{where}.metric",
                    f"{metric!r}: no {parts[1]!r} decomposition for a {self.task} holdout; "
                    f"use one of {_choices(loss_keys)}",
                )
            else:
                terms = DECOMPOSITION_TERMS + (ZERO_ONE_TERMS if parts[1] == "zero_one" else ())
                if parts[2] not in terms:
                    self.problem(
                        f"{where}.metric",
                        f"{metric!r}: unknown term {parts[2]!r}; use one of {_choices(terms)}",
                    )
                else:
                    losses, term = (parts[1],), parts[2]
        elif "metric" not in item:
            self.problem(f"{where}.metric", "required")
        else:
            self.score_metric(metric, where, purpose="bound")
        op = item.get("op")
        if "op" not in item:
            self.problem(f"{where}.op", f"required: one of {_choices(list(OPS))}")
        elif op not in OPS:
            self.problem(f"{where}.op", f"must be one of {_choices(list(OPS))}, got {op!r}")
        value = item.get("value")
        if "value" not in item:
            self.problem(f"{where}.value", "required: the bound, a number")
        elif not (_is_number(value) and math.isfinite(value)):
            self.problem(f"{where}.value", f"must be a finite number, got {value!r}")
        severity = self.severity(item, where)
        if len(self.problems) > before:
            return None
        return BoundGate(
            metric=str(metric),
            op=str(op),
            value=float(value),
            severity=severity,
            losses=losses,
            term=term,
            given=copy.deepcopy(dict(item)),
        )

    def flag(self, item: Mapping[str, Any], where: str) -> FlagGate | None:
        self.unknown_keys(item, _FLAG_KEYS, where)
        before = len(self.problems)
        code = item.get("flag")
        if code not in FLAG_CODES:
            self.problem(f"{where}.flag", f"must be one of {_choices(FLAG_CODES)}, got {code!r}")
        minimum = item.get("min_severity", "warning")
        if minimum not in FLAG_SEVERITIES:
            self.problem(
                f"{where}.min_severity",
                f"must be one of {_choices(FLAG_SEVERITIES)}, got {minimum!r}",
            )
        severity = self.severity(item, where)
        if len(self.problems) > before:
            return None
        return FlagGate(str(code), str(minimum), severity, copy.deepcopy(dict(item)))

    def compare(self, item: Mapping[str, Any], where: str) -> CompareGate | None:
        self.unknown_keys(item, _COMPARE_KEYS, where)
        before = len(self.problems)
        kind = item.get("compare")
        if kind not in COMPARE_KINDS:
            self.problem(
                f"{where}.compare", f"must be one of {_choices(COMPARE_KINDS)}, got {kind!r}"
            )
        if "metric" not in item:
            self.problem(f"{where}.metric", "required: the metric to compare")
            info = None
        else:
            info = self.score_metric(item["metric"], where, purpose="compare")
        if info is not None and self.comparable is not None:
            plan = plan_comparison(info.name)
            if plan.row_loss is None or plan.row_loss not in self.comparable:
                possible = [
                    m.name
                    for m in catalog.metrics_for(self.task)
                    if not m.reveals_row and plan_comparison(m.name).row_loss in self.comparable
                ]
                self.problem(
                    f"{where}.metric",
                    f"a reference submission keeps only its per-row "
                    f"{'/'.join(sorted(self.comparable))} losses here, which cannot decide "
                    f"{info.name!r}; compare one of {', '.join(possible) or '(none)'}",
                )
        margin = item.get("margin")
        if kind == "non_inferior":
            if "margin" not in item:
                self.problem(
                    f"{where}.margin",
                    "required for non_inferior: how much worse than the reference is "
                    "acceptable, on the metric's own scale (>= 0)",
                )
            elif not (_is_number(margin) and math.isfinite(margin) and margin >= 0):
                self.problem(
                    f"{where}.margin", f"must be a finite number >= 0, got {margin!r}"
                )
        elif kind == "superior" and "margin" in item:
            self.problem(
                f"{where}.margin",
                "superior takes no margin; use 'compare': 'non_inferior' with a margin",
            )
        alpha = item.get("alpha", DEFAULT_ALPHA)
        if not (_is_number(alpha) and 0.0 < alpha < 0.5):
            self.problem(f"{where}.alpha", f"must be a number in (0, 0.5), got {alpha!r}")
        severity = self.severity(item, where)
        if len(self.problems) > before or info is None:
            return None
        return CompareGate(
            compare=str(kind),
            metric=info.name,
            margin=float(margin) if kind == "non_inferior" else 0.0,
            alpha=float(alpha),
            severity=severity,
            given=copy.deepcopy(dict(item)),
        )


def parse_gates(
    raw: Sequence[Mapping[str, Any]] | None,
    *,
    task: str,
    comparable_row_losses: Collection[str] | None = None,
) -> list[Gate]:
    """Validate a policy's ``gates`` list for ``task`` (module docstring: the grammar).

    Parameters
    ----------
    raw : list of JSON objects, or None (no gates)
    task : {"regression", "binary", "multiclass"}
    comparable_row_losses : collection of str, optional
        The per-row losses (``catalog.ROW_LOSSES`` keys) the caller keeps for reference
        submissions. When given, a comparison gate that those losses cannot decide (see
        ``plan_comparison``) is refused at once rather than warned about on every
        submission. The service stores one, the primary metric's ``row_loss``.

    Returns
    -------
    list of BoundGate, FlagGate, CompareGate
        In the order given; evaluation reports one reason per gate in this order.

    Raises
    ------
    GateSpecError
        (a ``ScoringInputError``, so a ``ValueError``) listing every problem, each named
        ``gates[<index>].<key>``.
    """
    if task not in catalog.TASKS:
        raise ValueError(f"task must be one of {', '.join(catalog.TASKS)}; got {task!r}")
    if raw is None:
        return []
    if isinstance(raw, (str, bytes, Mapping)) or not isinstance(raw, Sequence):
        got = type(raw).__name__
        raise GateSpecError([("gates", f"expected a list of gate objects, got {got}")])
    parser = _Parser(task, comparable_row_losses)
    gates: list[Gate] = []
    for i, item in enumerate(raw):
        where = f"gates[{i}]"
        gate: Gate | None
        if not isinstance(item, Mapping):
            parser.problem(where, f"expected a JSON object, got {type(item).__name__}")
            continue
        if "compare" in item:
            gate = parser.compare(item, where)
        elif "flag" in item:
            gate = parser.flag(item, where)
        elif "metric" in item:
            gate = parser.bound(item, where)
        else:
            parser.problem(
                where,
                "a gate needs 'metric' (a bound: metric, op, value), 'flag' (a flag gate) "
                "or 'compare' (a comparison with a reference submission)",
            )
            continue
        if gate is not None:
            gates.append(gate)
    if parser.problems:
        raise GateSpecError(parser.problems)
    return gates


# ---------------------------------------------------------------------------- verdict


@dataclass(frozen=True)
class GateReason:
    """What one gate found.

    ``status``: ``pass``, ``warn`` or ``fail``. ``metric``: the metric, bias-variance term
    or flag code the gate reads. ``value``: the submission's value (None when missing;
    for a comparison, the candidate's score). ``bound``: the gate's threshold (for a
    comparison, the threshold of the difference: -margin for scores, +margin for
    errors and losses, 0 for superiority). For comparisons, ``difference`` =
    metric(candidate) - metric(reference), ``interval`` its two-sided (1 - 2 alpha)
    interval (the relevant end is the one-sided (1 - alpha) confidence bound) and
    ``p_value`` the two-sided p-value of no difference; ``details`` names the method and,
    for t-based methods, the one-sided p-value of the gate's own null hypothesis.
    """

    gate: dict[str, Any]
    status: str
    metric: str
    value: float | None
    bound: float | None
    message: str
    difference: float | None = None
    interval: tuple[float | None, float | None] | None = None
    p_value: float | None = None
    details: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Verdict:
    """``status`` ``pass``, ``warn`` or ``fail`` and one reason per gate, in gate order."""

    status: str
    reasons: list[GateReason]


def _num(x: float) -> str:
    """How numbers appear in messages: 4 significant digits."""
    return format(x, ".4g")


def _finite(x: Any) -> float | None:
    if x is None or isinstance(x, bool):
        return None
    try:
        f = float(x)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


def _term_of(decomposition: Any, term: str) -> Any:
    """A term of a Decomposition, or of its JSON form (``extra`` terms included)."""
    if dataclasses.is_dataclass(decomposition) and not isinstance(decomposition, type):
        value = getattr(decomposition, term, None)
        extra = getattr(decomposition, "extra", {}) or {}
    elif isinstance(decomposition, Mapping):
        value = decomposition.get(term)
        extra = decomposition.get("extra") or {}
    else:
        return None
    if value is None and term not in DECOMPOSITION_TERMS:
        value = extra.get(term)
    return value


def _bound_reason(
    gate: BoundGate,
    scores: Mapping[str, float | None],
    bias_variance: Mapping[str, Any],
) -> GateReason:
    given = copy.deepcopy(gate.given)
    condition = f"{gate.metric} {gate.op} {_num(gate.value)}"
    if gate.losses:
        loss = next((k for k in gate.losses if bias_variance.get(k) is not None), None)
        label = gate.metric if loss is None else f"bias_variance.{loss}.{gate.term}"
        assert gate.term is not None
        value = None if loss is None else _finite(_term_of(bias_variance[loss], gate.term))
    else:
        label = gate.metric
        value = _finite(scores.get(gate.metric))
    if value is None:
        return GateReason(
            given,
            "warn",
            label,
            None,
            gate.value,
            f"{label} is not available to this verdict (hidden or undefined): cannot check "
            f"{condition}",
        )
    ok = OPS[gate.op](value, gate.value)
    if ok:
        return GateReason(
            given, "pass", label, value, gate.value, f"{label} = {_num(value)} meets {condition}"
        )
    return GateReason(
        given,
        gate.severity,
        label,
        value,
        gate.value,
        f"{label} = {_num(value)} does not meet {condition}",
    )


def _flag_field(flag: Any, name: str) -> Any:
    if isinstance(flag, Mapping):
        return flag.get(name)
    return getattr(flag, name, None)


def _flag_reason(gate: FlagGate, flags: Sequence[Mapping[str, Any] | Flag]) -> GateReason:
    given = copy.deepcopy(gate.given)
    threshold = _FLAG_RANK[gate.min_severity]
    raised = [
        str(_flag_field(f, "severity"))
        for f in flags
        if _flag_field(f, "code") == gate.flag
        and _FLAG_RANK.get(str(_flag_field(f, "severity")), -1) >= threshold
    ]
    worse = "" if gate.min_severity == "critical" else " or worse"
    if not raised:
        return GateReason(
            given,
            "pass",
            gate.flag,
            None,
            None,
            f"no {gate.flag} flag at {gate.min_severity}{worse}",
        )
    worst = max(raised, key=_FLAG_RANK.__getitem__)
    return GateReason(
        given,
        gate.severity,
        gate.flag,
        None,
        None,
        f"{gate.flag} flag raised at {worst} (the gate trips at {gate.min_severity}{worse})",
        details={"flag_severity": worst},
    )


def _one_sided_t_p(comparison: Comparison, threshold: float, higher_is_better: bool) -> float:
    """p-value of the gate's one-sided null (difference on the bad side of ``threshold``) for
    t-based comparisons; NaN for others."""
    se = comparison.details.get("se", math.nan)
    df = comparison.details.get("df", math.nan)
    if comparison.method not in ("paired_t", "paired_t_delta"):
        return math.nan
    if not (math.isfinite(se) and math.isfinite(df) and df > 0):
        return math.nan
    shift = comparison.difference - threshold
    if se == 0:
        good = shift > 0 if higher_is_better else shift < 0
        return 0.0 if good else 1.0
    t = shift / se
    return float(stats.t.sf(t, df) if higher_is_better else stats.t.cdf(t, df))


def _compare_reason(
    gate: CompareGate, scores: Mapping[str, float | None], comparison: Comparison | None
) -> GateReason:
    given = copy.deepcopy(gate.given)
    info = catalog.METRICS[gate.metric]
    hib = info.higher_is_better
    threshold = 0.0 if gate.compare == "superior" else (-gate.margin if hib else gate.margin)
    value = _finite(scores.get(gate.metric))
    what = (
        "better than the reference"
        if gate.compare == "superior"
        else f"not worse than the reference by more than {_num(gate.margin)}"
    )
    if comparison is None:
        return GateReason(
            given,
            "warn",
            gate.metric,
            value,
            threshold,
            f"no reference submission to compare {gate.metric} with: cannot check {what}",
        )
    if comparison.metric != gate.metric:
        raise ValueError(
            f"the comparison is of {comparison.metric!r}, the gate compares {gate.metric!r}"
        )
    result = non_inferiority(comparison, margin=gate.margin, higher_is_better=hib, alpha=gate.alpha)
    bound = result["bound"]
    interval = comparison.interval
    if result["source"] == "t_quantile":  # a paired_t comparison at another level: rescale
        half = abs(bound - comparison.difference)
        low, high = comparison.difference - half, comparison.difference + half
    else:
        low, high = interval.low, interval.high
    one_sided = _one_sided_t_p(comparison, threshold, hib)
    details: dict[str, Any] = {
        "method": comparison.method,
        "alpha": gate.alpha,
        "margin": gate.margin,
        "confidence_bound": bound,
        "bound_side": result["bound_side"],
        "one_sided_level": 1.0 - gate.alpha,
        "n_rows": comparison.n_rows,
    }
    if math.isfinite(one_sided):
        details["p_value_one_sided"] = one_sided
    common = {
        "difference": _finite(comparison.difference),
        "interval": (_finite(low), _finite(high)),
        "p_value": _finite(comparison.p_value),
        "details": details,
    }
    level_text = f"{100 * (1 - gate.alpha):.4g}%"
    if not math.isfinite(bound):
        note = interval.note or "the comparison has no interval"
        return GateReason(
            given,
            "warn",
            gate.metric,
            value,
            threshold,
            f"cannot decide whether {gate.metric} is {what}: {note}",
            **common,
        )
    decided = result["superior"] if gate.compare == "superior" else result["decision"]
    relation = (">" if hib else "<") if decided else (">=" if not hib else "<=")
    text = (
        f"{gate.metric} difference {_num(comparison.difference)}, one-sided {level_text} "
        f"{result['bound_side']} bound {_num(bound)} {relation} {_num(threshold)}"
    )
    if decided:
        return GateReason(
            given, "pass", gate.metric, value, threshold, f"{gate.metric} is {what}: {text}",
            **common,
        )
    return GateReason(
        given,
        gate.severity,
        gate.metric,
        value,
        threshold,
        f"{gate.metric} not shown {what}: {text}",
        **common,
    )


def evaluate_gates(
    gates: Sequence[Gate],
    *,
    scores: Mapping[str, float | None],
    bias_variance: Mapping[str, Any],
    flags: Sequence[Mapping[str, Any] | Flag],
    comparisons: Mapping[int, Comparison] | None = None,
) -> Verdict:
    """The verdict of a scored submission (module docstring: the rule).

    Parameters
    ----------
    gates : list of gates from ``parse_gates``
    scores : mapping of metric name to value
        What the verdict may see: the caller leaves out (or sets to None) what is hidden.
    bias_variance : mapping of loss name to a ``Decomposition`` or its JSON form
    flags : sequence of ``Flag`` or mappings with ``code`` and ``severity``
    comparisons : mapping of gate index to ``Comparison``, optional
        For each comparison gate with a reference, the candidate-minus-reference
        comparison from ``compare_for_gate`` (level ``1 - 2 * alpha``; a ``paired_t``
        comparison at another level is rescaled). A comparison gate without one warns.

    Returns
    -------
    Verdict
        One reason per gate in gate order; no gates gives ``pass`` with no reasons.
    """
    reasons: list[GateReason] = []
    found = comparisons or {}
    for i, gate in enumerate(gates):
        if isinstance(gate, BoundGate):
            reasons.append(_bound_reason(gate, scores, bias_variance))
        elif isinstance(gate, FlagGate):
            reasons.append(_flag_reason(gate, flags))
        elif isinstance(gate, CompareGate):
            reasons.append(_compare_reason(gate, scores, found.get(i)))
        else:
            raise TypeError(f"gates[{i}] is not a gate: {gate!r}")
    statuses = {r.status for r in reasons}
    status = "fail" if "fail" in statuses else "warn" if "warn" in statuses else "pass"
    return Verdict(status, reasons)


# ------------------------------------------------------------------------ comparisons


@dataclass(frozen=True)
class ComparisonPlan:
    """How ``compare_for_gate`` decides a metric, and what it needs.

    ``method``: ``paired_t``, ``paired_t_delta``, ``mcnemar`` (McNemar with one seed a side,
    else the paired t test on correctness) or ``paired_bootstrap``. ``row_loss``: the
    per-row loss (``catalog.ROW_LOSSES`` key) passed as ``row_losses_*``, or None when the
    comparison needs predictions. ``needs``: the ``compare_for_gate`` arguments required.
    """

    method: str
    row_loss: str | None
    needs: tuple[str, ...]


_ROWS = ("row_losses_candidate", "row_losses_reference")
_PREDS = ("y_true", "pred_candidate", "pred_reference")
_PLANS: Mapping[str, ComparisonPlan] = {
    "mse": ComparisonPlan("paired_t", "squared", _ROWS),
    "rmse": ComparisonPlan("paired_t_delta", "squared", _ROWS),
    "r2": ComparisonPlan("paired_t", "squared", _ROWS + ("y_true",)),
    "log_loss": ComparisonPlan("paired_t", "log", _ROWS),
    "brier": ComparisonPlan("paired_t", "brier", _ROWS),
    "accuracy": ComparisonPlan("mcnemar", "zero_one", _ROWS),
    "mae": ComparisonPlan("paired_t", None, _PREDS),
    "mape": ComparisonPlan("paired_t", None, _PREDS),
}


def plan_comparison(metric: str) -> ComparisonPlan:
    """Which paired test decides a comparison of ``metric`` (module docstring), and its inputs.

    For ``accuracy`` the per-row zero-one losses (or ``correct_*``) suffice.
    """
    if metric not in catalog.METRICS:
        raise ValueError(f"unknown metric {metric!r}")
    return _PLANS.get(
        metric, ComparisonPlan("paired_bootstrap", None, ("metric_fn",) + _PREDS)
    )


def _need(value: ArrayLike | None, name: str, metric: str, why: str) -> ArrayLike:
    if value is None:
        raise ScoringInputError(name, f"required to compare {metric}: {why}")
    return value


def _rmse_delta(
    loss_c: NDArray[np.float64], loss_r: NDArray[np.float64], level: float
) -> Comparison:
    """RMSE(candidate) - RMSE(reference) with a delta-method t interval (module docstring)."""
    n = loss_c.size
    mean_c, mean_r = float(loss_c.mean()), float(loss_r.mean())
    rmse_c, rmse_r = math.sqrt(mean_c), math.sqrt(mean_r)
    diff = rmse_c - rmse_r
    details = {"mean_a": rmse_c, "mean_b": rmse_r, "n_effective": float(n)}
    nan_details = {**details, "se": math.nan, "statistic": math.nan, "df": math.nan}
    if n < 2:
        return Comparison(
            "rmse", "paired_t_delta", diff, no_interval(level, "needs at least two rows"),
            math.nan, n, nan_details,
        )
    if rmse_c == 0.0 and rmse_r == 0.0:  # every loss is zero on both sides
        se = 0.0
    elif rmse_c == 0.0 or rmse_r == 0.0:
        note = "the delta method for RMSE needs both RMSEs above zero"
        return Comparison(
            "rmse", "paired_t_delta", diff, no_interval(level, note), math.nan, n, nan_details
        )
    else:
        z = loss_c / (2.0 * rmse_c) - loss_r / (2.0 * rmse_r)
        se = float(z.std(ddof=1)) / math.sqrt(n)
    df = n - 1.0
    if se > 0:
        statistic = diff / se
        p_value = float(2.0 * stats.t.sf(abs(statistic), df))
        half = float(stats.t.ppf(0.5 + level / 2.0, df)) * se
        interval = Interval(diff - half, diff + half, level, "delta")
    else:
        statistic = 0.0 if diff == 0 else math.copysign(math.inf, diff)
        p_value = 1.0 if diff == 0 else 0.0
        interval = Interval(diff, diff, level, "delta", "every row has the same loss difference")
    details.update(se=se, statistic=statistic, df=df)
    return Comparison("rmse", "paired_t_delta", diff, interval, p_value, n, details)


def _seed_rows(y: NDArray[np.float64], pred: ArrayLike, name: str) -> NDArray[np.float64]:
    return as_seed_predictions(pred, y.size, name=name)


def _correctness(
    values: ArrayLike | None, row_losses: ArrayLike | None, side: str
) -> NDArray[np.float64]:
    if values is not None:
        c = np.asarray(values, dtype=np.float64)
        name = f"correct_{side}"
    else:
        losses = _need(
            row_losses,
            f"row_losses_{side}",
            "accuracy",
            "per-row zero-one losses (or correct_candidate / correct_reference)",
        )
        c = 1.0 - np.asarray(losses, dtype=np.float64)
        name = f"row_losses_{side}"
    c = as_targets(c, name=name)
    if ((c < 0) | (c > 1)).any():
        raise ScoringInputError(name, "per-row correctness must lie in [0, 1]")
    return c


def compare_for_gate(
    gate: CompareGate,
    *,
    row_losses_candidate: ArrayLike | None = None,
    row_losses_reference: ArrayLike | None = None,
    correct_candidate: ArrayLike | None = None,
    correct_reference: ArrayLike | None = None,
    metric_fn: MetricFn | None = None,
    y_true: ArrayLike | None = None,
    pred_candidate: ArrayLike | None = None,
    pred_reference: ArrayLike | None = None,
    options: ScoringOptions = ScoringOptions(),  # noqa: B008 (frozen, immutable)
) -> Comparison:
    """Candidate against reference on the same rows, by the test ``plan_comparison`` names.

    The result is on the metric's own scale (``difference`` = metric(candidate) -
    metric(reference)) at level ``1 - 2 * gate.alpha``, ready for ``evaluate_gates``.

    Parameters
    ----------
    gate : CompareGate
    row_losses_candidate, row_losses_reference : array-like of shape (n_rows,), optional
        Per-row losses averaged over seeds, of the kind ``plan_comparison(metric).row_loss``
        names (``regression_row_losses``, ``classification_row_losses``).
    correct_candidate, correct_reference : array-like of shape (n_rows,), optional
        Accuracy only: per-row correctness (bool for one seed, the share of seeds right for
        several); default ``1 - row_losses_*`` (zero-one losses).
    metric_fn : callable ``(y_true, pred, sample_weight) -> float``, optional
        Bootstrap metrics only: the metric on a subset of rows (``paired_bootstrap``).
    y_true : array-like of shape (n_rows, ...), optional
        Targets: ``r2`` (the target variance), ``mae``, ``mape`` and bootstrap metrics.
    pred_candidate, pred_reference : array-like, optional
        ``mae``, ``mape``: predictions of shape (n_rows,) or (K, n_rows). Bootstrap metrics:
        whatever ``metric_fn`` takes, indexed by row on the first axis.
    options : ScoringOptions
        Bootstrap resamples, method and seed.

    Raises
    ------
    ScoringInputError
        naming a missing or malformed argument.
    """
    metric = gate.metric
    level = gate.level
    plan = plan_comparison(metric)
    if plan.method in ("paired_t", "paired_t_delta") and plan.row_loss is not None:
        why = f"per-row {plan.row_loss} losses of both submissions"
        a = as_targets(
            _need(row_losses_candidate, "row_losses_candidate", metric, why),
            name="row_losses_candidate",
        )
        b = as_targets(
            _need(row_losses_reference, "row_losses_reference", metric, why),
            name="row_losses_reference",
        )
        if a.shape != b.shape:
            raise ScoringInputError(
                "row_losses_reference",
                f"expected the candidate's rows, shape {a.shape}, got {b.shape}",
            )
        if metric == "rmse":
            return _rmse_delta(a, b, level)
        if metric == "r2":
            y = as_targets(_need(y_true, "y_true", metric, "the targets' variance"))
            if y.shape != a.shape:
                raise ScoringInputError("y_true", f"expected shape {a.shape}, got {y.shape}")
            total = float(np.mean((y - y.mean()) ** 2))
            if not total > 0:  # R^2 is 0 or 1 by convention there: nothing to test
                note = "r2 compares errors with the targets' variance, and the targets are constant"
                return Comparison(
                    metric, "paired_t", math.nan, no_interval(level, note), math.nan, int(a.size)
                )
            return paired_loss_test(-a / total, -b / total, metric=metric, level=level)
        return paired_loss_test(a, b, metric=metric, level=level)
    if plan.method == "mcnemar":
        c = _correctness(correct_candidate, row_losses_candidate, "candidate")
        r = _correctness(correct_reference, row_losses_reference, "reference")
        if c.shape != r.shape:
            raise ScoringInputError(
                "row_losses_reference",
                f"expected the candidate's rows, shape {c.shape}, got {r.shape}",
            )
        if np.isin(c, (0.0, 1.0)).all() and np.isin(r, (0.0, 1.0)).all():
            cmp_ = mcnemar_test(c.astype(bool), r.astype(bool), level=level)
            return dataclasses.replace(cmp_, metric=metric)
        return paired_loss_test(c, r, metric=metric, level=level)
    why = "the targets and both submissions' predictions"
    if plan.method == "paired_t":  # mae, mape from predictions
        y = as_targets(_need(y_true, "y_true", metric, why))
        pc = _seed_rows(y, _need(pred_candidate, "pred_candidate", metric, why), "pred_candidate")
        pr = _seed_rows(y, _need(pred_reference, "pred_reference", metric, why), "pred_reference")
        scale = 1.0 if metric == "mae" else np.maximum(np.abs(y), np.finfo(np.float64).eps)
        rows_c = (np.abs(pc - y) / scale).mean(axis=0)
        rows_r = (np.abs(pr - y) / scale).mean(axis=0)
        return paired_loss_test(rows_c, rows_r, metric=metric, level=level)
    fn = _need(metric_fn, "metric_fn", metric, "a metric function for the paired bootstrap")
    return paired_bootstrap(
        fn,  # type: ignore[arg-type]
        _need(y_true, "y_true", metric, why),
        _need(pred_candidate, "pred_candidate", metric, why),
        _need(pred_reference, "pred_reference", metric, why),
        metric=metric,
        n_resamples=options.n_resamples,
        level=level,
        method=options.bootstrap_method,
        seed=options.seed,
    )


__all__ = [
    "COMPARE_KINDS",
    "DECOMPOSITIONS",
    "DECOMPOSITION_TERMS",
    "DEFAULT_ALPHA",
    "FLAG_SEVERITIES",
    "OPS",
    "PRIMARY_DECOMPOSITION",
    "SEVERITIES",
    "SHORTHAND_TERMS",
    "ZERO_ONE_TERMS",
    "BoundGate",
    "CompareGate",
    "ComparisonPlan",
    "FlagGate",
    "Gate",
    "GateReason",
    "GateSpecError",
    "Verdict",
    "compare_for_gate",
    "evaluate_gates",
    "parse_gates",
    "plan_comparison",
]
