"""Small drawing and naming helpers shared by the chart modules."""

from __future__ import annotations

import textwrap

from matplotlib.axes import Axes

from . import style
from ._chart import Canvas, ChartInputError, plain

LOSS_NAMES = {"squared": "squared loss", "zero_one": "zero-one loss", "log": "log loss"}


def loss_name(loss: str) -> str:
    """Readable name of a decomposition's loss (``squared`` -> ``squared loss``)."""
    return LOSS_NAMES.get(loss, loss.replace("_", " "))


def metric_direction(metric: str, given: bool | None) -> bool:
    """The metric's direction: ``given`` if set, else the metric catalog's."""
    if given is not None:
        return bool(given)
    # imported here: ``import service.charts`` stays light (no numpy/scipy scoring core)
    from service.scoring.catalog import METRICS

    info = METRICS.get(metric)
    if info is None:
        raise ChartInputError(
            "higher_is_better",
            f"metric {metric!r} is not in the catalog; say whether higher is better",
        )
    return info.higher_is_better


def direction_text(higher: bool) -> str:
    return "higher is better" if higher else "lower is better"


def fit(canvas: Canvas, text: str, *, narrow_width: int = 34) -> str:
    """``text`` wrapped into lines of at most ``narrow_width`` characters on a narrow figure."""
    if not canvas.narrow:
        return text
    return "\n".join(textwrap.wrap(text, narrow_width, break_long_words=False))


def title(canvas: Canvas, axes: Axes, text: str) -> None:
    axes.set_title(fit(canvas, text, narrow_width=27), parse_math=False)


def legend_below(
    canvas: Canvas,
    axes: Axes,
    *,
    wide_columns: int,
    narrow_columns: int,
    first: tuple[str, ...] = (),
    last: tuple[str, ...] = (),
) -> None:
    """A frameless legend under the plot, outside it, so it never covers data.

    Entries keep drawing order, except those labelled in ``first`` (which lead, in that
    order) and in ``last`` (which go to the end).
    """
    found, found_labels = axes.get_legend_handles_labels()
    if not found:
        return

    def rank(label: str) -> tuple[int, int]:
        if label in first:
            return (0, first.index(label))
        return (2, 0) if label in last else (1, 0)

    pairs = sorted(zip(found, found_labels, strict=True), key=lambda pair: rank(pair[1]))
    handles = [h for h, _ in pairs]
    labels = [label for _, label in pairs]
    columns = min(narrow_columns if canvas.narrow else wide_columns, len(handles))
    width = canvas.figure.get_figwidth() * 72.0 * 0.96
    while columns > 1 and _legend_width(labels, columns) > width:
        columns -= 1
    canvas.figure.legend(
        handles, [plain(label) for label in labels], loc="outside lower center", ncols=columns
    )


def _legend_width(labels: list[str], columns: int) -> float:
    """Estimated width in points of a legend of ``labels`` in ``columns`` columns.

    Matplotlib fills legend columns top to bottom; DejaVu Sans averages about 0.55 em per
    character. An estimate is enough: it only picks a column count that does not overflow.
    """
    size = style.NOTE_SIZE
    rows = -(-len(labels) // columns)
    total = 0.0
    for c in range(columns):
        column = labels[c * rows : (c + 1) * rows]
        if column:
            total += (1.8 + 0.8 + 1.4) * size + 0.55 * size * max(len(t) for t in column)
    return total
