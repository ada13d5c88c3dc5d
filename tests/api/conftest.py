"""Fixtures of registered holdouts (data builders in ``apidata``)."""

from __future__ import annotations

from typing import Any

import pytest
from apidata import Holdout, classification_body, register, regression_body

from service.scoring import ScoringOptions


@pytest.fixture
def options(app: Any) -> ScoringOptions:
    """The scoring options the app uses, for calling the core directly."""
    return ScoringOptions(
        level=app.config["CONFIDENCE_LEVEL"], n_resamples=app.config["BOOTSTRAP_RESAMPLES"]
    )


@pytest.fixture
def reg_holdout(owner: Any) -> Holdout:
    return register(owner, regression_body())


@pytest.fixture
def cls_holdout(owner: Any) -> Holdout:
    return register(owner, classification_body())
