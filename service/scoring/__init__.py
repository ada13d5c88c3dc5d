"""The scoring core: pure numpy computation of everything Heldout reports.

No Flask, no database, no I/O: aligned arrays in, typed results (``results``) out.
The public names are listed in ``__all__`` and grow as modules land.
"""

from ._checks import PROBABILITY_SUM_TOLERANCE, ScoringInputError
from .options import DEFAULT_BOOTSTRAP_SEED, FlagThresholds, ScoringOptions
from .results import (
    Comparison,
    Decomposition,
    Flag,
    Interval,
    Report,
    Spread,
    SweepPoint,
    SweepResult,
    to_jsonable,
)

__all__ = [
    "DEFAULT_BOOTSTRAP_SEED",
    "PROBABILITY_SUM_TOLERANCE",
    "Comparison",
    "Decomposition",
    "Flag",
    "FlagThresholds",
    "Interval",
    "Report",
    "ScoringInputError",
    "ScoringOptions",
    "Spread",
    "SweepPoint",
    "SweepResult",
    "to_jsonable",
]
