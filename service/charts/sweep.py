"""Held-out loss against complexity, with the one-standard-error choice.

Lines: test (held-out) loss with a band of one standard error either side, training loss,
bias term and variance. A ring marks the lowest test loss; a vertical line marks the
one-standard-error choice (the simplest complexity whose test loss is within one standard
error of the minimum: Breiman et al. 1984, ESL section 7.10), and a dotted horizontal line
the threshold, minimum + its standard error. Underfit and overfit regions (from each
point's ``region``) are shaded; a region spans its points up to the midpoints to the
neighbouring points (geometric midpoints on a logarithmic axis).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

from matplotlib.lines import Line2D

from . import style
from ._chart import Canvas, Chart, ChartInputError, format_number, mapping, number, optional_number
from ._common import fit, legend_below, loss_name, title

REGIONS = ("underfit", "optimal", "overfit", "neutral")
_SHADED = {"underfit": style.UNDERFIT_REGION, "overfit": style.OVERFIT_REGION}
_LOG_RATIO = 50.0
"""A complexity axis of positive values spanning this ratio or more is drawn logarithmic."""


def _runs(indices: Sequence[int]) -> list[list[int]]:
    """Consecutive runs of sorted positions: [0, 1, 3] -> [[0, 1], [3]]."""
    runs: list[list[int]] = []
    for i in indices:
        if runs and runs[-1][-1] == i - 1:
            runs[-1].append(i)
        else:
            runs.append([i])
    return runs


def sweep_chart(sweep: Mapping[str, Any]) -> Chart:
    """Chart a complexity sweep: test loss (with +-1 SE), training loss, bias and variance.

    Why: the curve shows where a model family stops learning signal and starts fitting
    noise; the one-standard-error choice is the simplest model not clearly worse than the
    best, and the shaded regions show which complexities under- or overfit.

    Parameters
    ----------
    sweep : mapping
        ``SweepOut`` (or ``to_jsonable(SweepResult)``): ``loss``, ``points`` (each with
        ``complexity``, ``test_loss``, ``test_loss_se``, ``train_loss`` or null, ``bias``,
        ``variance``, ``region``), ``best_complexity``, ``one_se_complexity``; optional
        ``name``, ``group``, ``slice``, ``n_withheld``.

    Returns
    -------
    Chart
        Marks (``<i>`` = position in ``points``): ``point-test_loss-<i>`` (``data-x`` the
        complexity, ``data-value``, ``data-se``, ``data-region``), ``point-train_loss-<i>``
        (non-null only), ``point-bias-<i>``, ``point-variance-<i>``, ``band-test_loss-0``,
        ``marker-best-0`` and ``marker-one_se-0`` (``data-x``, ``data-value``),
        ``marker-threshold-0`` (``data-value`` = minimum + its SE) and
        ``region-underfit-<j>`` / ``region-overfit-<j>`` (``data-x0``, ``data-x1``,
        ``data-complexities``) for each run of consecutive such points. Table: one row per
        point, sorted by complexity.
    """
    sw = mapping(sweep, "sweep")
    loss = str(sw.get("loss") or "loss")
    raw_points = sw.get("points")
    if not isinstance(raw_points, Sequence) or isinstance(raw_points, (str, bytes)):
        raise ChartInputError("sweep.points", "must be a list of points")
    if len(raw_points) == 0:
        raise ChartInputError("sweep.points", "needs at least one point")
    points: list[dict[str, Any]] = []
    for i, raw in enumerate(raw_points):
        p = mapping(raw, f"sweep.points[{i}]")
        region = p.get("region")
        if region not in REGIONS:
            raise ChartInputError(
                f"sweep.points[{i}].region", f"must be one of {', '.join(REGIONS)}, got {region!r}"
            )
        points.append(
            {
                "index": i,
                "complexity": number(p.get("complexity"), f"sweep.points[{i}].complexity"),
                "test_loss": number(p.get("test_loss"), f"sweep.points[{i}].test_loss"),
                "test_loss_se": number(p.get("test_loss_se"), f"sweep.points[{i}].test_loss_se"),
                "train_loss": optional_number(p.get("train_loss"), f"sweep.points[{i}].train_loss"),
                "bias": number(p.get("bias"), f"sweep.points[{i}].bias"),
                "variance": number(p.get("variance"), f"sweep.points[{i}].variance"),
                "region": region,
            }
        )
    points.sort(key=lambda q: q["complexity"])
    xs = [q["complexity"] for q in points]
    if any(a == b for a, b in zip(xs, xs[1:], strict=False)):
        raise ChartInputError("sweep.points", f"each complexity must appear once, got {xs}")
    best_x = number(sw.get("best_complexity"), "sweep.best_complexity")
    one_se_x = number(sw.get("one_se_complexity"), "sweep.one_se_complexity")
    by_x = {q["complexity"]: q for q in points}
    for name, x in (("best_complexity", best_x), ("one_se_complexity", one_se_x)):
        if x not in by_x:
            raise ChartInputError(f"sweep.{name}", f"{x!r} is not the complexity of any point")
    best, one_se = by_x[best_x], by_x[one_se_x]
    threshold = best["test_loss"] + best["test_loss_se"]
    log_x = xs[0] > 0 and xs[-1] / xs[0] >= _LOG_RATIO
    has_train = any(q["train_loss"] is not None for q in points)

    def _axis_share(lo: float, hi: float) -> float:
        if log_x:
            return math.log(hi / lo) / math.log(xlim[1] / xlim[0])
        return (hi - lo) / (xlim[1] - xlim[0])

    def mid(a: float, b: float) -> float:
        return math.sqrt(a * b) if log_x else (a + b) / 2.0

    if log_x:
        pad = (xs[-1] / xs[0]) ** 0.04 if len(xs) > 1 else 2.0
        xlim = (xs[0] / pad, xs[-1] * pad)
    else:
        pad = 0.04 * (xs[-1] - xs[0]) if len(xs) > 1 else 0.5
        xlim = (xs[0] - pad, xs[-1] + pad)

    shaded: list[tuple[str, int, list[dict[str, Any]], float, float]] = []
    for region in ("underfit", "overfit"):
        positions = [k for k, q in enumerate(points) if q["region"] == region]
        for j, run in enumerate(_runs(positions)):
            lo = xlim[0] if run[0] == 0 else mid(xs[run[0] - 1], xs[run[0]])
            hi = xlim[1] if run[-1] == len(xs) - 1 else mid(xs[run[-1]], xs[run[-1] + 1])
            shaded.append((region, j, [points[k] for k in run], lo, hi))

    name = loss_name(loss)
    sweep_name = sw.get("name")
    chart_title = f"{name[0].upper()}{name[1:]} against complexity"
    if isinstance(sweep_name, str) and sweep_name:
        chart_title += f": {sweep_name}"
    table = [
        {
            "complexity": q["complexity"],
            "test_loss": q["test_loss"],
            "test_loss_se": q["test_loss_se"],
            "train_loss": q["train_loss"],
            "bias": q["bias"],
            "variance": q["variance"],
            "region": q["region"],
            "lowest_test_loss": q is best,
            "one_se_choice": q is one_se,
        }
        for q in points
    ]
    slice_name = sw.get("slice")
    alt = [
        f"Line chart of the {name} against complexity over {len(points)} point"
        f"{'s' if len(points) != 1 else ''}"
        + (f", on the {slice_name} slice" if isinstance(slice_name, str) and slice_name else "")
        + "."
    ]
    for q in points:
        parts = [
            f"test loss {format_number(q['test_loss'])} (SE {format_number(q['test_loss_se'])})"
        ]
        if q["train_loss"] is not None:
            parts.append(f"train loss {format_number(q['train_loss'])}")
        parts.append(f"bias term {format_number(q['bias'])}")
        parts.append(f"variance {format_number(q['variance'])}")
        alt.append(
            f"Complexity {format_number(q['complexity'])}, {q['region']}: {', '.join(parts)}."
        )
    alt.append(
        f"Lowest test loss {format_number(best['test_loss'])} at complexity "
        f"{format_number(best_x)}; the one-standard-error choice is complexity "
        f"{format_number(one_se_x)} (test loss {format_number(one_se['test_loss'])}, within "
        f"the threshold {format_number(threshold)})."
    )
    for region in ("underfit", "overfit"):
        at = [format_number(q["complexity"]) for q in points if q["region"] == region]
        alt.append(
            f"{region[0].upper()}{region[1:]} (shaded): complexity {', '.join(at)}."
            if at
            else f"No {region} points."
        )
    withheld = sw.get("n_withheld")
    if isinstance(withheld, int) and withheld > 0:
        alt.append(f"{withheld} submissions of the sweep are withheld from this curve.")
    alt_text = " ".join(alt)

    def draw(canvas: Canvas) -> None:
        axes = canvas.figure.add_subplot()
        title(canvas, axes, chart_title)
        if log_x:
            axes.set_xscale("log")
        for region, j, members, lo, hi in shaded:
            span = axes.axvspan(
                lo,
                hi,
                color=_SHADED[region],
                linewidth=0.0,
                zorder=0,
                label=f"{region} region",
            )
            complexities = [q["complexity"] for q in members]
            canvas.mark(
                span,
                "region",
                region,
                j,
                title=f"{region}: complexity {', '.join(repr(c) for c in complexities)}",
                x0=lo,
                x1=hi,
                complexities=complexities,
            )
            if _axis_share(lo, hi) < (0.2 if canvas.narrow else 0.12):
                continue  # too narrow for its name; the legend names the shading
            axes.text(
                mid(lo, hi),
                0.99,
                region,
                transform=axes.get_xaxis_transform(),
                ha="center",
                va="top",
                fontsize=style.NOTE_SIZE,
                color=style.MUTED,
                parse_math=False,
            )
        # de-duplicate region legend entries: keep the first run's label only
        seen_labels: set[str] = set()
        for patch in axes.patches:
            label = patch.get_label()
            if label in seen_labels:
                patch.set_label("_nolegend_")
            seen_labels.add(label)

        lows = [q["test_loss"] - q["test_loss_se"] for q in points]
        highs = [q["test_loss"] + q["test_loss_se"] for q in points]
        band = axes.fill_between(
            xs,
            lows,
            highs,
            color=style.TEST_BAND,
            alpha=0.55,
            linewidth=0.0,
            label="test loss ± 1 SE",
            zorder=1,
        )
        canvas.mark(
            band,
            "band",
            "test_loss",
            0,
            title="test loss plus or minus one standard error",
            low=lows,
            high=highs,
        )
        axes.axhline(
            threshold,
            color=style.CHOICE,
            linestyle=(0, (1, 2)),
            linewidth=1.3,
            zorder=2,
            label="lowest + 1 SE",
        )
        threshold_line = axes.lines[-1]
        canvas.mark(
            threshold_line,
            "marker",
            "threshold",
            0,
            title=f"lowest test loss + its SE: {threshold!r}",
            value=threshold,
        )

        series = [
            ("bias", "bias term", style.BIAS, "s", (0, (5, 2))),
            ("variance", "variance", style.VARIANCE, "^", (0, (2, 1.5))),
        ]
        if has_train:
            series.insert(0, ("train_loss", "train loss", style.TRAIN, "o", "-"))
        series.insert(0, ("test_loss", "test loss", style.TEST, "o", "-"))
        for key, label, color, marker, linestyle in series:
            present = [q for q in points if q[key] is not None]
            width = 2.4 if key == "test_loss" else 1.7
            axes.plot(
                [q["complexity"] for q in present],
                [q[key] for q in present],
                color=color,
                linestyle=linestyle,
                linewidth=width,
                zorder=3,
                marker=marker,
                markevery=[],
                markersize=5.5,
                label=label,
            )  # markers come from the marked points below; the legend shows one
            for q in present:
                (dot,) = axes.plot(
                    [q["complexity"]],
                    [q[key]],
                    marker=marker,
                    linestyle="none",
                    color=color,
                    markersize=6.0 if key == "test_loss" else 5.0,
                    markeredgecolor=style.PAPER,
                    markeredgewidth=0.7,
                    zorder=4,
                )
                extra: dict[str, Any] = {}
                if key == "test_loss":
                    extra = {"se": q["test_loss_se"], "region": q["region"]}
                canvas.mark(
                    dot,
                    "point",
                    key,
                    q["index"],
                    title=f"{label} at complexity {q['complexity']!r}: {q[key]!r}",
                    value=q[key],
                    x=q["complexity"],
                    **extra,
                )

        (ring,) = axes.plot(
            [best_x],
            [best["test_loss"]],
            marker="o",
            markersize=15,
            linestyle="none",
            markerfacecolor="none",
            markeredgecolor=style.INK,
            markeredgewidth=1.6,
            zorder=5,
            label="lowest test loss",
        )
        canvas.mark(
            ring,
            "marker",
            "best",
            0,
            title=f"lowest test loss {best['test_loss']!r} at complexity {best_x!r}",
            x=best_x,
            value=best["test_loss"],
        )
        choice = Line2D(
            [one_se_x, one_se_x],
            [0.0, 1.0],
            transform=axes.get_xaxis_transform(),
            color=style.CHOICE,
            linewidth=1.6,
            linestyle=(0, (6, 3)),
            zorder=2,
            label="one-SE choice",
        )
        axes.add_line(choice)
        canvas.mark(
            choice,
            "marker",
            "one_se",
            0,
            title=f"one-standard-error choice: complexity {one_se_x!r}, test loss "
            f"{one_se['test_loss']!r}",
            x=one_se_x,
            value=one_se["test_loss"],
        )
        axes.annotate(
            f"one-SE choice {format_number(one_se_x)}",
            xy=(one_se_x, 0.9),
            xycoords=axes.get_xaxis_transform(),
            xytext=(4, 0),
            textcoords="offset points",
            ha="left",
            va="center",
            fontsize=style.NOTE_SIZE,
            color=style.CHOICE,
            parse_math=False,
        )

        axes.set_xlim(*xlim)
        values = lows + [
            q[k] for q in points for k in ("train_loss", "bias", "variance") if q[k] is not None
        ]
        if min(values) >= 0.0:
            axes.set_ylim(bottom=0.0)
        axes.set_xlabel("complexity")
        axes.set_ylabel(fit(canvas, name, narrow_width=20))
        axes.yaxis.grid(True)
        legend_below(
            canvas,
            axes,
            wide_columns=4,
            narrow_columns=2,
            first=("test loss", "test loss ± 1 SE", "train loss", "bias term", "variance"),
            last=("underfit region", "overfit region"),
        )

    return Chart("sweep", chart_title, alt_text, table, draw)


__all__ = ["REGIONS", "sweep_chart"]
