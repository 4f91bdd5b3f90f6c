"""The client's frames and defaults, without a server: each call is given a
stand-in for its gRPC stub that answers with a message built here.

Run after ``generate.sh``: ``python3 -m unittest discover -s clients/python/tests``.
Set ``PLUMBLINE_BIN`` to a built ``plumbline`` binary to also hold the
client's ``history`` default to the command line's.
"""

import inspect
import math
import os
import re
import subprocess
import sys
import unittest
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import grpc  # noqa: E402
import pandas as pd  # noqa: E402

import plumbline_client as pc  # noqa: E402
from plumbline_client._pb import plumbline_pb2 as pb  # noqa: E402


class Answer:
    """A stub method that records its request and returns ``reply``."""

    def __init__(self, reply):
        self.reply = reply
        self.requests = []

    def __call__(self, request, timeout=None):
        self.requests.append(request)
        return self.reply


class Stub:
    def __init__(self, **methods):
        self.__dict__.update(methods)


def client() -> pc.Client:
    # A channel that is never used: every stub below is replaced.
    return pc.Client(grpc.insecure_channel("127.0.0.1:9"), timeout=1.0)


def spec(name: str, kind: int) -> "pb.DatasetSpec":
    return pb.DatasetSpec(name=name, feature_names=["x1", "x2", "x3"], outcome_kind=kind)


class Frames(unittest.TestCase):
    def test_list_datasets_is_a_frame(self):
        c = client()
        c.datasets = Stub(
            ListDatasets=Answer(
                pb.ListDatasetsResponse(
                    datasets=[
                        pb.Dataset(spec=spec("a", pb.OUTCOME_KIND_CONTINUOUS), units=10, outcomes=7,
                                   predictions=20, active_models=2, created_at_ms=1_700_000_000_000),
                        pb.Dataset(spec=spec("b", pb.OUTCOME_KIND_BINARY), units=3),
                    ]
                )
            )
        )
        df = c.list_datasets()
        self.assertIsInstance(df, pd.DataFrame)
        self.assertEqual(list(df.columns), pc.DATASET_COLUMNS)
        self.assertEqual(list(df["name"]), ["a", "b"])
        self.assertEqual(list(df["outcome_kind"]), ["continuous", "binary"])
        self.assertEqual(int(df.loc[0, "features"]), 3)
        self.assertEqual(int(df.loc[0, "outcomes"]), 7)
        self.assertEqual(df.loc[0, "created_at"], pd.Timestamp(1_700_000_000_000, unit="ms", tz="UTC"))

    def test_overlap_is_a_frame_with_the_summary_in_attrs(self):
        c = client()
        summary = pb.OverlapSummary(eps=0.05, extreme_share=0.3, treated_effective_share=0.87,
                                    control_effective_share=0.21, treated_max_weight=0.01,
                                    control_max_weight=0.2, imbalanced_features=["x2"], degraded=True)
        c.scoring = Stub(GetOverlap=Answer(pb.OverlapReport(summary=summary, json="{}")))
        df = c.overlap("a", window="recent")
        self.assertIsInstance(df, pd.DataFrame)
        self.assertEqual(list(df.columns), pc.OVERLAP_COLUMNS)
        self.assertEqual(list(df["arm"]), ["treated", "control"])
        self.assertAlmostEqual(df.loc[1, "effective_share"], 0.21)
        self.assertTrue(df.attrs["degraded"])
        self.assertEqual(df.attrs["imbalanced_features"], ["x2"])
        self.assertAlmostEqual(df.attrs["extreme_share"], 0.3)

    def test_overlap_of_a_contrast_names_its_two_arms(self):
        c = client()
        summary = pb.OverlapSummary(eps=0.05, treated_effective_share=0.6, control_effective_share=0.8)
        doc = ('{"treated": {}, "control": {}, "arm": "text", "reference_arm": "none", '
               '"generalized_propensity": [{"arm": "none", "extreme_share": 0.01}, '
               '{"arm": "text", "extreme_share": 0.12}]}')
        answer = Answer(pb.OverlapReport(summary=summary, json=doc))
        c.scoring = Stub(GetOverlap=answer)
        df = c.overlap("offers", arm="text")
        self.assertEqual(answer.requests[0].arm, "text")
        self.assertEqual(list(df["arm"]), ["text", "none"])
        self.assertAlmostEqual(df.loc[0, "effective_share"], 0.6)
        self.assertEqual([a["arm"] for a in df.attrs["generalized_propensity"]], ["none", "text"])
        self.assertAlmostEqual(df.attrs["generalized_propensity"][1]["extreme_share"], 0.12)

    def test_scoreboard_carries_the_joint_interval_chance_and_contrast(self):
        new = pb.ModelScore(
            name="m1", rank=1, chance_lowest=0.4, draw_share=0.6,
            vs_constant=pb.Difference(estimate=-0.5, se=0.1, ci_low=-0.7, ci_high=-0.3,
                                      joint_low=-0.8, joint_high=-0.2),
            top_minus_bottom=pb.Estimate(estimate=1.5, se=0.3),
            rmse_lower_bound=0.7,
        )
        old = pb.ModelScore(name="m0", rank=2,
                            vs_constant=pb.Difference(estimate=0.1, se=0.1, ci_low=-0.1, ci_high=0.3),
                            policy_vs_front_runner=pb.Difference(estimate=-0.03, se=0.01, ci_low=-0.05,
                                                                 ci_high=-0.01, joint_low=-0.06,
                                                                 joint_high=0.0))
        board = pb.Scoreboard(
            dataset="a", models=[new, old], front_runner="m1", joint_critical_value=2.4,
            front_runner_vs_constant=pb.AdjustedInterval(estimate=-0.5, ci_low=-0.9, ci_high=-0.1),
            plugin_error_projection=pb.Estimate(estimate=0.2, se=0.05),
            blend=pb.Blend(
                weights=[pb.BlendWeight(model="m1", weight=0.7), pb.BlendWeight(model="m0", weight=0.3)],
                corrected_pehe=0.1, best_model="m1", models_offered=2,
                vs_best=pb.Difference(estimate=-0.02, se=0.01, ci_low=-0.04, ci_high=0.0),
            ),
        )
        df = pc.scoreboard_frame(board)
        self.assertEqual(list(df.columns), pc.SCOREBOARD_COLUMNS)
        self.assertEqual(df.loc[0, "chance_lowest"], 0.4)
        self.assertEqual((df.loc[0, "vs_constant_joint_low"], df.loc[0, "vs_constant_joint_high"]), (-0.8, -0.2))
        self.assertEqual((df.loc[0, "top_minus_bottom"], df.loc[0, "top_minus_bottom_se"]), (1.5, 0.3))
        # A board from a server that predates them: NaN, not zero.
        self.assertTrue(math.isnan(df.loc[1, "chance_lowest"]))
        self.assertTrue(math.isnan(df.loc[1, "vs_constant_joint_low"]))
        self.assertTrue(math.isnan(df.loc[1, "top_minus_bottom"]))
        self.assertEqual(df.loc[0, "rmse_lower_bound"], 0.7)
        self.assertTrue(math.isnan(df.loc[1, "rmse_lower_bound"]))
        self.assertEqual(df.attrs["plugin_error_projection"], {"estimate": 0.2, "se": 0.05})
        blend = df.attrs["blend"]
        self.assertEqual(blend["weights"], {"m1": 0.7, "m0": 0.3})
        self.assertEqual((blend["best_model"], blend["models_offered"]), ("m1", 2))
        self.assertEqual((blend["vs_best"]["estimate"], blend["vs_best"]["ci_low"]), (-0.02, -0.04))
        self.assertEqual(df.attrs["front_runner"], "m1")
        self.assertEqual(df.attrs["front_runner_vs_constant"], {"estimate": -0.5, "ci_low": -0.9, "ci_high": -0.1})
        self.assertEqual(df.attrs["joint_critical_value"], 2.4)
        # The policy comparison with the front-runner: on the other rows,
        # NaN on the front-runner's own.
        self.assertEqual((df.loc[1, "policy_vs_front_runner"], df.loc[1, "policy_vs_front_runner_joint_low"]),
                         (-0.03, -0.06))
        self.assertTrue(math.isnan(df.loc[0, "policy_vs_front_runner"]))

    def test_a_comparison_carries_the_policy_difference_when_sent(self):
        c = client()
        both = pb.CompareModelsResponse(
            difference=pb.Difference(estimate=-0.2, se=0.1, ci_low=-0.4, ci_high=0.0, p_value=0.05),
            units=100,
            policy_difference=pb.Difference(estimate=0.04, se=0.01, ci_low=0.02, ci_high=0.06, p_value=0.001),
        )
        c.scoring = Stub(CompareModels=Answer(both))
        r = c.compare_models("a", "m1", "m0")
        self.assertEqual((r["estimate"], r["units"]), (-0.2, 100))
        self.assertEqual(r["policy"]["estimate"], 0.04)
        self.assertEqual(r["policy"]["ci_low"], 0.02)
        c.scoring = Stub(CompareModels=Answer(pb.CompareModelsResponse(difference=both.difference, units=100)))
        self.assertIsNone(c.compare_models("a", "m1", "m0")["policy"])


    def test_a_board_with_arms_is_one_frame_with_an_arm_column(self):
        def contrast(arm, first, second):
            return pb.Scoreboard(
                dataset="offers", arm=arm, reference_arm="none", front_runner=first,
                ate=pb.Estimate(estimate=1.0 if arm == "text" else 0.5, se=0.1),
                models=[
                    pb.ModelScore(name=second, rank=2, vs_constant=pb.Difference(estimate=0.2)),
                    pb.ModelScore(name=first, rank=1, vs_constant=pb.Difference(estimate=-0.4)),
                ],
            )

        board = pb.Scoreboard(
            dataset="offers", units=1200, reference_arm="none",
            contrasts=[contrast("text", "good", "flat"), contrast("mail", "flat", "good")],
        )
        df = pc.scoreboard_frame(board)
        self.assertEqual(list(df.columns), ["arm"] + pc.SCOREBOARD_COLUMNS)
        self.assertEqual(list(df["arm"]), ["text", "text", "mail", "mail"])
        # Ranked within each contrast.
        self.assertEqual(list(df["model"]), ["good", "flat", "flat", "good"])
        self.assertEqual(list(df["rank"]), [1, 2, 1, 2])
        self.assertEqual(df.attrs["arms"], ["none", "text", "mail"])
        self.assertEqual((df.attrs["reference_arm"], df.attrs["units"]), ("none", 1200))
        self.assertEqual(df.attrs["contrasts"]["mail"]["front_runner"], "flat")
        self.assertEqual(df.attrs["contrasts"]["text"]["ate"], 1.0)
        one = df[df.arm == "mail"]
        self.assertEqual(one.loc[one["rank"] == 1, "vs_constant_estimate"].item(), -0.4)

    def test_the_arm_policy_report_is_a_frame_with_shares_and_pairs(self):
        def iv(e):
            return pb.IntervalValue(estimate=e, se=0.1, ci_low=e - 0.2, ci_high=e + 0.2)

        report = pb.ArmPolicyReport(
            costs=[pb.ArmCost(arm="none"), pb.ArmCost(arm="text"), pb.ArmCost(arm="mail", cost=0.1)],
            reference_value=iv(1.0), best_single_arm="text", best_single_arm_value=iv(1.6), note="n",
            models=[
                pb.ArmPolicy(model="good", value=iv(2.0), vs_reference=iv(1.0), vs_best_single_arm=iv(0.4),
                             shares=[pb.ArmShare(arm="text", share=0.6), pb.ArmShare(arm="mail", share=0.3),
                                     pb.ArmShare(arm="none", share=0.1)]),
                pb.ArmPolicy(model="flat", value=iv(1.6), vs_reference=iv(0.6), vs_best_single_arm=iv(0.0),
                             shares=[pb.ArmShare(arm="text", share=1.0)]),
            ],
            pairwise=[pb.PolicyDifference(first="good", second="flat", difference=iv(0.4))],
        )
        board = pb.Scoreboard(dataset="offers", reference_arm="none", arm_policy=report)
        df = pc.arm_policy_frame(board)
        shares = ["share_none", "share_text", "share_mail"]
        self.assertEqual(list(df.columns), pc.ARM_POLICY_COLUMNS + shares)
        self.assertEqual(list(df["model"]), ["good", "flat"])
        self.assertAlmostEqual(df.loc[0, "vs_reference"], 1.0)
        self.assertAlmostEqual(df.loc[0, "vs_reference_ci_low"], 0.8)
        self.assertAlmostEqual(df.loc[1, "vs_best_single_arm_ci_high"], 0.2)
        self.assertEqual(list(df.loc[0, shares]), [0.1, 0.6, 0.3])
        # An arm a policy never gives has share 0, not NaN.
        self.assertEqual(list(df.loc[1, shares]), [0.0, 1.0, 0.0])
        self.assertEqual(df.attrs["best_single_arm"], "text")
        self.assertEqual(df.attrs["costs"], {"none": 0.0, "text": 0.0, "mail": 0.1})
        self.assertAlmostEqual(df.attrs["reference_value"]["ci_high"], 1.2)
        pairs = pc.policy_pairwise_frame(df)
        self.assertEqual(list(pairs.columns), pc.POLICY_PAIRWISE_COLUMNS)
        self.assertEqual((pairs.loc[0, "first"], pairs.loc[0, "second"]), ("good", "flat"))
        self.assertAlmostEqual(pairs.loc[0, "estimate"], 0.4)
        with self.assertRaisesRegex(ValueError, "has no arms"):
            pc.arm_policy_frame(pb.Scoreboard(dataset="plain"))


class Arms(unittest.TestCase):
    """What the arm arguments put on the wire."""

    def test_create_dataset_sends_arms_and_costs_and_checks_the_cost_names(self):
        c = client()
        ans = Answer(pb.Dataset())
        c.datasets = Stub(CreateDataset=ans)
        c.create_dataset("offers", ["x1"], arms=["none", "text", "mail"], arm_costs={"mail": 0.1})
        spec = ans.requests[0].spec
        self.assertEqual(list(spec.arms), ["none", "text", "mail"])
        self.assertEqual([(a.arm, a.cost) for a in spec.arm_costs], [("mail", 0.1)])
        with self.assertRaisesRegex(ValueError, "arm_costs: 'post' is not one of the arms"):
            c.create_dataset("offers", ["x1"], arms=["none", "text"], arm_costs={"post": 1.0})

    def test_units_carry_their_arm_and_a_missing_label_names_its_row(self):
        c = client()
        ans = Answer(pb.IntakeReceipt(batches=1, accepted=2))
        c.intake = Stub(SendUnits=lambda batches, timeout=None: ans(list(batches)))
        df = pd.DataFrame({"unit_id": [1, 2], "x1": [0.1, 0.2], "arm": ["text", "none"], "p": [0.3, 0.5]})
        c.send_units("offers", df, features=["x1"], arm="arm", propensity="p")
        rows = ans.requests[0][0].rows
        self.assertEqual([(r.key, r.arm, r.treatment, r.propensity) for r in rows],
                         [("1", "text", 0, 0.3), ("2", "none", 0, 0.5)])
        bad = df.assign(arm=["text", None])
        with self.assertRaisesRegex(ValueError, r"row 1: arm \(the arm\) is missing"):
            c.send_units("offers", bad, features=["x1"], arm="arm")

    def test_predictions_and_comparisons_name_their_arm(self):
        c = client()
        ans = Answer(pb.IntakeReceipt(batches=1, accepted=2))
        c.intake = Stub(SendPredictions=lambda batches, timeout=None: ans(list(batches)))
        c.send_predictions("offers", pd.DataFrame({"unit_id": [1, 2], "good": [0.5, 0.7]}), arm="mail")
        rows = ans.requests[0][0].rows
        self.assertEqual([(r.model, r.unit_key, r.arm) for r in rows], [("good", "1", "mail"), ("good", "2", "mail")])
        cmp = Answer(pb.CompareModelsResponse(difference=pb.Difference(estimate=-0.1), units=10))
        c.scoring = Stub(CompareModels=cmp)
        c.compare_models("offers", "good", "flat", arm="text")
        self.assertEqual(cmp.requests[0].arm, "text")


class Defaults(unittest.TestCase):
    def test_history_asks_for_what_the_command_line_asks_for(self):
        default = inspect.signature(pc.Client.history).parameters["estimator"].default
        self.assertEqual(default, "vs_constant")
        c = client()
        c.scoring = Stub(GetHistory=Answer(pb.GetHistoryResponse()))
        c.history("a", "m1")
        self.assertEqual(c.scoring.GetHistory.requests[0].estimator, default)
        binary = os.environ.get("PLUMBLINE_BIN")
        if binary:
            help_text = subprocess.run([binary, "history", "--help"], capture_output=True, text=True,
                                       check=True).stdout
            # clap wraps long help, so "[default:" and its value may sit on two lines.
            cli = re.search(r"--estimator <ESTIMATOR>.*?\[default:\s+(\w+)\]", help_text, re.S)
            self.assertIsNotNone(cli, help_text)
            self.assertEqual(cli.group(1), default)


if __name__ == "__main__":
    unittest.main()
