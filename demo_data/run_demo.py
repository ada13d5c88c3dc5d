"""Run the demo scenario end to end through the HTTP API and print what a user looks at.

The ferry operator's owner registers the sealed holdout of crossing times; two modelling
groups submit bootstrap-trained models (five fits each) with their training-set predictions,
one of them a sweep over tree depth. For each submission the script prints the headline
scores with intervals, the bias-variance split and the overfitting flags as the group sees
them (the feedback slice, through the holdout's reuse guard); then the sweep with its minimum
and one-standard-error choice as the owner sees it, and the standings.

Usage: python demo_data/run_demo.py BASE_URL OWNER_TOKEN SUBMITTER_TOKEN_A SUBMITTER_TOKEN_B
"""

from __future__ import annotations

import sys
from typing import Any

import requests

from demo_data.scenario import build

HOLDOUT_NAME = "saltmarsh-crossing-times"


def call(method: str, url: str, token: str, **kwargs: Any) -> dict[str, Any]:
    """One API call; stop with the problem details if the service refuses it."""
    response = requests.request(
        method, url, headers={"Authorization": f"Bearer {token}"}, timeout=120, **kwargs
    )
    if response.status_code >= 400:
        sys.exit(f"{method} {url} -> {response.status_code}: {response.text}")
    return response.json()


def fmt(value: float | None, digits: int = 3) -> str:
    return "n/a" if value is None else f"{value:.{digits}f}"


def print_submission(result: dict[str, Any]) -> None:
    scores, intervals = result["scores"], result["intervals"]
    decomposition = result["bias_variance"]["squared"]
    rmse_iv = intervals["rmse"]
    train = result.get("train_scores") or {}
    print(f"\n== {result['model']}  (group {result['group']}, {result['n_seeds']} seeds)")
    print(
        f"   rmse {fmt(scores['rmse'])}  [{fmt(rmse_iv['low'])}, {fmt(rmse_iv['high'])}]"
        f"   mae {fmt(scores['mae'])}   r2 {fmt(scores['r2'])}"
        f"   train rmse {fmt(train.get('rmse'))}"
    )
    print(
        f"   squared loss {fmt(decomposition['expected_loss'])} = bias term "
        f"{fmt(decomposition['bias'])} + variance {fmt(decomposition['variance'])}"
        f"   (variance share {fmt(decomposition['variance_share'], 2)}; averaging the seeds "
        f"gives {fmt(decomposition['ensemble_loss'])})"
    )
    guard = result.get("guard") or {}
    if guard.get("message"):
        print(f"   reuse guard ({guard.get('kind')}): {guard['message']}")
    for flag in result["flags"]:
        print(f"   [{flag['severity']}] {flag['code']}: {flag['message']}")
    if not result["flags"]:
        print("   no overfitting flags")


def main(base: str, owner: str, group_a: str, group_b: str) -> None:
    holdout, named, sweep = build()
    registered = call(
        "POST",
        f"{base}/v1/holdouts",
        owner,
        json={
            "name": HOLDOUT_NAME,
            "task": "regression",
            "ids": holdout.ids,
            "y_true": holdout.minutes.tolist(),
            "policy": {"primary_metric": "rmse"},
        },
    )
    holdout_id = registered["id"]
    print(
        f"Registered holdout {registered['name']} ({registered['n_rows']} rows), "
        f"fingerprint {registered['fingerprint'][:16]}..."
    )

    def submit(token: str, entry, sweep_name: str | None = None) -> dict[str, Any]:
        body: dict[str, Any] = {
            "model": entry.model,
            "ids": holdout.ids,
            "predictions": entry.predictions.tolist(),
            "train": {
                "y_true": entry.train_minutes.tolist(),
                "predictions": entry.train_predictions.tolist(),
            },
        }
        if sweep_name is not None:
            body["sweep"] = {"name": sweep_name, "complexity": entry.complexity}
        return call("POST", f"{base}/v1/holdouts/{holdout_id}/submissions", token, json=body)

    for entry in named:
        print_submission(submit(group_a, entry))
    for entry in sweep:
        submit(group_b, entry, sweep_name="tree-depth")

    # The owner's view: every sweep point on all rows. (A submitter sees the feedback slice,
    # and under the Ladder only the points it accepted as improvements.)
    curve = call(
        "GET",
        f"{base}/v1/holdouts/{holdout_id}/sweeps/tree-depth",
        owner,
        params={"group": "tide-lab"},
    )
    print(
        f"\n== Sweep 'tree-depth' of group {curve['group']} (owner's view, all rows): "
        f"{curve['loss']} loss against depth"
    )
    print(f"   {'depth':>6} {'test':>8} {'+-se':>7} {'train':>8} {'bias':>8} {'var':>7}  region")
    for point in curve["points"]:
        print(
            f"   {point['complexity']:>6g} {point['test_loss']:>8.3f} {point['test_loss_se']:>7.3f}"
            f" {fmt(point['train_loss']):>8} {point['bias']:>8.3f} {point['variance']:>7.3f}"
            f"  {point['region']}"
        )
    print(
        f"   minimum at depth {curve['best_complexity']:g}; "
        f"one-standard-error choice: depth {curve['one_se_complexity']:g}"
    )

    standings = call("GET", f"{base}/v1/holdouts/{holdout_id}/standings", owner)
    print(f"\n== Standings by {standings['primary_metric']}")
    for row in standings["entries"]:
        print(f"   {row['rank']}. group {row['group']:<10} {fmt(row['value'])}  ({row['model']})")


if __name__ == "__main__":
    if len(sys.argv) != 5:
        sys.exit(__doc__)
    main(*sys.argv[1:])
