"""The bias-variance decomposition of one loss as two horizontal bars.

Top bar: the expected loss of one seed (the mean over seeds) split into its terms, left to
right: noise (when a noise variance was given), the bias term, the variance. For zero-one
loss the variance enters with a sign (Domingos 2000): the unbiased variance adds and the
biased variance subtracts, drawn as a hatched piece cut back from the bar's end.
Bottom bar: the loss of the seed-combined (ensemble) prediction. The arrow between the two
bar ends is the ensemble gain, expected loss - ensemble loss (for squared loss exactly the
variance).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from matplotlib.lines import Line2D
from matplotlib.patches import FancyArrowPatch

from . import style
from ._chart import (
    Canvas,
    Chart,
    ChartInputError,
    format_number,
    format_share,
    mapping,
    number,
    optional_number,
)
from ._common import fit, legend_below, loss_name, title

_BAR_HEIGHT = 0.46
_TOP, _BOTTOM = 1.0, 0.0


def _segment_label(axes: Any, start: float, width: float, xmax: float, color: str) -> None:
    """The value inside a segment when it is wide enough to hold it."""
    if abs(width) < 0.13 * xmax:
        return
    axes.text(
        start + width / 2.0,
        _TOP,
        format_number(width),
        ha="center",
        va="center",
        fontsize=style.VALUE_SIZE,
        color=color,
        parse_math=False,
    )


def decomposition_chart(bias_variance: Mapping[str, Mapping[str, Any]], *, loss: str) -> Chart:
    """Chart the decomposition of ``loss`` from a report's ``bias_variance`` mapping.

    Why: how much of a model's error is shared by every seed (bias) and how much comes from
    seed-to-seed disagreement (variance, which averaging the seeds removes) decides whether
    to change the model or to ensemble it; a picture shows the split at a glance.

    Parameters
    ----------
    bias_variance : mapping of loss name to decomposition
        ``SubmissionResult["bias_variance"]`` (or a slice view's): each value has
        ``expected_loss``, ``bias``, ``variance``, ``variance_share``, ``ensemble_loss``,
        ``noise`` (or null) and ``extra`` (zero-one: ``unbiased_variance``,
        ``biased_variance``, ``net_variance``).
    loss : str
        Which decomposition to draw (``squared``, ``zero_one``, ``log``).

    Returns
    -------
    Chart
        Marks: ``point-<term>-0`` for ``noise``, ``bias``, ``variance`` (zero-one:
        ``unbiased_variance`` and ``biased_variance``), ``expected_loss``,
        ``ensemble_loss`` and ``ensemble_gain``; table rows ``{term, label, value}``.
    """
    terms = mapping(bias_variance, "bias_variance")
    if loss not in terms:
        raise ChartInputError(
            "loss",
            f"no {loss!r} decomposition in this result; it has: {', '.join(terms) or 'none'}",
        )
    d = mapping(terms[loss], f"bias_variance.{loss}")
    where = f"bias_variance.{loss}"
    expected = number(d.get("expected_loss"), f"{where}.expected_loss")
    bias = number(d.get("bias"), f"{where}.bias")
    variance = number(d.get("variance"), f"{where}.variance")
    ensemble = number(d.get("ensemble_loss"), f"{where}.ensemble_loss")
    noise = optional_number(d.get("noise"), f"{where}.noise")
    extra = mapping(d.get("extra") or {}, f"{where}.extra")
    # zero-one loss: the variance enters with a sign (Domingos 2000)
    signed = loss == "zero_one" and "unbiased_variance" in extra and "biased_variance" in extra
    unbiased = (
        number(extra.get("unbiased_variance"), f"{where}.extra.unbiased_variance")
        if signed
        else 0.0
    )
    biased = (
        number(extra.get("biased_variance"), f"{where}.extra.biased_variance") if signed else 0.0
    )
    gain = expected - ensemble
    share = variance / expected if expected != 0.0 else 0.0
    name = loss_name(loss)
    bias_label = (
        "bias term (includes noise)" if loss == "squared" and noise is None else "bias term"
    )

    table: list[dict[str, Any]] = []
    if noise is not None:
        table.append({"term": "noise", "label": "noise", "value": noise})
    table.append({"term": "bias", "label": bias_label, "value": bias})
    table.append({"term": "variance", "label": "variance", "value": variance})
    if signed:
        table.append(
            {"term": "unbiased_variance", "label": "unbiased variance (adds)", "value": unbiased}
        )
        table.append(
            {"term": "biased_variance", "label": "biased variance (subtracts)", "value": biased}
        )
    table.append({"term": "expected_loss", "label": "expected loss (one seed)", "value": expected})
    table.append(
        {"term": "ensemble_loss", "label": "ensemble loss (seeds combined)", "value": ensemble}
    )
    table.append({"term": "ensemble_gain", "label": "ensemble gain", "value": gain})

    chart_title = f"{name[0].upper()}{name[1:]}: bias term and variance"
    parts = []
    if noise is not None:
        parts.append(f"noise {format_number(noise)}")
    parts.append(f"{bias_label} {format_number(bias)}")
    if signed:
        parts.append(f"unbiased variance {format_number(unbiased)}")
        variance_text = (
            f" - biased variance {format_number(biased)} (variance in total "
            f"{format_number(variance)}, {format_share(share)} of the expected loss)"
        )
    else:
        parts.append(
            f"variance {format_number(variance)} ({format_share(share)} of the expected loss)"
        )
        variance_text = ""
    gain_word = "lower" if gain >= 0 else "higher"
    alt_text = (
        f"Horizontal bars of the {name}. The expected loss of one seed, "
        f"{format_number(expected)}, is {' + '.join(parts)}{variance_text}. "
        f"The seeds' combined (ensemble) prediction has loss {format_number(ensemble)}, "
        f"{format_number(abs(gain))} {gain_word} than one seed: the ensemble gain is "
        f"{format_number(gain)}."
    )

    def draw(canvas: Canvas) -> None:
        figure = canvas.figure
        axes = figure.add_subplot()
        title(canvas, axes, chart_title)
        ends = [expected, ensemble, (noise or 0.0) + bias + variance]
        if signed:
            ends.append(bias + unbiased)
        xmax = max(max(ends), 0.0)
        xmin = min(min(ends), 0.0, bias)
        span = (xmax - xmin) or 1.0
        left = 0.0
        if noise is not None:
            (bar,) = axes.barh(
                _TOP, noise, left=left, height=_BAR_HEIGHT, color=style.NOISE, label="noise"
            )
            canvas.mark(
                bar, "point", "noise", 0, title=f"noise: {noise!r}", value=noise, start=left
            )
            _segment_label(axes, left, noise, span, style.INK)
            left += noise
        (bar,) = axes.barh(
            _TOP, bias, left=left, height=_BAR_HEIGHT, color=style.BIAS, label=bias_label
        )
        canvas.mark(
            bar, "point", "bias", 0, title=f"{bias_label}: {bias!r}", value=bias, start=left
        )
        _segment_label(axes, left, bias, span, style.PAPER)
        left += bias
        if signed:
            (bar,) = axes.barh(
                _TOP,
                unbiased,
                left=left,
                height=_BAR_HEIGHT,
                color=style.VARIANCE,
                label="unbiased variance (adds)",
            )
            canvas.mark(
                bar,
                "point",
                "unbiased_variance",
                0,
                title=f"unbiased variance: {unbiased!r}",
                value=unbiased,
                start=left,
            )
            left += unbiased
            (bar,) = axes.barh(
                _TOP,
                -biased,
                left=left,
                height=_BAR_HEIGHT,
                color=style.VARIANCE,
                alpha=0.45,
                hatch="///",
                edgecolor=style.PAPER,
                linewidth=0.0,
                label="biased variance (subtracts)",
            )
            canvas.mark(
                bar,
                "point",
                "biased_variance",
                0,
                title=f"biased variance (subtracted): {biased!r}",
                value=biased,
                start=left,
            )
        else:
            (bar,) = axes.barh(
                _TOP,
                variance,
                left=left,
                height=_BAR_HEIGHT,
                color=style.VARIANCE,
                label="variance",
            )
            canvas.mark(
                bar,
                "point",
                "variance",
                0,
                title=f"variance: {variance!r}",
                value=variance,
                start=left,
            )
            _segment_label(axes, left, variance, span, style.PAPER)

        (bar,) = axes.barh(
            _BOTTOM, ensemble, height=_BAR_HEIGHT, color=style.ENSEMBLE, label="ensemble loss"
        )
        canvas.mark(
            bar, "point", "ensemble_loss", 0, title=f"ensemble loss: {ensemble!r}", value=ensemble
        )

        half = _BAR_HEIGHT / 2.0 + 0.07
        tick = Line2D(
            [expected, expected], [_TOP - half, _TOP + half], color=style.INK, linewidth=2.2
        )
        axes.add_line(tick)
        canvas.mark(
            tick, "point", "expected_loss", 0, title=f"expected loss: {expected!r}", value=expected
        )
        pad = 0.012 * span
        if canvas.narrow:  # above the tick: no room on the right
            axes.text(
                expected,
                _TOP + half + 0.03,
                f"expected {format_number(expected)}",
                va="bottom",
                ha="right",
                fontsize=style.VALUE_SIZE,
                parse_math=False,
            )
        else:
            axes.text(
                max(expected, left) + pad,
                _TOP,
                f"expected {format_number(expected)}",
                va="center",
                ha="left",
                fontsize=style.VALUE_SIZE,
                parse_math=False,
            )
        if canvas.narrow and ensemble >= 0.4 * span:  # inside the bar's end
            axes.text(
                ensemble - pad,
                _BOTTOM,
                format_number(ensemble),
                va="center",
                ha="right",
                fontsize=style.VALUE_SIZE,
                color=style.PAPER,
                parse_math=False,
            )
        else:
            axes.text(
                max(ensemble, 0.0) + pad,
                _BOTTOM,
                f"ensemble {format_number(ensemble)}",
                va="center",
                ha="left",
                fontsize=style.VALUE_SIZE,
                parse_math=False,
            )

        middle = (_TOP + _BOTTOM) / 2.0
        arrow = FancyArrowPatch(
            (expected, middle),
            (ensemble, middle),
            arrowstyle="<|-|>",
            color=style.INK,
            linewidth=1.3,
            shrinkA=0.0,
            shrinkB=0.0,
            mutation_scale=11,
        )
        axes.add_patch(arrow)
        canvas.mark(
            arrow, "point", "ensemble_gain", 0, title=f"ensemble gain: {gain!r}", value=gain
        )
        share_of = gain / expected if expected != 0.0 else 0.0
        axes.text(
            min(ensemble, expected) - pad,
            middle,
            f"{'gain' if canvas.narrow else 'ensemble gain'} {format_number(gain)} "
            f"({format_share(share_of)}{'' if canvas.narrow else ' of expected'})",
            va="center",
            ha="right",
            fontsize=style.VALUE_SIZE,
            color=style.INK,
            parse_math=False,
        )

        labels = (
            ["one seed", "ensemble"]
            if canvas.narrow
            else ["one seed\n(mean over seeds)", "seeds combined\n(ensemble)"]
        )
        axes.set_yticks([_TOP, _BOTTOM], labels)
        axes.tick_params(axis="y", length=0)
        axes.spines["left"].set_visible(False)
        axes.set_xlim(xmin - 0.02 * span, xmax + (0.08 if canvas.narrow else 0.3) * span)
        axes.set_ylim(_BOTTOM - 0.5, _TOP + 0.5)
        axes.set_xlabel(fit(canvas, f"{name} (mean over held-out rows)", narrow_width=28))
        axes.xaxis.grid(True)
        legend_below(canvas, axes, wide_columns=3 if signed else 4, narrow_columns=2)

    return Chart("decomposition", chart_title, alt_text, table, draw)


__all__ = ["decomposition_chart"]
