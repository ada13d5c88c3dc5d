"""Run the demo scenario end to end through the HTTP API and print what a user looks at.

The ferry operator's owner registers the sealed holdout of crossing times with a policy of
gates (an RMSE bound, a flag gate on a critical generalization gap, a warning on a variance
share above one half, and non-inferiority to the reference); two modelling groups submit
bootstrap-trained models (five fits each) with their training-set predictions through
``service.client``, and one of them through the ``heldout submit`` command a pipeline would
run. For each submission the script prints the headline scores with intervals, the
bias-variance split, the flags and the verdict with one line per gate, as the group sees
them (the feedback slice, through the holdout's guard); then the tree-depth sweep with its
minimum and one-standard-error choice, and the standings.

The holdout's guard is ``rounded`` rather than the default Ladder so that every submission's
own verdict is shown: under the Ladder a submission that does not beat its group's best is
answered with the best's scores and verdict.

Usage: python -m demo_data.run_demo BASE_URL OWNER_TOKEN SUBMITTER_TOKEN_A SUBMITTER_TOKEN_B
(A is group harbour-models, B tide-lab.) ``HELDOUT_DEMO_ROWS`` sets the holdout's size
(default 2000).
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import tempfile
from pathlib import Path
from typing import Any, TextIO

import pyarrow as pa
import pyarrow.parquet as pq

from demo_data.scenario import DemoSubmission, build
from service.cli_client import exit_status, fmt, format_standings, format_verdict
from service.client import HeldoutClient

HOLDOUT_NAME = "saltmarsh-crossing-times"
RMSE_LIMIT = 3.2
"""The operator's requirement: crossing-time predictions within 3.2 minutes RMSE."""
MARGIN = 0.05
"""How much worse than the reference (RMSE, minutes) a new model may be."""

GATES: list[dict[str, Any]] = [
    {"metric": "rmse", "op": "<=", "value": RMSE_LIMIT},
    {"flag": "generalization_gap", "min_severity": "critical"},
    {"metric": "variance_share", "op": "<=", "value": 0.5, "severity": "warn"},
    {"compare": "non_inferior", "metric": "rmse", "margin": MARGIN, "alpha": 0.05},
]
POLICY: dict[str, Any] = {
    "primary_metric": "rmse",
    # half the rows in the feedback slice: the groups' verdicts rest on 1000 rows, so the
    # story does not depend on the random split drawn at registration
    "feedback_fraction": 0.5,
    "guard": "rounded",
    "decimals": 4,
    "gates": GATES,
}
SWEEP = "tree-depth"
EXIT_WORDS = {0: "pass", 1: "fail", 2: "error", 3: "warn"}


def write_files(entry: DemoSubmission, ids: list[str], workdir: Path) -> tuple[Path, Path]:
    """The submission as a pipeline keeps it: a Parquet file of predictions (``id``,
    ``pred.<seed>``) and one of training-set predictions (``y_true``, ``pred.<seed>``)."""
    seeds = range(entry.predictions.shape[0])
    preds = workdir / f"{entry.model}.parquet"
    train = workdir / f"{entry.model}.train.parquet"
    pq.write_table(
        pa.table({"id": ids, **{f"pred.{k}": entry.predictions[k] for k in seeds}}), preds
    )
    pq.write_table(
        pa.table(
            {"y_true": entry.train_minutes, **{f"pred.{k}": entry.train_predictions[k]
                                                for k in seeds}}
        ),
        train,
    )
    return preds, train


def print_submission(result: dict[str, Any], about: str, out: TextIO) -> None:
    """Scores with intervals, the decomposition, flags and the verdict, one block."""
    scores, intervals = result["scores"], result["intervals"]
    d = result["bias_variance"]["squared"]
    rmse_iv = intervals["rmse"]
    train = result.get("train_scores") or {}
    print(f"\n== {result['model']}  (group {result['group']}; {about})", file=out)
    print(
        f"   {result['id']}: {result['n_seeds']} seeds, {result['slice']} slice of "
        f"{result['n_rows']} rows",
        file=out,
    )
    print(
        f"   rmse {fmt(scores['rmse'], 4)}  [{fmt(rmse_iv['low'], 4)}, {fmt(rmse_iv['high'], 4)}]"
        f"   mae {fmt(scores['mae'], 4)}   r2 {fmt(scores['r2'], 3)}"
        f"   train rmse {fmt(train.get('rmse'), 4)}",
        file=out,
    )
    expected = d["expected_loss"]
    bias_share = d["bias"] / expected if expected else None
    print(
        f"   squared loss {fmt(expected, 4)} = bias term {fmt(d['bias'], 4)} "
        f"(share {fmt(bias_share, 2)}) + variance {fmt(d['variance'], 4)} "
        f"(share {fmt(d['variance_share'], 2)}); averaging the seeds gives "
        f"{fmt(d['ensemble_loss'], 4)}",
        file=out,
    )
    for flag in result["flags"]:
        print(f"   [{flag['severity']}] {flag['code']}: {flag['message']}", file=out)
    if not result["flags"]:
        print("   no overfitting flags", file=out)
    verdict = format_verdict(result.get("verdict"), result["id"])
    print("\n".join("   " + line for line in verdict.splitlines()), file=out)
    status = exit_status(result)
    strict = exit_status(result, strict=True)
    tail = f" ({strict} with --strict)" if strict != status else ""
    print(f"   `heldout submit` exits {status}{tail}", file=out)


def submit_with_cli(
    base: str, token: str, holdout_id: str, preds: Path, train: Path, model: str
) -> tuple[int, str]:
    """Run ``heldout submit`` as a pipeline would; its exit status and standard output."""
    env = {k: v for k, v in os.environ.items() if k not in ("HELDOUT_URL", "HELDOUT_TOKEN")}
    env.update(HELDOUT_URL=base, HELDOUT_TOKEN=token)
    run = subprocess.run(
        [sys.executable, "-m", "service.cli", "submit", holdout_id, str(preds),
         "--train", str(train), "--model", model],
        env=env, capture_output=True, text=True, timeout=300,
    )
    if run.returncode == 2:
        sys.exit(f"heldout submit failed:\n{run.stderr}")
    return run.returncode, run.stdout


def run(
    base: str,
    owner: str,
    group_a: str,
    group_b: str,
    *,
    n_holdout: int = 2000,
    out: TextIO = sys.stdout,
) -> dict[str, Any]:
    """Run the whole demo against the service at ``base``; print it to ``out``.

    Returns what was printed as data: ``holdout``, ``results`` (model name to the scored
    submission as its group saw it), ``exit_statuses`` (model name to ``heldout submit``'s
    status), ``sweep`` (the owner's curve), ``standings`` (the owner's view).
    """
    holdout, named, sweep = build(n_holdout=n_holdout)
    results: dict[str, dict[str, Any]] = {}
    statuses: dict[str, int] = {}
    with (
        HeldoutClient(base, owner) as owner_client,
        HeldoutClient(base, group_a) as harbour,
        HeldoutClient(base, group_b) as tide,
        tempfile.TemporaryDirectory(prefix="heldout-demo-") as tmp,
    ):
        workdir = Path(tmp)
        registered = owner_client.create_holdout(
            pa.table({"id": holdout.ids, "y_true": holdout.minutes}),
            name=HOLDOUT_NAME, task="regression", policy=POLICY, progress=False,
        )
        holdout_id = registered["id"]
        print(
            f"Registered holdout {registered['name']} {holdout_id} ({registered['n_rows']} "
            f"rows), fingerprint {registered['fingerprint'][:16]}...",
            file=out,
        )
        print(f"Gates (guard {POLICY['guard']}, so each submission's own verdict shows):",
              file=out)
        for gate in registered["policy"].get("gates", GATES):
            print(f"   {json.dumps(gate)}", file=out)

        def submit(client: HeldoutClient, entry: DemoSubmission, **extra: Any) -> dict[str, Any]:
            preds, train = write_files(entry, holdout.ids, workdir)
            result = client.submit(holdout_id, preds, model=entry.model, train=train,
                                   progress=False, **extra)
            results[entry.model] = result
            statuses[entry.model] = exit_status(result)
            return result

        # 1. The model in service today. No reference exists yet, so the comparison gate
        # cannot be checked: the verdict warns.
        champion = submit(harbour, named["pruned-tree"])
        print_submission(champion, named["pruned-tree"].notes["about"], out)

        # 2. The owner makes it the holdout-wide reference (the champion).
        ref = owner_client.set_reference(holdout_id, champion["id"])
        print(
            f"\nThe owner sets the holdout-wide reference: {ref['submission']} "
            f"({ref['model']}, group {ref['group']}). Later submissions are compared with it.",
            file=out,
        )

        # 3. High bias, high variance, overfit.
        for name in ("straight-line", "random-split-tree", "full-depth-tree"):
            print_submission(submit(harbour, named[name]), named[name].notes["about"], out)

        # 4. tide-lab's sweep over tree depth: one line per point, then the curve.
        print(f"\n== Sweep '{SWEEP}' of group tide-lab: one submission per depth", file=out)
        for entry in sweep:
            result = submit(tide, entry, sweep=(SWEEP, float(entry.complexity or 0)))
            d = result["bias_variance"]["squared"]
            failed = [r["gate"] for r in result["verdict"]["reasons"] if r["status"] != "pass"]
            print(
                f"   depth {entry.complexity:>4g}: rmse {fmt(result['scores']['rmse'], 4):>6}"
                f"  bias {fmt(d['bias'], 4):>6}  variance {fmt(d['variance'], 4):>6}"
                f"  verdict {result['verdict']['status']}"
                + (f" ({'; '.join(failed)})" if failed else ""),
                file=out,
            )
        curve = owner_client.sweep(holdout_id, SWEEP, group="tide-lab")
        print(
            f"\n   The owner's view of the curve (all rows): {curve['loss']} loss against depth",
            file=out,
        )
        print(f"   {'depth':>6} {'test':>8} {'+-se':>7} {'train':>8} {'bias':>8} {'var':>7}"
              "  region", file=out)
        for point in curve["points"]:
            print(
                f"   {point['complexity']:>6g} {point['test_loss']:>8.3f} "
                f"{point['test_loss_se']:>7.3f} {fmt(point['train_loss'], 4):>8} "
                f"{point['bias']:>8.3f} {point['variance']:>7.3f}  {point['region']}",
                file=out,
            )
        print(
            f"   minimum at depth {curve['best_complexity']:g}; one-standard-error choice "
            f"(the simplest depth within one standard error of the minimum): depth "
            f"{curve['one_se_complexity']:g}",
            file=out,
        )

        # 5. Non-inferiority to the champion: a challenger that passes, and a cheaper model
        # submitted the way a pipeline would, with `heldout submit`.
        print_submission(submit(tide, named["spline-ridge"]),
                         named["spline-ridge"].notes["about"], out)
        shallow = named["shallow-tree"]
        preds, train = write_files(shallow, holdout.ids, workdir)
        print(
            f"\n== {shallow.model}  (group tide-lab; {shallow.notes['about']}), submitted by "
            f"a pipeline:\n   $ heldout submit {holdout_id} {preds.name} --train {train.name} "
            f"--model {shallow.model}",
            file=out,
        )
        status, text = submit_with_cli(base, group_b, holdout_id, preds, train, shallow.model)
        print("\n".join("   " + line if line else "" for line in text.splitlines()), file=out)
        print(f"   $ echo $?\n   {status}  ({EXIT_WORDS.get(status, '?')})", file=out)
        found = re.search(r"^submission (sub_\S+)", text, flags=re.MULTILINE)
        if found is None:
            sys.exit("heldout submit printed no submission id")
        results[shallow.model] = tide.submission(found.group(1))
        statuses[shallow.model] = status

        standings = owner_client.standings(holdout_id)
        print("\n== Standings (the owner's view: feedback values, reserve beside them)",
              file=out)
        print(format_standings(standings), file=out)
    return {
        "holdout": registered,
        "results": results,
        "exit_statuses": statuses,
        "sweep": curve,
        "standings": standings,
    }


def main(argv: list[str]) -> None:
    """Command line: BASE_URL OWNER_TOKEN SUBMITTER_TOKEN_A SUBMITTER_TOKEN_B."""
    if len(argv) != 4:
        sys.exit(__doc__)
    rows = int(os.environ.get("HELDOUT_DEMO_ROWS", "2000"))
    run(*argv, n_holdout=rows)


if __name__ == "__main__":
    main(sys.argv[1:])
