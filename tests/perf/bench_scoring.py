"""Benchmark: ``regression_report`` against sklearn.metrics and against a numpy floor.

Run: ``.venv/bin/python tests/perf/bench_scoring.py [n] [k] [repeats]`` (defaults 1e6, 10, 9).
The last line printed is a JSON object. All timings are taken in one run, interleaved round
by round (so a busy neighbour slows every candidate alike), and each figure is the median of
its rounds, in wall time (``*_cpu`` keys: this process's CPU time, steadier when the machine
is shared). OpenBLAS is limited to one thread for every candidate (threadpoolctl), as in
``bench_binary.py`` and as a service with one worker per core runs; the report's time with
the default BLAS threads is given too (``report_seconds_blas_default``), because a BLAS
call on a busy 2-core machine can stall on its second thread.

- ``regression_speedup_vs_sklearn``: sklearn's time for the eight metrics per seed plus the
  same eight on the seed-averaged prediction (what ``scores`` and ``ensemble`` hold), divided
  by our time for the whole report (also intervals, bias-variance, flags, validation).
- ``regression_ratio_to_floor``: our report's time over the floor: the least work any
  implementation of the per-seed metrics must do, one vectorized residual pass (r = p - y;
  sums of r, r^2, |r|, |r|/|y|; max |r|) and one ``np.partition`` per seed for the median.
  The floor is timed in two layouts (a (K, n) residual matrix; a reused (n,) buffer per seed)
  and the faster counts.
- ``interval_overhead_share``: (report with intervals - report without) / report without.
- ``interval_coverage``: the mean over headline metrics of the coverage of their 95%
  intervals on simulated data with known truth (per metric in
  ``interval_coverage_per_metric``); the median's interval is conservative by design.
- ``phases_cpu_ms`` (diagnostics): the report's CPU time per phase (``measure_phases``).
- ``binary_speedup_vs_sklearn``: from ``tests/perf/bench_binary.py``'s ``measure_binary``
  (null, with the reason, if it cannot be imported or run).
"""

from __future__ import annotations

import json
import math
import os
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
from scipy import optimize, stats
from sklearn import metrics
from threadpoolctl import threadpool_limits

from service.scoring._checks import as_seed_predictions
from service.scoring.options import ScoringOptions
from service.scoring.regression import METRICS, _regression_report, regression_report

SKLEARN = {
    "mse": metrics.mean_squared_error,
    "rmse": metrics.root_mean_squared_error,
    "mae": metrics.mean_absolute_error,
    "median_absolute_error": metrics.median_absolute_error,
    "max_error": metrics.max_error,
    "r2": metrics.r2_score,
    "explained_variance": metrics.explained_variance_score,
    "mape": metrics.mean_absolute_percentage_error,
}


def _data(n: int, k: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Synthetic rows: targets, a shared model error and seed-specific noise."""
    rng = np.random.default_rng(seed)
    y = rng.normal(5.0, 2.0, size=n)
    shared = 0.2 + 0.6 * rng.normal(size=n)
    return y, y + shared + 0.4 * rng.normal(size=(k, n))


def _sklearn_regression(y: np.ndarray, preds: np.ndarray) -> dict[str, list[float]]:
    """The eight sklearn metrics on every seed, then on the seed-averaged prediction."""
    out: dict[str, list[float]] = {name: [] for name in SKLEARN}
    for p in [*preds, preds.mean(axis=0)]:
        for name, fn in SKLEARN.items():
            out[name].append(fn(y, p))
    return out


def _floor_matrix(y: np.ndarray, preds: np.ndarray) -> None:
    """Floor, layout 1: one (K, n) residual matrix, reductions along rows, partition per seed."""
    n = y.size
    inv = 1.0 / np.maximum(np.abs(y), np.finfo(np.float64).eps)
    y.var()
    r = preds - y
    r.sum(axis=1)
    np.einsum("ij,ij->i", r, r)
    np.abs(r, out=r)
    r.sum(axis=1)
    r.max(axis=1)
    np.einsum("ij,j->i", r, inv)
    for row in r:
        row.partition(n // 2)
        if n % 2 == 0:
            row[: n // 2].max()


def _floor_buffer(y: np.ndarray, preds: np.ndarray) -> None:
    """Floor, layout 2: one reused (n,) buffer per seed, the same operations."""
    n = y.size
    inv = 1.0 / np.maximum(np.abs(y), np.finfo(np.float64).eps)
    y.var()
    r = np.empty(n)
    for p in preds:
        np.subtract(p, y, out=r)
        r.sum()
        np.einsum("i,i->", r, r)
        np.abs(r, out=r)
        r.sum()
        r.max()
        np.einsum("i,i->", r, inv)
        r.partition(n // 2)
        if n % 2 == 0:
            r[: n // 2].max()


def _interleaved(
    candidates: dict[str, Callable[[], Any]], rounds: dict[str, int]
) -> tuple[dict[str, list[float]], dict[str, list[float]]]:
    """Run each candidate once per round, in turn; return (wall, CPU) timings per candidate."""
    wall: dict[str, list[float]] = {name: [] for name in candidates}
    cpu: dict[str, list[float]] = {name: [] for name in candidates}
    for r in range(max(rounds.values())):
        for name, fn in candidates.items():
            if r >= rounds[name]:
                continue
            start, start_cpu = time.perf_counter(), time.process_time()
            fn()
            wall[name].append(time.perf_counter() - start)
            cpu[name].append(time.process_time() - start_cpu)
    return wall, cpu


def measure_regression(n: int = 1_000_000, k: int = 10, repeats: int = 9) -> dict[str, Any]:
    y, preds = _data(n, k)
    options = ScoringOptions()
    kw = dict(
        sample_weight=None,
        train_y_true=None,
        train_predictions=None,
        noise_variance=None,
        options=options,
    )
    from service.scoring.decomposition import squared_loss_decomposition

    small_y, small_p = _data(2000, 2, seed=1)
    regression_report(small_y, small_p)  # warm-up: imports, first-call costs
    _sklearn_regression(small_y, small_p)

    candidates = {
        "report": lambda: _regression_report(y, preds, with_intervals=True, **kw),
        "report_without_intervals": lambda: _regression_report(
            y, preds, with_intervals=False, **kw
        ),
        "floor_matrix": lambda: _floor_matrix(y, preds),
        "floor_buffer": lambda: _floor_buffer(y, preds),
        "validation_as_seed_predictions": lambda: as_seed_predictions(preds, n),
        "decomposition_squared_loss": lambda: squared_loss_decomposition(y, preds),
        "sklearn": lambda: _sklearn_regression(y, preds),
    }
    rounds = {name: repeats for name in candidates}
    rounds["sklearn"] = max(3, repeats // 2)
    load_before = os.getloadavg()
    with threadpool_limits(limits=1, user_api="blas"):
        times, cpu_times = _interleaved(candidates, rounds)
    default_blas, _ = _interleaved({"report": candidates["report"]}, {"report": 3})
    load_after = os.getloadavg()
    med = {name: float(np.median(t)) for name, t in times.items()}
    low = {name: float(np.min(t)) for name, t in times.items()}
    cpu = {name: float(np.median(t)) for name, t in cpu_times.items()}
    floor = min(med["floor_matrix"], med["floor_buffer"])
    floor_cpu = min(cpu["floor_matrix"], cpu["floor_buffer"])

    report = regression_report(y, preds)
    reference = _sklearn_regression(y, preds)
    worst = 0.0
    for name in METRICS:
        ref = float(np.mean(reference[name][:k]))
        if name == "rmse":
            ref = math.sqrt(float(np.mean(reference["mse"][:k])))
        worst = max(worst, abs(report.scores[name] - ref) / abs(ref))
        ens_ref = reference[name][k]
        worst = max(worst, abs(report.ensemble[name] - ens_ref) / abs(ens_ref))

    return {
        "n": n,
        "k": k,
        "repeats": repeats,
        "seconds_median": med,
        "seconds_min": low,
        "cpu_seconds_median": cpu,
        "seconds_all_runs": times,
        "report_seconds_blas_default": float(np.median(default_blas["report"])),
        "floor_seconds": floor,
        "sklearn_seconds_per_seed": med["sklearn"] / (k + 1),
        "regression_speedup_vs_sklearn": med["sklearn"] / med["report"],
        "regression_ratio_to_floor": med["report"] / floor,
        "regression_ratio_to_floor_without_intervals": med["report_without_intervals"] / floor,
        "interval_overhead_share": (med["report"] - med["report_without_intervals"])
        / med["report_without_intervals"],
        "regression_speedup_vs_sklearn_cpu": cpu["sklearn"] / cpu["report"],
        "regression_ratio_to_floor_cpu": cpu["report"] / floor_cpu,
        "interval_overhead_share_cpu": (cpu["report"] - cpu["report_without_intervals"])
        / cpu["report_without_intervals"],
        "share_of_report_cpu": {
            "validation_as_seed_predictions": cpu["validation_as_seed_predictions"]
            / cpu["report"],
            "decomposition_squared_loss": cpu["decomposition_squared_loss"] / cpu["report"],
        },
        "max_relative_difference_vs_sklearn": worst,
        "load_average_before_after": [load_before[0], load_after[0]],
    }


def measure_coverage(draws: int = 400, n: int = 500, k: int = 3, seed: int = 2024) -> dict:
    """Coverage of the report's 95% intervals on simulated data with known truth.

    y ~ U(1, 3) (variance 1/3, E[1/y] = ln(3)/2); seed k's residual on row i is
    b + s z_i + t u_ki with standard normal z, u, so every seed's residual is N(b, s^2 + t^2).
    """
    b, s, t = 0.3, 0.8, 0.5
    sigma = math.hypot(s, t)
    mse = b * b + sigma * sigma
    mae = sigma * math.sqrt(2 / math.pi) * math.exp(-b * b / (2 * sigma * sigma)) + b * (
        1 - 2 * stats.norm.cdf(-b / sigma)
    )
    median = optimize.brentq(
        lambda m: stats.norm.cdf((m - b) / sigma) - stats.norm.cdf((-m - b) / sigma) - 0.5, 0, 10
    )
    truth = {
        "mse": mse,
        "rmse": math.sqrt(mse),
        "mae": mae,
        "median_absolute_error": median,
        "r2": 1 - 3 * mse,
        "explained_variance": 1 - 3 * sigma * sigma,
        "mape": mae * math.log(3) / 2,
    }
    rng = np.random.default_rng(seed)
    hits = dict.fromkeys(truth, 0)
    for _ in range(draws):
        y = rng.uniform(1, 3, n)
        r = b + s * rng.normal(size=n) + t * rng.normal(size=(k, n))
        intervals = regression_report(y, y + r).intervals
        for name, value in truth.items():
            hits[name] += int(intervals[name].low <= value <= intervals[name].high)
    per_metric = {name: h / draws for name, h in hits.items()}
    return {
        "interval_coverage": float(np.mean(list(per_metric.values()))),
        "interval_coverage_min": min(per_metric.values()),
        "interval_coverage_per_metric": per_metric,
        "interval_coverage_setup": {"draws": draws, "n": n, "k": k, "level": 0.95},
    }


def measure_binary_or_null() -> dict[str, Any]:
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    try:
        from bench_binary import measure_binary
    except Exception as exc:  # noqa: BLE001 (report whatever stops it)
        return {"binary_speedup_vs_sklearn": None, "binary_note": f"not importable: {exc!r}"}
    try:
        result = measure_binary()
    except Exception as exc:  # noqa: BLE001
        return {"binary_speedup_vs_sklearn": None, "binary_note": f"failed: {exc!r}"}
    return {"binary_speedup_vs_sklearn": result.get("binary_speedup_vs_sklearn"), "binary": result}


# (label, module attribute path) of the report's phases, timed by ``measure_phases``; a
# phase's time excludes the phases that run inside it (the bracket's parts inside the pass)
_PHASES = [
    ("validation", "regression.as_targets"),
    ("validation", "regression.as_seed_predictions"),
    ("validation", "regression.as_weights"),
    ("target_stats", "regression._target_stats"),
    ("fused_pass_block_loop", "regression._fused_pass"),
    ("bracket_sample", "regression._BracketSelector.__init__"),
    ("bracket_scan", "regression._BracketSelector.add_block"),
    ("median_finish", "regression._BracketSelector.finish_row"),
    ("metrics", "regression._metrics_from_pass"),
    ("decomposition", "regression._decomposition"),
    ("flags", "flags.overfitting_flags"),
    ("interval_moments", "regression._RowMoments.start_block"),
    ("interval_moments", "regression._RowMoments.end_block"),
    ("interval_moments", "regression._RowMoments.finish"),
    ("intervals", "regression._intervals"),
]


def measure_phases(n: int = 1_000_000, k: int = 10, repeats: int = 5) -> dict[str, Any]:
    """Diagnostics: CPU time of each phase of one report (median over ``repeats``), in ms.

    Each phase's function is wrapped in a timer for the duration (a few microseconds per
    call, about 100 calls per report). ``other`` is the report's time outside every phase.
    """
    from service.scoring import flags, regression

    modules = {"regression": regression, "flags": flags}
    y, preds = _data(n, k)
    totals: dict[str, float] = {}
    stack: list[float] = []  # CPU time spent in phases nested inside the running one

    def timed(label: str, fn: Callable[..., Any]) -> Callable[..., Any]:
        def wrapper(*args: Any, **kwargs: Any) -> Any:
            start = time.process_time()
            stack.append(0.0)
            try:
                return fn(*args, **kwargs)
            finally:
                inner = stack.pop()
                spent = time.process_time() - start
                totals[label] = totals.get(label, 0.0) + spent - inner
                if stack:
                    stack[-1] += spent

        return wrapper

    originals = []
    for label, path in _PHASES:
        module, *attrs = path.split(".")
        owner = modules[module]
        for attr in attrs[:-1]:
            owner = getattr(owner, attr)
        original = getattr(owner, attrs[-1])
        originals.append((owner, attrs[-1], original))
        setattr(owner, attrs[-1], timed(label, original))
    runs: list[dict[str, float]] = []
    try:
        with threadpool_limits(limits=1, user_api="blas"):
            for _ in range(repeats):
                totals.clear()
                start = time.process_time()
                _regression_report(
                    y, preds, sample_weight=None, train_y_true=None, train_predictions=None,
                    noise_variance=None, options=ScoringOptions(), with_intervals=True,
                )
                total = time.process_time() - start
                totals["other"] = total - sum(totals.values())
                totals["total"] = total
                runs.append(dict(totals))
    finally:
        for owner, attr, original in originals:
            setattr(owner, attr, original)
    labels = list(dict.fromkeys([label for label, _ in _PHASES] + ["other", "total"]))
    return {
        "phases_cpu_ms": {
            label: round(1e3 * float(np.median([r.get(label, 0.0) for r in runs])), 2)
            for label in labels
        }
    }


def main(argv: list[str]) -> dict[str, Any]:
    args = [int(a) for a in argv[:3]]
    out: dict[str, Any] = {}
    out.update(measure_regression(*args))
    out.update(measure_phases(*args[:2]))
    out.update(measure_coverage())
    out.update(measure_binary_or_null())
    return out


if __name__ == "__main__":
    print(json.dumps(main(sys.argv[1:])))
