"""Charts of stored results: pure rendering, JSON-shaped results in, SVG/PNG bytes out.

No Flask, no database, no network: each chart function takes the plain dicts the API
returns (``SubmissionResult``, ``SweepOut``, ``Standings`` entries) and returns a
``Chart`` with its title, alt text and data table; ``Chart.svg()`` and ``Chart.png()``
draw it with matplotlib's Agg and SVG renderers (never ``pyplot``). Rendering is a pure
function of the input, so ``cache_key(kind, payload)`` can key a cache of immutable
results, and ``render_chart(kind, payload)`` draws from the same payload.

Every drawn number is in the SVG: ``<g id="point-<series>-<index>" data-value="...">``
(see ``_chart``'s docstring for the scheme).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

from ._chart import (
    RENDER_VERSION,
    Chart,
    ChartInputError,
    cache_key,
    format_number,
)
from .decomposition import decomposition_chart
from .seeds import seed_spread_chart
from .slices import slices_chart
from .sweep import sweep_chart

CHART_KINDS: Mapping[str, Callable[..., Chart]] = {
    "decomposition": decomposition_chart,
    "seed_spread": seed_spread_chart,
    "sweep": sweep_chart,
    "slices": slices_chart,
}
"""Chart kind -> chart function; a payload holds the function's keyword arguments."""


def render_chart(kind: str, payload: Mapping[str, Any]) -> Chart:
    """Build the chart of ``kind`` from ``payload``, the chart function's keyword arguments.

    Why: the service keys its cache with ``cache_key(kind, payload)`` and, on a miss, draws
    from the very same payload, so the key always describes what was drawn.
    """
    function = CHART_KINDS.get(kind)
    if function is None:
        raise ChartInputError("kind", f"must be one of {', '.join(CHART_KINDS)}, got {kind!r}")
    if not isinstance(payload, Mapping):
        raise ChartInputError("payload", f"must be an object, got {type(payload).__name__}")
    try:
        return function(**payload)
    except TypeError as error:  # wrong or missing argument names
        raise ChartInputError("payload", f"{kind}: {error}") from None


__all__ = [
    "CHART_KINDS",
    "RENDER_VERSION",
    "Chart",
    "ChartInputError",
    "cache_key",
    "decomposition_chart",
    "format_number",
    "render_chart",
    "seed_spread_chart",
    "slices_chart",
    "sweep_chart",
]
