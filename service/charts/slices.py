"""For a holdout's owner: each group's feedback-slice score against its reserve-slice score.

The slices are disjoint random rows of one holdout, so an untuned submission scores about
the same on both and its point lies near the line y = x. A group that tuned to the feedback
slice (the one whose scores it sees) looks better there than on the sealed reserve: for a
metric where lower is better its point lies above the line (reserve worse, i.e. higher),
for a metric where higher is better below it. That half of the plane is shaded, and groups
flagged by the adaptive-overfitting test (``feedback_tuned.flagged``) are drawn in brick.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from matplotlib.lines import Line2D
from matplotlib.patches import Polygon

from . import style
from ._chart import Canvas, Chart, ChartInputError, format_number, mapping, optional_number
from ._common import direction_text, fit, legend_below, metric_direction, title


def _label_offsets(points: Sequence[tuple[float, float]], span: float) -> list[tuple[float, float]]:
    """Text offsets (points) for point labels: labels of nearby points step downwards."""
    offsets: list[tuple[float, float]] = []
    placed: list[tuple[float, float, int]] = []
    for x, y in points:
        step = 0
        for px, py, pstep in placed:
            if abs(px - x) < 0.12 * span and abs(py - y) < 0.05 * span and pstep >= step:
                step = pstep + 1
        placed.append((x, y, step))
        offsets.append((6.0, 4.0 - 11.0 * step))
    return offsets


def slices_chart(
    rows: Sequence[Mapping[str, Any]],
    *,
    metric: str,
    higher_is_better: bool | None = None,
) -> Chart:
    """Chart each group's feedback-slice score against its reserve-slice score.

    Why: tuning to the feedback slice shows as a point off the line y = x on the side
    where the feedback slice looks better; the owner sees at a glance which groups'
    standings to distrust.

    Parameters
    ----------
    rows : sequence of mappings
        The owner's ``Standings["entries"]``: ``group``, ``value`` (feedback slice),
        ``reserve_value`` and optionally ``feedback_tuned`` (with ``flagged``,
        ``p_value``). Rows with a null value on either slice are listed in the alt text and
        table but not drawn.
    metric : str
        ``Standings["primary_metric"]``.
    higher_is_better : bool, optional
        ``Standings["higher_is_better"]``; default from the metric catalog.

    Returns
    -------
    Chart
        Marks ``point-group-<i>`` (``<i>`` = position in ``rows``; ``data-x`` the feedback
        value, ``data-value`` the reserve value, ``data-label`` the group,
        ``data-flagged``), ``line-identity-0`` and ``region-tuned-0`` (``data-side``
        ``above`` or ``below``). Table rows ``{group, feedback, reserve, difference,
        side, flagged, p_value}``, ``difference`` = reserve - feedback.
    """
    if isinstance(rows, (str, bytes)) or not isinstance(rows, Sequence):
        raise ChartInputError("rows", "must be a list of standings entries")
    higher = metric_direction(metric, higher_is_better)
    tuned_side = "below" if higher else "above"
    entries: list[dict[str, Any]] = []
    for i, raw in enumerate(rows):
        row = mapping(raw, f"rows[{i}]")
        group = row.get("group")
        if not isinstance(group, str) or not group:
            raise ChartInputError(f"rows[{i}].group", f"must be a group name, got {group!r}")
        feedback = optional_number(row.get("value"), f"rows[{i}].value")
        reserve = optional_number(row.get("reserve_value"), f"rows[{i}].reserve_value")
        tuned = row.get("feedback_tuned")
        flagged = bool(tuned.get("flagged")) if isinstance(tuned, Mapping) else None
        p_value = (
            optional_number(tuned.get("p_value"), f"rows[{i}].feedback_tuned.p_value")
            if isinstance(tuned, Mapping)
            else None
        )
        side = difference = None
        if feedback is not None and reserve is not None:
            side = "above" if reserve > feedback else "below" if reserve < feedback else "on"
            difference = reserve - feedback
        entries.append(
            {
                "index": i,
                "group": group,
                "feedback": feedback,
                "reserve": reserve,
                "difference": difference,
                "side": side,
                "flagged": flagged,
                "p_value": p_value,
            }
        )
    drawn = [e for e in entries if e["side"] is not None]

    table = [{k: e[k] for k in e if k != "index"} for e in entries]
    chart_title = f"{metric}: feedback slice against reserve slice"
    toward = "above" if not higher else "below"
    alt = [
        f"Scatter of {metric} ({direction_text(higher)}) per group: feedback slice on the "
        f"horizontal axis, reserve slice on the vertical, with the line y = x. Points "
        f"{toward} the line look better on the feedback slice than on the reserve, the sign "
        f"of tuning to the feedback slice."
    ]
    for e in entries:
        if e["side"] is None:
            alt.append(f"{e['group']}: not drawn (no value on one slice).")
            continue
        flag = ""
        if e["flagged"] is not None:
            flag = "; flagged as tuned" if e["flagged"] else "; not flagged"
            if e["p_value"] is not None:
                flag += f" (p = {format_number(e['p_value'])})"
        where = "on the line" if e["side"] == "on" else f"{e['side']} the line"
        alt.append(
            f"{e['group']}: feedback {format_number(e['feedback'])}, reserve "
            f"{format_number(e['reserve'])}, {where}{flag}."
        )
    if not entries:
        alt.append("No groups yet.")
    alt_text = " ".join(alt)

    def draw(canvas: Canvas) -> None:
        axes = canvas.figure.add_subplot()
        title(canvas, axes, chart_title)
        values = [e["feedback"] for e in drawn] + [e["reserve"] for e in drawn]
        if values:
            lo, hi = min(values), max(values)
        else:
            lo, hi = 0.0, 1.0
        span = (hi - lo) or (abs(hi) or 1.0)
        lo, hi = lo - 0.12 * span, hi + 0.12 * span
        corner = (lo, hi) if tuned_side == "above" else (hi, lo)
        shade = Polygon(
            [(lo, lo), (hi, hi), corner],
            closed=True,
            facecolor=style.TUNED_REGION,
            edgecolor="none",
            zorder=0,
        )
        axes.add_patch(shade)
        canvas.mark(
            shade,
            "region",
            "tuned",
            0,
            title=f"{tuned_side} the line: feedback slice looks better than reserve",
            side=tuned_side,
        )
        tx, ty = (0.04, 0.96) if tuned_side == "above" else (0.96, 0.04)
        axes.text(
            tx,
            ty,
            "feedback slice looks better:\ntuned to it?",
            transform=axes.transAxes,
            ha="left" if tuned_side == "above" else "right",
            va="top" if tuned_side == "above" else "bottom",
            fontsize=style.NOTE_SIZE,
            color=style.BIAS,
            parse_math=False,
        )
        identity = Line2D(
            [lo, hi], [lo, hi], color=style.INK, linewidth=1.0, zorder=1, label="y = x"
        )
        axes.add_line(identity)
        canvas.mark(identity, "line", "identity", 0, title="y = x: same score on both slices")

        offsets = _label_offsets([(e["feedback"], e["reserve"]) for e in drawn], span)
        labelled = {"flagged": False, "not flagged": False}
        for e, offset in zip(drawn, offsets, strict=True):
            key = "flagged" if e["flagged"] else "not flagged"
            label = (
                ("flagged as tuned" if e["flagged"] else "group")
                if not labelled[key]
                else "_nolegend_"
            )
            labelled[key] = True
            (dot,) = axes.plot(
                [e["feedback"]],
                [e["reserve"]],
                marker="D" if e["flagged"] else "o",
                linestyle="none",
                markersize=8,
                color=style.FLAGGED if e["flagged"] else style.UNFLAGGED,
                markeredgecolor=style.PAPER,
                markeredgewidth=0.8,
                zorder=3,
                label=label,
            )
            canvas.mark(
                dot,
                "point",
                "group",
                e["index"],
                title=f"{e['group']}: feedback {e['feedback']!r}, reserve {e['reserve']!r}",
                x=e["feedback"],
                value=e["reserve"],
                label=e["group"],
                flagged=e["flagged"],
                p_value=e["p_value"],
            )
            right_side = (e["feedback"] - lo) / (hi - lo) > 0.7  # label to the left
            axes.annotate(
                e["group"],
                xy=(e["feedback"], e["reserve"]),
                xytext=(-offset[0], offset[1]) if right_side else offset,
                textcoords="offset points",
                fontsize=style.VALUE_SIZE,
                ha="right" if right_side else "left",
                va="bottom",
                parse_math=False,
                zorder=4,
            )
        axes.set_xlim(lo, hi)
        axes.set_ylim(lo, hi)
        axes.set_xlabel(fit(canvas, f"feedback slice {metric}", narrow_width=28))
        axes.set_ylabel(fit(canvas, f"reserve slice {metric}", narrow_width=24))
        axes.grid(True)
        legend_below(canvas, axes, wide_columns=4, narrow_columns=2)

    return Chart("slices", chart_title, alt_text, table, draw)


__all__ = ["slices_chart"]
