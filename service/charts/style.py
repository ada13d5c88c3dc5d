"""Heldout's chart look: one palette, one type scale, one set of figure sizes.

Every chart draws from these names only, so the page and the served SVG/PNG share one look
and a change here restyles every chart (bump ``RENDER_VERSION`` in ``_chart`` with it, so
cached charts are redrawn).

Colours are chosen to stay apart for the common colour-vision deficiencies by lightness as
well as hue (teal and brick differ in lightness; sand is light, slate mid-dark), and every
series also differs by marker or line style, so no reading depends on colour alone.
"""

from __future__ import annotations

from collections.abc import Mapping
from types import MappingProxyType
from typing import Any

# ------------------------------------------------------------------------------- palette

PAPER = "#fbfaf6"
"""Figure background: a warm off-white."""
INK = "#1d2a30"
"""Text, axis lines and the identity line."""
MUTED = "#5d6a72"
"""Secondary text: notes, tick labels."""
RULE = "#e3dfd5"
"""Grid lines."""

TEST = "#0e5f66"
"""Held-out (test) loss: deep teal."""
TEST_BAND = "#a9d2cf"
"""The test loss's standard-error band: pale teal."""
TRAIN = "#b88a3e"
"""Training loss: warm sand (dark enough to read as a line on paper)."""
BIAS = "#a4473b"
"""Bias term: muted brick."""
VARIANCE = "#566d8a"
"""Variance: slate."""
NOISE = "#a39d92"
"""Irreducible noise: stone."""
ENSEMBLE = "#3e335e"
"""The seed-averaged (ensemble) prediction: aubergine."""
CHOICE = "#2f6f4e"
"""The one-standard-error choice: moss."""

UNDERFIT_REGION = "#f1e7d2"
"""Underfit region shading: pale sand."""
OVERFIT_REGION = "#f6e5e0"
"""Overfit region shading: pale brick."""
TUNED_REGION = "#f5e6e1"
"""Slices chart: the half-plane of points tuned to the feedback slice."""
FLAGGED = BIAS
"""A group flagged as tuned to the feedback slice."""
UNFLAGGED = TEST
"""A group not flagged."""

# ----------------------------------------------------------------------------- type scale

FONT_FAMILY = ("DejaVu Sans", "Verdana", "sans-serif")
"""DejaVu Sans ships with matplotlib, so text is measured the same on every host (no font
lookup, no download); browsers showing the SVG fall back to the similar-width Verdana."""

TITLE_SIZE = 13.5
LABEL_SIZE = 11.5
TICK_SIZE = 10.5
NOTE_SIZE = 10.0
VALUE_SIZE = 10.5

# --------------------------------------------------------------------------- figure sizes

SIZES: Mapping[str, tuple[float, float]] = MappingProxyType(
    {"wide": (7.0, 4.0), "narrow": (4.2, 5.6)}
)
"""Figure size in inches: ``wide`` for laptop-width pages, ``narrow`` for phones (a
portrait figure whose text, at the same point sizes, takes a larger share of the width)."""

DEFAULT_DPI = 110

SVG_HASHSALT = "heldout-charts"
"""Fixed salt for the ids matplotlib derives for clip paths: same input, same bytes."""

RC: Mapping[str, Any] = MappingProxyType(
    {
        "svg.hashsalt": SVG_HASHSALT,
        "svg.fonttype": "none",  # text stays text: selectable, read by screen readers
        "font.family": "sans-serif",
        "font.sans-serif": list(FONT_FAMILY),
        "font.size": LABEL_SIZE,
        "text.color": INK,
        "axes.titlesize": TITLE_SIZE,
        "axes.titleweight": "bold",
        "axes.titlelocation": "left",
        "axes.titlepad": 10.0,
        "axes.labelsize": LABEL_SIZE,
        "axes.labelcolor": INK,
        "axes.edgecolor": MUTED,
        "axes.linewidth": 0.8,
        "axes.facecolor": PAPER,
        "axes.spines.top": False,
        "axes.spines.right": False,
        "axes.grid": False,
        "axes.axisbelow": True,
        "grid.color": RULE,
        "grid.linewidth": 0.8,
        "xtick.labelsize": TICK_SIZE,
        "ytick.labelsize": TICK_SIZE,
        "xtick.color": MUTED,
        "ytick.color": MUTED,
        "xtick.labelcolor": INK,
        "ytick.labelcolor": INK,
        "legend.fontsize": NOTE_SIZE,
        "legend.frameon": False,
        "legend.handlelength": 1.8,
        "legend.columnspacing": 1.4,
        "figure.facecolor": PAPER,
        "savefig.facecolor": PAPER,
        "lines.linewidth": 2.0,
        "lines.markersize": 6.5,
        "hatch.color": PAPER,
        "hatch.linewidth": 1.2,
        "path.simplify": False,
        "figure.constrained_layout.w_pad": 0.08,
        "figure.constrained_layout.h_pad": 0.08,  # every data vertex is drawn as given
    }
)
"""Matplotlib settings applied on top of matplotlib's defaults for every render (never to
the process-wide settings)."""

__all__ = [
    "BIAS",
    "CHOICE",
    "DEFAULT_DPI",
    "ENSEMBLE",
    "FLAGGED",
    "FONT_FAMILY",
    "INK",
    "LABEL_SIZE",
    "MUTED",
    "NOISE",
    "NOTE_SIZE",
    "OVERFIT_REGION",
    "PAPER",
    "RC",
    "RULE",
    "SIZES",
    "SVG_HASHSALT",
    "TEST",
    "TEST_BAND",
    "TICK_SIZE",
    "TITLE_SIZE",
    "TRAIN",
    "TUNED_REGION",
    "UNDERFIT_REGION",
    "UNFLAGGED",
    "VALUE_SIZE",
    "VARIANCE",
]
