"""The primary metric over seeds: a dot strip with the mean, the interval and the ensemble.

Three rows share one value axis: each seed's value as a dot (dots closer than a fortieth
of the axis stack upwards), with the mean over seeds as a dashed tick; the headline
interval as a capped line around the headline score; the seed-combined (ensemble)
prediction's value as a diamond. A spread of dots wider than the interval says that one
seed's score is not a reliable summary.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

from matplotlib.lines import Line2D

from . import style
from ._chart import Canvas, Chart, ChartInputError, format_number, mapping, optional_number
from ._common import direction_text, fit, legend_below, metric_direction, title

_ROW_SEEDS, _ROW_INTERVAL, _ROW_ENSEMBLE = 2.0, 1.0, 0.0
_STACK_BINS = 40


def _stack_levels(values: Sequence[float], low: float, high: float) -> list[int]:
    """Dot-plot stacking: the level of each dot within its bin of width (high-low)/40."""
    width = (high - low) / _STACK_BINS or 1.0
    seen: dict[int, int] = {}
    levels = []
    for v in values:
        b = int(math.floor((v - low) / width))
        levels.append(seen.get(b, 0))
        seen[b] = seen.get(b, 0) + 1
    return levels


def seed_spread_chart(
    per_seed_values: Sequence[float | None],
    *,
    metric: str,
    ensemble_value: float | None,
    interval: Mapping[str, Any] | None,
    seeds: Sequence[str] | None = None,
    score: float | None = None,
    higher_is_better: bool | None = None,
) -> Chart:
    """Chart one metric's value for each seed, their mean, the interval and the ensemble.

    Why: a score from one training run hides how much it moves with the seed; seeing the
    seeds beside the interval and the ensemble shows whether a difference between two
    submissions could be luck of the seed, and what averaging the seeds buys.

    Parameters
    ----------
    per_seed_values : sequence of float or None, length K
        The metric for each seed (``SubmissionResult["details"]["per_seed"][metric]``);
        null for a seed whose metric is undefined (left out, and said so).
    metric : str
        The metric's name (its direction is read from the metric catalog unless
        ``higher_is_better`` is given).
    ensemble_value : float or None
        The metric of the seed-combined prediction (``ensemble[metric]``); None: not drawn.
    interval : mapping or None
        ``intervals[metric]``: ``low``, ``high`` (null when there is none), ``level``,
        ``method``, ``note``.
    seeds : sequence of str, optional
        Seed labels (``SubmissionResult["seeds"]``), default ``"0"``, ``"1"``, ...
    score : float, optional
        The headline score the interval is about (``scores[metric]``), drawn as the
        interval's centre; it differs from the mean over seeds for ``rmse``
        (sqrt of the mean ``mse``).

    Returns
    -------
    Chart
        Marks ``point-seed-<k>`` (``data-value``, ``data-label`` the seed label),
        ``point-mean-0``, ``point-ensemble-0``, ``point-score-0`` and ``band-interval-0``
        (``data-low``, ``data-high``, ``data-level``); table rows ``{series, label, value}``.
    """
    if isinstance(per_seed_values, (str, bytes)) or not isinstance(per_seed_values, Sequence):
        raise ChartInputError("per_seed_values", "must be a list of numbers, one per seed")
    if len(per_seed_values) == 0:
        raise ChartInputError("per_seed_values", "needs at least one seed's value")
    labels = [str(k) for k in range(len(per_seed_values))] if seeds is None else list(seeds)
    if len(labels) != len(per_seed_values):
        raise ChartInputError(
            "seeds", f"has {len(labels)} labels for {len(per_seed_values)} per-seed values"
        )
    values = [optional_number(v, f"per_seed_values[{k}]") for k, v in enumerate(per_seed_values)]
    drawn = [(k, v) for k, v in enumerate(values) if v is not None]
    if not drawn:
        raise ChartInputError("per_seed_values", f"{metric} is undefined for every seed")
    ensemble = optional_number(ensemble_value, "ensemble_value")
    headline = optional_number(score, "score")
    low = high = level = None
    method = note_text = ""
    if interval is not None:
        iv = mapping(interval, "interval")
        low = optional_number(iv.get("low"), "interval.low")
        high = optional_number(iv.get("high"), "interval.high")
        level = optional_number(iv.get("level"), "interval.level")
        method = str(iv.get("method") or "")
        note_text = str(iv.get("note") or "")
        if (low is None) != (high is None):
            raise ChartInputError("interval", "low and high must both be numbers or both null")
        if low is not None and high is not None and low > high:
            raise ChartInputError("interval", f"low {low!r} is above high {high!r}")
    higher = metric_direction(metric, higher_is_better)
    mean = math.fsum(v for _, v in drawn) / len(drawn)

    level_text = f"{100.0 * level:.4g}% interval" if level is not None else "interval"
    table: list[dict[str, Any]] = [
        {"series": "seed", "label": labels[k], "value": v} for k, v in enumerate(values)
    ]
    table.append({"series": "mean", "label": "mean over seeds", "value": mean})
    if headline is not None:
        table.append({"series": "score", "label": "headline score", "value": headline})
    table.append({"series": "interval_low", "label": f"{level_text} low", "value": low})
    table.append({"series": "interval_high", "label": f"{level_text} high", "value": high})
    table.append({"series": "ensemble", "label": "seeds combined (ensemble)", "value": ensemble})

    chart_title = f"{metric} over {len(values)} seed{'s' if len(values) != 1 else ''}"
    listed = ", ".join(f"seed {labels[k]}: {format_number(v)}" for k, v in drawn)
    missing = [labels[k] for k, v in enumerate(values) if v is None]
    alt = [
        f"Dot strip of {metric} ({direction_text(higher)}) "
        + (f"for each of {len(values)} seeds: " if len(values) > 1 else "for one seed: ")
        + f"{listed}."
    ]
    if missing:
        alt.append(f"Undefined for seed {', '.join(missing)}.")
    alt.append(f"Mean over seeds {format_number(mean)}.")
    if headline is not None:
        alt.append(f"Headline score {format_number(headline)}.")
    if low is not None and high is not None:
        alt.append(
            f"{level_text[0].upper()}{level_text[1:]} ({method}) from {format_number(low)} "
            f"to {format_number(high)}."
        )
    else:
        alt.append(f"No interval{': ' + note_text if note_text else ''}.")
    if ensemble is not None:
        alt.append(f"The seeds' combined (ensemble) prediction scores {format_number(ensemble)}.")
    alt_text = " ".join(alt)

    def draw(canvas: Canvas) -> None:
        axes = canvas.figure.add_subplot()
        title(canvas, axes, chart_title)
        xs = [v for _, v in drawn] + [mean]
        xs += [x for x in (low, high, ensemble, headline) if x is not None]
        xlo, xhi = min(xs), max(xs)
        span = (xhi - xlo) or (abs(xhi) or 1.0)
        xlo, xhi = xlo - 0.08 * span, xhi + 0.08 * span
        stack = _stack_levels([v for _, v in drawn], xlo, xhi)
        step = min(0.16, 0.6 / max(1, max(stack)))
        for (k, v), lift in zip(drawn, stack, strict=True):
            (dot,) = axes.plot(
                [v],
                [_ROW_SEEDS + lift * step],
                "o",
                color=style.TEST,
                markersize=8,
                markeredgecolor=style.PAPER,
                markeredgewidth=0.8,
                label="one seed" if k == drawn[0][0] else "_nolegend_",
            )
            canvas.mark(
                dot, "point", "seed", k, title=f"seed {labels[k]}: {v!r}", value=v, label=labels[k]
            )
        tick = Line2D(
            [mean, mean],
            [_ROW_SEEDS - 0.3, _ROW_SEEDS + 0.3 + step * max(stack)],
            color=style.INK,
            linestyle=(0, (4, 2)),
            linewidth=1.6,
            label="mean over seeds",
        )
        axes.add_line(tick)
        canvas.mark(tick, "point", "mean", 0, title=f"mean over seeds: {mean!r}", value=mean)
        axes.text(
            mean,
            _ROW_SEEDS - 0.34,
            f"mean {format_number(mean)}",
            ha="center",
            va="top",
            fontsize=style.VALUE_SIZE,
            parse_math=False,
        )

        if low is not None and high is not None:
            (band,) = axes.plot(
                [low, high],
                [_ROW_INTERVAL, _ROW_INTERVAL],
                color=style.VARIANCE,
                linewidth=3.0,
                solid_capstyle="butt",
                marker="|",
                markersize=16,
                markeredgewidth=2.2,
                label=f"{level_text} ({method})",
            )
            canvas.mark(
                band,
                "band",
                "interval",
                0,
                title=f"{level_text} ({method}): {low!r} to {high!r}",
                low=low,
                high=high,
                level=level,
                method=method,
            )
            axes.text(
                low,
                _ROW_INTERVAL - 0.22,
                format_number(low),
                ha="center",
                va="top",
                fontsize=style.VALUE_SIZE,
                parse_math=False,
            )
            axes.text(
                high,
                _ROW_INTERVAL - 0.22,
                format_number(high),
                ha="center",
                va="top",
                fontsize=style.VALUE_SIZE,
                parse_math=False,
            )
        else:
            reason = note_text or (method if method not in ("", "none") else "")
            axes.text(
                (xlo + xhi) / 2.0,
                _ROW_INTERVAL,
                fit(canvas, f"no interval{': ' + reason if reason else ''}", narrow_width=30),
                ha="center",
                va="center",
                fontsize=style.NOTE_SIZE,
                color=style.MUTED,
                parse_math=False,
            )
        if headline is not None:
            (mid,) = axes.plot(
                [headline],
                [_ROW_INTERVAL],
                "o",
                color=style.PAPER,
                markersize=7,
                markeredgecolor=style.VARIANCE,
                markeredgewidth=2.0,
                label="headline score",
            )
            canvas.mark(
                mid, "point", "score", 0, title=f"headline score: {headline!r}", value=headline
            )

        if ensemble is not None:
            (diamond,) = axes.plot(
                [ensemble],
                [_ROW_ENSEMBLE],
                "D",
                color=style.ENSEMBLE,
                markersize=9,
                label="seeds combined",
            )
            canvas.mark(
                diamond,
                "point",
                "ensemble",
                0,
                title=f"seeds combined: {ensemble!r}",
                value=ensemble,
            )
            axes.text(
                ensemble,
                _ROW_ENSEMBLE - 0.24,
                format_number(ensemble),
                ha="center",
                va="top",
                fontsize=style.VALUE_SIZE,
                parse_math=False,
            )
        else:
            axes.text(
                (xlo + xhi) / 2.0,
                _ROW_ENSEMBLE,
                "no ensemble value",
                ha="center",
                va="center",
                fontsize=style.NOTE_SIZE,
                color=style.MUTED,
                parse_math=False,
            )

        interval_label = level_text if interval is not None else "interval"
        axes.set_yticks(
            [_ROW_SEEDS, _ROW_INTERVAL, _ROW_ENSEMBLE],
            ["each seed", interval_label, "ensemble" if canvas.narrow else "seeds combined"],
        )
        axes.tick_params(axis="y", length=0)
        axes.spines["left"].set_visible(False)
        axes.set_xlim(xlo, xhi)
        axes.set_ylim(_ROW_ENSEMBLE - 0.6, _ROW_SEEDS + 0.45 + step * max(stack))
        axes.set_xlabel(fit(canvas, f"{metric} ({direction_text(higher)})", narrow_width=28))
        axes.xaxis.grid(True)
        legend_below(canvas, axes, wide_columns=3, narrow_columns=2)

    return Chart("seed_spread", chart_title, alt_text, table, draw)


__all__ = ["seed_spread_chart"]
