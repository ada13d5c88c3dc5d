"""The ``Chart`` value, deterministic rendering, SVG data annotations and cache keys.

Rendering uses matplotlib's ``Figure`` directly (never ``pyplot``, so no GUI backend and no
global figure registry): PNG through the Agg renderer, SVG through matplotlib's SVG writer.
Every render runs under one process-wide lock inside a style context that starts from
matplotlib's defaults and applies ``style.RC``; settings are never changed process-wide, and
output depends only on the chart's input (and the matplotlib version, which ``cache_key``
includes).

Data annotations. Every drawn element that stands for a number gets a matplotlib ``gid``
``<role>-<series>-<index>`` (``point``, ``band``, ``region``, ``marker``, ``line``;
lower-case series names; ``index`` the position in the input). After saving, the SVG's
``<g id="...">`` element of each is given ``data-*`` attributes holding the exact numbers
(``repr`` of the float, so ``float(attr)`` gives back the input bit for bit) and a
``<title>`` child a browser shows as a tooltip. The root ``<svg>`` gets ``role="img"``, a
``<title>`` and a ``<desc>`` (the chart's alt text). Element ids repeat from chart to chart:
embed charts with ``<img>`` (or ``<object>``), not inline, when a page shows several.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import re
import threading
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any
from xml.sax.saxutils import escape, quoteattr

import matplotlib
import matplotlib.style as mpl_style
from matplotlib.artist import Artist
from matplotlib.figure import Figure

from . import style

RENDER_VERSION = "1"
"""Bumped whenever drawing or style changes, so cached charts are redrawn (``cache_key``)."""

_GID = re.compile(r"^(point|band|region|marker|line)-[a-z0-9_]+-[0-9]+$")
_DATA_KEY = re.compile(r"^[a-z][a-z0-9-]*$")
_RENDER_LOCK = threading.Lock()


class ChartInputError(ValueError):
    """A chart's input cannot be drawn; ``field`` names the bad part, ``message`` says why."""

    def __init__(self, field: str, message: str) -> None:
        super().__init__(f"{field}: {message}")
        self.field = field
        self.message = message


def format_number(value: float | None) -> str:
    """Short text for a number in labels and alt text: four significant digits.

    Plain decimals between 0.001 and 1e6 without trailing zeros (``4933``, ``0.1301``,
    ``12346`` for 12345.6, ``2`` for 2.0), scientific notation outside; ``"n/a"`` for None
    or a non-finite value.
    """
    if value is None or not math.isfinite(value):
        return "n/a"
    v = float(value)
    if v == 0.0:
        return "0"
    magnitude = math.floor(math.log10(abs(v)))
    if -3 <= magnitude < 6:
        decimals = max(0, 3 - magnitude)
        text = f"{v:.{decimals}f}"
        if "." in text:
            text = text.rstrip("0").rstrip(".")
        return "0" if float(text) == 0.0 else text
    return f"{v:.3e}"


def format_share(value: float) -> str:
    """A share (0.318) as a percentage with one decimal (``31.8%``)."""
    return f"{100.0 * value:.1f}%"


def plain(text: str) -> str:
    """Text that matplotlib shows verbatim where ``parse_math=False`` cannot be passed
    (legend labels): ``$`` escaped so it never starts math mode."""
    return text.replace("$", r"\$")


def _attr_text(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, int):
        return repr(float(value))
    if isinstance(value, str):
        return value
    if isinstance(value, (list, tuple)):
        return " ".join(_attr_text(v) for v in value)
    raise TypeError(f"cannot write {value!r} as an SVG data attribute")


@dataclass(frozen=True)
class Mark:
    """The data annotation of one drawn element (module docstring)."""

    gid: str
    title: str
    data: tuple[tuple[str, str], ...]


class Canvas:
    """What a chart's drawing function gets: the figure, its size name, and ``mark``."""

    def __init__(self, figure: Figure, size: str) -> None:
        self.figure = figure
        self.size = size
        self.marks: list[Mark] = []

    @property
    def narrow(self) -> bool:
        return self.size == "narrow"

    def mark(
        self, artist: Artist, role: str, series: str, index: int, *, title: str, **data: Any
    ) -> None:
        """Give ``artist`` the gid ``role-series-index`` and record its data attributes.

        Keyword names become ``data-`` attributes (underscores written as hyphens); None
        values are left out.
        """
        gid = f"{role}-{series}-{index}"
        if not _GID.match(gid):
            raise ValueError(f"invalid chart element id {gid!r}")
        artist.set_gid(gid)
        attrs = [("series", series), ("index", str(index))]
        for key, value in data.items():
            if value is None:
                continue
            name = key.replace("_", "-")
            if not _DATA_KEY.match(name):
                raise ValueError(f"invalid data attribute name {key!r}")
            attrs.append((name, _attr_text(value)))
        self.marks.append(Mark(gid, title, tuple(attrs)))


Draw = Callable[[Canvas], None]


def _annotate_svg(svg: str, marks: Sequence[Mark], title: str, alt_text: str) -> str:
    """Add the marks' data attributes and titles, and the root's title and description."""
    seen: set[str] = set()
    for mark in marks:
        if mark.gid in seen:
            raise RuntimeError(f"chart element id {mark.gid!r} used twice")
        seen.add(mark.gid)
        opening = f'<g id="{mark.gid}">'
        if svg.count(opening) != 1:
            raise RuntimeError(f"chart element {mark.gid!r} was not drawn exactly once")
        attrs = "".join(f" data-{k}={quoteattr(v)}" for k, v in mark.data)
        svg = svg.replace(
            opening, f'<g id="{mark.gid}"{attrs}>\n   <title>{escape(mark.title)}</title>', 1
        )
    root = re.search(r"<svg\b[^>]*>", svg)
    if root is None:
        raise RuntimeError("matplotlib wrote no <svg> element")
    # the first <title> child names the image for assistive technology (SVG-AAM); no ids,
    # so several charts can sit in one page
    head = root.group(0)[:-1] + ' role="img">'
    accessible = f"\n <title>{escape(title)}</title>\n <desc>{escape(alt_text)}</desc>"
    return svg[: root.start()] + head + accessible + svg[root.end() :]


def _draw_figure(draw: Draw, size: str) -> tuple[Figure, list[Mark]]:
    if size not in style.SIZES:
        raise ValueError(f"size must be one of {', '.join(style.SIZES)}, got {size!r}")
    figure = Figure(figsize=style.SIZES[size], layout="constrained")
    canvas = Canvas(figure, size)
    draw(canvas)
    return figure, canvas.marks


@dataclass(frozen=True, eq=False)
class Chart:
    """A drawn-on-demand chart with its text alternative.

    ``title`` and ``alt_text`` are plain text (alt text states the numbers shown);
    ``table`` holds the data points as rows (one dict per row, the same keys in every row)
    for a table alternative. ``svg()`` and ``png()`` render lazily and keep the bytes, so
    a chart used only for its text costs no drawing.
    """

    kind: str
    title: str
    alt_text: str
    table: list[dict[str, Any]]
    _draw: Draw = field(repr=False)
    _rendered: dict[tuple[str, str, int], bytes] = field(
        default_factory=dict, repr=False, compare=False
    )

    def svg(self, *, size: str = "wide") -> bytes:
        """UTF-8 SVG (well-formed XML), byte-identical for identical input.

        ``size`` is ``wide`` (7 x 4 in, laptop pages) or ``narrow`` (phones).
        """
        key = ("svg", size, 0)
        if key not in self._rendered:
            with _RENDER_LOCK, mpl_style.context(dict(style.RC), after_reset=True):
                figure, marks = _draw_figure(self._draw, size)
                buffer = io.BytesIO()
                figure.savefig(buffer, format="svg", metadata={"Date": None})
            text = _annotate_svg(
                buffer.getvalue().decode("utf-8"), marks, self.title, self.alt_text
            )
            self._rendered[key] = text.encode("utf-8")
        return self._rendered[key]

    def png(self, dpi: int = style.DEFAULT_DPI, *, size: str = "wide") -> bytes:
        """PNG at ``dpi`` dots per inch (the wide figure at 110 dpi is 770 x 440 pixels)."""
        if isinstance(dpi, bool) or not isinstance(dpi, int) or not 20 <= dpi <= 600:
            raise ValueError(f"dpi must be an integer from 20 to 600, got {dpi!r}")
        key = ("png", size, dpi)
        if key not in self._rendered:
            with _RENDER_LOCK, mpl_style.context(dict(style.RC), after_reset=True):
                figure, _ = _draw_figure(self._draw, size)
                buffer = io.BytesIO()
                figure.savefig(buffer, format="png", dpi=dpi)
            self._rendered[key] = buffer.getvalue()
        return self._rendered[key]


def _canonical(value: Any, where: str) -> Any:
    if isinstance(value, Mapping):
        out = {}
        for k, v in value.items():
            if not isinstance(k, str):
                raise ChartInputError(where, f"keys must be strings, got {k!r}")
            out[k] = _canonical(v, f"{where}.{k}")
        return out
    if isinstance(value, (list, tuple)):
        return [_canonical(v, f"{where}[{i}]") for i, v in enumerate(value)]
    if value is None or isinstance(value, (bool, str)):
        return value
    if isinstance(value, int):
        return int(value)
    if isinstance(value, float) or hasattr(value, "__float__"):
        f = float(value)
        if not math.isfinite(f):
            raise ChartInputError(where, f"must be finite or null (JSON), got {f!r}")
        return f
    raise ChartInputError(
        where,
        f"must be JSON-shaped (mapping, list, number, text, null), got {type(value).__name__}",
    )


def cache_key(kind: str, payload: Mapping[str, Any]) -> str:
    """SHA-256 (hex) of the canonical JSON of a chart's kind and input.

    Why: rendering is a pure function of ``(kind, payload)``, so a service can cache the
    bytes of charts of immutable results under this key. The key also covers
    ``RENDER_VERSION`` and the matplotlib version, which change the bytes; the caller adds
    the format and size it caches (``svg``/``png``, dpi, ``wide``/``narrow``).
    ``payload`` holds the keyword arguments of the chart function (``render_chart``).
    """
    document = {
        "kind": kind,
        "payload": _canonical(payload, "payload"),
        "render_version": RENDER_VERSION,
        "matplotlib": matplotlib.__version__,
    }
    text = json.dumps(
        document, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False
    )
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


# --------------------------------------------------------------------- input reading helpers


def optional_number(value: Any, where: str) -> float | None:
    """A finite float from JSON input, or None for null (an undefined metric)."""
    if value is None:
        return None
    if isinstance(value, (bool, str, bytes)):
        raise ChartInputError(where, f"must be a number, got {value!r}")
    try:
        f = float(value)  # int, float, numpy scalars
    except (TypeError, ValueError):
        raise ChartInputError(where, f"must be a number, got {value!r}") from None
    return f if math.isfinite(f) else None


def number(value: Any, where: str) -> float:
    """A finite float from JSON input; null or a non-finite value is refused."""
    f = optional_number(value, where)
    if f is None:
        raise ChartInputError(where, f"is {value!r}, not a finite number; nothing to draw")
    return f


def mapping(value: Any, where: str) -> Mapping[str, Any]:
    if not isinstance(value, Mapping):
        raise ChartInputError(where, f"must be an object, got {type(value).__name__}")
    return value


__all__ = [
    "RENDER_VERSION",
    "Canvas",
    "Chart",
    "ChartInputError",
    "Mark",
    "cache_key",
    "format_number",
    "format_share",
    "mapping",
    "number",
    "optional_number",
    "plain",
]
