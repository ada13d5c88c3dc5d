"""Caller-settable knobs of the scoring core, with documented defaults."""

from __future__ import annotations

from dataclasses import dataclass, field

DEFAULT_BOOTSTRAP_SEED = 20_261_202
"""Seed of every bootstrap the core runs, fixed so the same input gives the same interval."""


@dataclass(frozen=True)
class FlagThresholds:
    """When overfitting evidence becomes a flag. Every default is documented in DEVELOPERS.md.

    - ``gap_alpha``: a generalization gap (test loss above train loss) is flagged when the
      one-sided test of test > train has p below this.
    - ``gap_min_relative``: ... and the gap is at least this share of the train loss.
    - ``variance_share``: variance term / expected loss above this flags variance-dominated error.
    - ``underfit_ratio``: train and test loss both at least this share of the trivial
      baseline's loss (train mean for regression, class frequencies for classification).
    - ``instability_cv``: coefficient of variation over seeds of the primary loss above this
      flags instability across seeds.
    - ``gap_critical_relative``: a flagged gap is ``critical`` (not ``warning``) when the
      held-out loss is at least (1 + this) times the training loss.
    - ``underfit_critical_ratio``: a flagged underfit is ``critical`` when the held-out loss is
      at least this multiple of the baseline's.
    """

    gap_alpha: float = 0.01
    gap_min_relative: float = 0.10
    variance_share: float = 0.5
    underfit_ratio: float = 0.9
    instability_cv: float = 0.10
    gap_critical_relative: float = 1.0
    underfit_critical_ratio: float = 1.0


@dataclass(frozen=True)
class ScoringOptions:
    """Interval level, bootstrap settings and flag thresholds for one scoring call."""

    level: float = 0.95
    n_resamples: int = 1000
    bootstrap_method: str = "percentile"  # or "bca"
    seed: int = DEFAULT_BOOTSTRAP_SEED
    thresholds: FlagThresholds = field(default_factory=FlagThresholds)

    def __post_init__(self) -> None:
        if not 0.5 < self.level < 1.0:
            raise ValueError(f"level must lie in (0.5, 1), got {self.level!r}")
        if self.n_resamples < 100:
            raise ValueError(f"n_resamples must be at least 100, got {self.n_resamples!r}")
        if self.bootstrap_method not in ("percentile", "bca"):
            raise ValueError(
                f"bootstrap_method must be 'percentile' or 'bca', got {self.bootstrap_method!r}"
            )
