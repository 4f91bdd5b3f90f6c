#!/usr/bin/env python3
"""End-to-end example: stream a CSV dataset into plumbline and print the scoreboard.

    python3 example.py [ADDRESS] [--units U.csv] [--predictions P.csv] [--dataset NAME]

ADDRESS is the server's gRPC address (default 127.0.0.1:7070). The default
data are the repository's simulated units (tests/data/nie_wager_d): units.csv
has unit_id, treatment, outcome and the features x1..x10; predictions.csv has
unit_id and one column per candidate model.

Steps: create a dataset, register one model per prediction column, stream
units, then predictions, then outcomes (the service refuses a prediction for
a unit whose outcome it already holds), run Recompute(refit=True), and print
the cumulative scoreboard. It exits non-zero if any call fails or the
scoreboard does not rank exactly the registered models plus the baselines
zero-effect and constant-effect.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from typing import NoReturn

import pandas as pd

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)

import plumbline_client as pc  # noqa: E402

DATA = os.path.normpath(os.path.join(HERE, "..", "..", "tests", "data", "nie_wager_d"))
RESERVED = {"unit_id", "treatment", "outcome", "propensity"}


def fail(msg: str) -> NoReturn:
    print(f"example: FAILED: {msg}", file=sys.stderr)
    sys.exit(1)


def main(argv: list[str]) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("address", nargs="?", default="127.0.0.1:7070", help="gRPC address of the server")
    ap.add_argument("--units", default=os.path.join(DATA, "units.csv"))
    ap.add_argument("--predictions", default=os.path.join(DATA, "predictions.csv"))
    ap.add_argument(
        "--dataset",
        default=None,
        help="dataset name (default: example-<unix time>, so re-runs do not collide)",
    )
    ap.add_argument("--batch-size", type=int, default=pc.DEFAULT_BATCH)
    args = ap.parse_args(argv)
    name = args.dataset or f"example-{int(time.time())}"

    units = pd.read_csv(args.units)
    preds = pd.read_csv(args.predictions)
    features = [c for c in units.columns if c not in RESERVED]
    models = [c for c in preds.columns if c != "unit_id"]
    binary = set(units["outcome"].unique()) <= {0, 1}
    print(
        f"example: {len(units)} units, {len(features)} features, models {models}; "
        f"dataset {name!r} at {args.address}"
    )

    with pc.connect(args.address) as client:
        ds = client.create_dataset(
            name,
            features,
            outcome_kind="binary" if binary else "continuous",
            # This example recomputes explicitly; keep the automatic triggers
            # (every 1,000 outcomes / 60 s by default) out of the way.
            recompute_every_outcomes=1_000_000,
            recompute_every_seconds=3600,
        )
        print(f"example: created dataset {ds.spec.name!r} (folds {ds.spec.folds}, alpha {ds.spec.alpha})")
        for m in models:
            client.register_model(name, m, version="example", description=f"column {m} of {os.path.basename(args.predictions)}")

        r = client.send_units(
            name,
            units,
            features=features,
            propensity="propensity" if "propensity" in units.columns else None,
            batch_size=args.batch_size,
        )
        print(f"example: units: {r.accepted} accepted, {r.duplicate} duplicate in {r.batches} batches")
        r = client.send_predictions(name, preds, models=models, batch_size=args.batch_size)
        print(f"example: predictions: {r.accepted} accepted, {r.duplicate} duplicate in {r.batches} batches")
        r = client.send_outcomes(name, units, value="outcome", batch_size=args.batch_size)
        print(f"example: outcomes: {r.accepted} accepted, {r.duplicate} duplicate in {r.batches} batches")

        rc = client.recompute(name, refit=True)
        print(
            f"example: recompute: snapshot {rc.snapshot_id}, refitted {rc.refitted}, "
            f"{rc.units} units, {rc.millis:.0f} ms"
        )

        board = client.scoreboard(name)

    a = board.attrs
    print()
    print(
        f"Cumulative scoreboard of {a['dataset']!r} (snapshot {a['snapshot_id']}, {a['units']} units); "
        f"ATE {a['ate']:.3f} (se {a['ate_se']:.3f}); front-runner {a['front_runner']}; best set {a['best_set']}"
    )
    if a["no_detectable_heterogeneity"]:
        print("No detectable heterogeneity: no model beats constant-effect significantly.")
    alerts = a["alerts"]
    if alerts["looks"] == 0:
        print("Alerts: not watching yet; they start with the units that arrive after the first fit.")
    else:
        print(
            f"Alerts: front-runner {alerts['front_runner'] or 'none yet'}"
            f"{' (settled)' if alerts['front_runner_settled'] else ''}, on {alerts['units']} units watched "
            f"over {alerts['looks']} recomputes; heterogeneity {alerts['heterogeneity']}"
        )
    shown = [
        "rank",
        "model",
        "baseline",
        "vs_constant_estimate",
        "vs_constant_se",
        "vs_constant_ci_low",
        "vs_constant_ci_high",
        "draw_share",
        "in_best_set",
        "corrected_pehe",
        "policy_gain",
        "policy_gain_se",
        "autoc",
    ]
    with pd.option_context("display.width", 250, "display.max_columns", None, "display.float_format", "{:.4f}".format):
        print(board[shown].to_string(index=False))
    print("corrected_pehe is a lower estimate of PEHE; compare models through vs_constant.")
    if a["caveat"]:
        print(f"caveat: {a['caveat']}")
    print()

    # ------------------------------------------------------------ checks
    if a["degenerate"]:
        fail(f"scoreboard is degenerate: {a['degenerate']}")
    expected = set(models) | set(pc.BASELINES)
    got = set(board["model"])
    if got != expected:
        fail(f"scoreboard ranks {sorted(got)}, expected {sorted(expected)}")
    if a["incomplete"]:
        fail(f"models left unranked for coverage: {a['incomplete']}")
    if a["units"] != len(units):
        fail(f"scoreboard covers {a['units']} units, sent {len(units)}")
    if sorted(board["rank"]) != list(range(1, len(expected) + 1)):
        fail(f"ranks are not 1..{len(expected)}: {sorted(board['rank'])}")
    if set(board.loc[board["baseline"], "model"]) != set(pc.BASELINES):
        fail("the baseline flags do not mark exactly zero-effect and constant-effect")
    if a["front_runner"] != board.iloc[0]["model"]:
        fail(f"front-runner {a['front_runner']!r} is not the rank-1 model {board.iloc[0]['model']!r}")
    numeric = board[["vs_constant_estimate", "vs_constant_se", "draw_share", "corrected_pehe", "policy_gain"]]
    if numeric.isna().any().any():
        fail("scoreboard holds NaN in a core column")
    print(f"example: OK: {len(got)} models ranked ({len(models)} registered + 2 baselines)")
    return 0


if __name__ == "__main__":
    try:
        sys.exit(main(sys.argv[1:]))
    except pc.PlumblineError as e:
        msg = str(e)
        if e.receipt is not None and e.receipt.rejections:
            msg += f"; first rejection: {e.receipt.rejections[0]}"
        fail(msg)
    except (OSError, ValueError, KeyError) as e:
        fail(f"{type(e).__name__}: {e}")
