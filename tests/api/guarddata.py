"""Helpers for the reuse-guard tests: the split a holdout uses, reports compared loosely."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import orjson
from apidata import Holdout

from service.scoring import to_jsonable
from service.scoring.split import feedback_mask

REPORT_KEYS = (
    "scores",
    "intervals",
    "seed_spread",
    "ensemble",
    "bias_variance",
    "flags",
    "train_scores",
    "details",
)


def holdout_mask(owner: Any, holdout: Holdout, strata: Any = None) -> np.ndarray:
    """The feedback mask (holdout row order) from the split seed the owner can read.

    reference: service.scoring.split.feedback_mask, the derivation the store's mask documents;
    the owner's view also gives the slice sizes, checked here.
    """
    view = owner.get(f"/v1/holdouts/{holdout.id}").get_json()
    mask = feedback_mask(
        view["n_rows"],
        feedback_fraction=view["policy"]["feedback_fraction"],
        seed=int(view["split"]["seed"]),
        strata=strata,
    )
    assert view["split"]["feedback_rows"] == int(mask.sum())
    assert view["split"]["reserve_rows"] == int((~mask).sum())
    return mask


def as_json(value: Any) -> Any:
    """The JSON round trip a response goes through (NaN -> null)."""
    return orjson.loads(orjson.dumps(to_jsonable(value)))


def assert_close(got: Any, want: Any, path: str = "", rel: float = 1e-9) -> None:
    """Equal structures; floats equal to ``rel`` (the core may differ in the last ulp with
    the memory layout of its inputs), everything else exactly."""
    if isinstance(want, dict):
        assert isinstance(got, dict) and set(got) == set(want), (path, got, want)
        for k in want:
            assert_close(got[k], want[k], f"{path}.{k}", rel)
    elif isinstance(want, list):
        assert isinstance(got, list) and len(got) == len(want), (path, got, want)
        for i, (g, w) in enumerate(zip(got, want, strict=True)):
            assert_close(g, w, f"{path}[{i}]", rel)
    elif isinstance(want, float) and not isinstance(want, bool):
        assert isinstance(got, (int, float)), (path, got, want)
        assert math.isclose(got, want, rel_tol=rel, abs_tol=1e-12), (path, got, want)
    else:
        assert got == want, (path, got, want)


def numbers(value: Any) -> list[float]:
    """Every float in a JSON value (not ints or booleans)."""
    out: list[float] = []
    if isinstance(value, dict):
        for v in value.values():
            out.extend(numbers(v))
    elif isinstance(value, list):
        for v in value:
            out.extend(numbers(v))
    elif isinstance(value, float):
        out.append(value)
    return out


def keys(value: Any) -> set[str]:
    """Every dict key anywhere in a JSON value."""
    out: set[str] = set()
    if isinstance(value, dict):
        for k, v in value.items():
            out.add(k)
            out |= keys(v)
    elif isinstance(value, list):
        for v in value:
            out |= keys(v)
    return out
