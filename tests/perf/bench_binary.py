"""Benchmark: ``classification_report`` on a binary task against sklearn.metrics per seed.

Run: ``.venv/bin/python tests/perf/bench_binary.py [n] [k]``. The last line printed is a
JSON object; ``binary_speedup_vs_sklearn`` is sklearn's time for the metric set (accuracy,
F1, ROC AUC, log loss, Brier, MCC, confusion matrix, each seed) divided by our time for the
whole report (those metrics and every other one, intervals, bias-variance, flags).
"""

from __future__ import annotations

import json
import sys
import time
from typing import Any

import numpy as np
from sklearn import metrics
from threadpoolctl import threadpool_limits

from service.scoring.classification import classification_report


def _data(n: int, k: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Synthetic binary rows: a shared signal, and seed-specific noise in the scores."""
    rng = np.random.default_rng(seed)
    signal = rng.normal(size=n)
    y = (rng.random(n) < 1.0 / (1.0 + np.exp(-2.0 * signal))).astype(np.intp)
    logits = 2.0 * signal + 0.5 * rng.normal(size=(k, n))
    p1 = 1.0 / (1.0 + np.exp(-logits))
    return y, np.stack([1.0 - p1, p1], axis=2)


def _sklearn_set(y: np.ndarray, probs: np.ndarray) -> list[dict[str, Any]]:
    out = []
    for k in range(probs.shape[0]):
        p1 = probs[k, :, 1]
        labels = (p1 > 0.5).astype(np.intp)  # threshold 0.5, as our argmax for C == 2
        out.append(
            {
                "accuracy": metrics.accuracy_score(y, labels),
                "f1": metrics.f1_score(y, labels),
                "roc_auc": metrics.roc_auc_score(y, p1),
                "log_loss": metrics.log_loss(y, probs[k]),
                "brier": metrics.brier_score_loss(y, p1),
                "mcc": metrics.matthews_corrcoef(y, labels),
                "confusion_matrix": metrics.confusion_matrix(y, labels, labels=[0, 1]),
            }
        )
    return out


def _timed(fn: Any) -> tuple[Any, float, float]:
    """(result, wall seconds, CPU seconds of this process)."""
    wall, cpu = time.perf_counter(), time.process_time()
    out = fn()
    return out, time.perf_counter() - wall, time.process_time() - cpu


def measure_binary(
    n: int = 1_000_000, k: int = 10, repeats: int = 3, blas_threads: int | None = 1
) -> dict[str, Any]:
    """Time our report and sklearn's metric set on the same (n rows, k seeds) input.

    Runs alternate (ours, sklearn, ours, sklearn, ...) so that load from other processes
    hits both sides alike. Each side's time is its fastest run, as ``timeit`` advises
    (slower runs measure interference from other processes, not the code); the ratio of
    medians and every run are reported too.

    ``blas_threads`` limits OpenBLAS threads for both sides (threadpoolctl), as a service
    worker should run (one BLAS thread per worker process): with the default thread pool,
    the many small ``np.dot`` calls in blocked loops wake and spin a second thread each
    time, which on 2 shared cores multiplies their cost. Our time with the default pool is
    reported too (``ours_seconds_blas_default``).
    """
    if blas_threads is None:
        return _measure(n, k, repeats)
    with threadpool_limits(limits=blas_threads, user_api="blas"):
        out = _measure(n, k, repeats)
    y, probs = _data(n, k)
    _, wall, cpu = _timed(lambda: classification_report(y, 2, probabilities=probs))
    out["ours_seconds_blas_default"] = wall
    out["ours_cpu_seconds_blas_default"] = cpu
    out["blas_threads"] = blas_threads
    return out


def _measure(n: int, k: int, repeats: int) -> dict[str, Any]:
    y, probs = _data(n, k)
    small_y, small_p = _data(1000, 2, seed=1)
    classification_report(small_y, 2, probabilities=small_p)  # warm-up (imports, caches)
    _sklearn_set(small_y, small_p)

    ours_wall, ours_cpu, sk_wall, sk_cpu = [], [], [], []
    report = reference = None
    for _ in range(repeats):
        report, wall, cpu = _timed(lambda: classification_report(y, 2, probabilities=probs))
        ours_wall.append(wall)
        ours_cpu.append(cpu)
        reference, wall, cpu = _timed(lambda: _sklearn_set(y, probs))
        sk_wall.append(wall)
        sk_cpu.append(cpu)

    assert report is not None and reference is not None
    worst = 0.0
    for name in ("accuracy", "f1", "roc_auc", "log_loss", "brier", "mcc"):
        ref = float(np.mean([r[name] for r in reference]))
        worst = max(worst, abs(report.scores[name] - ref) / abs(ref))
    times = {"ow": ours_wall, "oc": ours_cpu, "sw": sk_wall, "sc": sk_cpu}
    best = {key: float(np.min(v)) for key, v in times.items()}
    med = {key: float(np.median(v)) for key, v in times.items()}
    return {
        "n": n,
        "k": k,
        "repeats": repeats,
        "ours_seconds": best["ow"],
        "ours_cpu_seconds": best["oc"],
        "sklearn_seconds": best["sw"],
        "sklearn_cpu_seconds": best["sc"],
        "sklearn_seconds_per_seed": best["sw"] / k,
        "binary_speedup_vs_sklearn": best["sw"] / best["ow"],
        "binary_speedup_vs_sklearn_cpu": best["sc"] / best["oc"],
        "binary_speedup_vs_sklearn_median": med["sw"] / med["ow"],
        "ours_seconds_all_runs": ours_wall,
        "sklearn_seconds_all_runs": sk_wall,
        "max_relative_difference_vs_sklearn": worst,
    }


if __name__ == "__main__":
    args = [int(a) for a in sys.argv[1:3]]
    print(json.dumps(measure_binary(*args)))
