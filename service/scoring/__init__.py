"""The scoring core: pure numpy computation of everything Heldout reports.

No Flask, no database, no I/O: aligned arrays in, typed results (``results``) out.
The public surface is ``__all__`` below; modules are named for their concern.
"""

from ._checks import PROBABILITY_SUM_TOLERANCE, ScoringInputError
from .classification import classification_report, classification_row_losses
from .comparison import mcnemar_test, non_inferiority, paired_bootstrap, paired_loss_test
from .decomposition import (
    brier_partition,
    log_loss_decomposition,
    squared_loss_decomposition,
    zero_one_decomposition,
)
from .flags import FLAG_CODES, overfitting_flags
from .guard import LadderDecision, LadderState, adaptive_overfit_test, ladder_step
from .options import DEFAULT_BOOTSTRAP_SEED, FlagThresholds, ScoringOptions
from .regression import regression_report, regression_row_losses
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
from .split import feedback_mask
from .sweep import SweepInput, complexity_sweep, sweep_from_predictions
from .verdict import (
    BoundGate,
    CompareGate,
    ComparisonPlan,
    FlagGate,
    Gate,
    GateReason,
    GateSpecError,
    Verdict,
    compare_for_gate,
    evaluate_gates,
    parse_gates,
    plan_comparison,
)

__all__ = [
    "DEFAULT_BOOTSTRAP_SEED",
    "FLAG_CODES",
    "PROBABILITY_SUM_TOLERANCE",
    "BoundGate",
    "CompareGate",
    "Comparison",
    "ComparisonPlan",
    "Decomposition",
    "Flag",
    "FlagGate",
    "FlagThresholds",
    "Gate",
    "GateReason",
    "GateSpecError",
    "Interval",
    "LadderDecision",
    "LadderState",
    "Report",
    "ScoringInputError",
    "ScoringOptions",
    "Spread",
    "SweepInput",
    "SweepPoint",
    "SweepResult",
    "Verdict",
    "adaptive_overfit_test",
    "brier_partition",
    "classification_report",
    "classification_row_losses",
    "compare_for_gate",
    "complexity_sweep",
    "evaluate_gates",
    "feedback_mask",
    "ladder_step",
    "log_loss_decomposition",
    "mcnemar_test",
    "non_inferiority",
    "overfitting_flags",
    "paired_bootstrap",
    "paired_loss_test",
    "parse_gates",
    "plan_comparison",
    "regression_report",
    "regression_row_losses",
    "squared_loss_decomposition",
    "sweep_from_predictions",
    "to_jsonable",
    "zero_one_decomposition",
]
