"""A small Python client for the plumbline gRPC service.

plumbline scores deployed treatment-effect (uplift, CATE) models against the
factual outcomes that arrive after their predictions. This module wraps the
``plumbline.v1`` API (``proto/plumbline/v1/plumbline.proto``) for use from
pandas:

>>> import pandas as pd
>>> import plumbline_client as pc
>>> client = pc.connect("127.0.0.1:7070")
>>> client.create_dataset("checkout-nudge", ["x1", "x2"], outcome_kind="continuous")
>>> client.register_model("checkout-nudge", "forest-v3")
>>> client.send_units("checkout-nudge", units_df)            # unit_id, treatment, x1, x2
>>> client.send_predictions("checkout-nudge", predictions_df)  # unit_id, forest-v3
>>> client.send_outcomes("checkout-nudge", outcomes_df)        # unit_id, outcome
>>> client.recompute("checkout-nudge", refit=True)
>>> client.scoreboard("checkout-nudge")                        # a pandas DataFrame

Order matters: the service refuses a prediction for a unit whose outcome it
already holds (the prediction could have seen the outcome), so send units,
then predictions, then outcomes.

Every intake call streams its rows in batches (1,000 rows each by default;
the service accepts at most 10,000). Each batch is one transaction on the
server; re-sending identical rows is a no-op counted as a duplicate, so a
failed call can simply be retried. Failures raise :class:`PlumblineError`,
which carries the gRPC status code and, for refused intake batches, the
:class:`Receipt` of what the stream committed before the refused batch and
the row-level reasons.

The gRPC stubs are generated, not committed: run ``generate.sh`` (or
``pip install`` this directory) first.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from typing import Any, Callable, Dict, Iterable, Iterator, List, Mapping, Optional, Sequence

import grpc
import pandas as pd

try:
    from plumbline_client._pb import plumbline_pb2 as pb
    from plumbline_client._pb import plumbline_pb2_grpc as pb_grpc
except ImportError as _e:  # pragma: no cover - depends on the install step
    raise ImportError(
        "plumbline_client: the gRPC stubs are missing; run clients/python/generate.sh "
        "(or `pip install clients/python`) first"
    ) from _e

__all__ = [
    "BASELINES",
    "Client",
    "PlumblineError",
    "Receipt",
    "RecomputeResult",
    "Rejection",
    "arm_policy_frame",
    "connect",
    "policy_pairwise_frame",
    "scoreboard_frame",
    "pb",
]

#: Names of the two built-in baselines every scoreboard ranks.
BASELINES = ("zero-effect", "constant-effect")

#: Default rows per intake batch.
DEFAULT_BATCH = 1000

#: The service refuses batches above this size.
MAX_BATCH = 10_000

_OUTCOME_KINDS = {
    "continuous": pb.OUTCOME_KIND_CONTINUOUS,
    "binary": pb.OUTCOME_KIND_BINARY,
}

_WINDOW_KINDS = {
    "cumulative": pb.Window.KIND_CUMULATIVE,
    "recent": pb.Window.KIND_RECENT,
    "cohort": pb.Window.KIND_COHORT,
}

#: Columns of :meth:`Client.scoreboard`, in order, around the estimators'
#: columns: those come from the server's list, two per estimator
#: (``<key>`` and ``<key>_se``), after ``in_best_set``.
SCOREBOARD_COLUMNS = [
    "rank",
    "model",
    "baseline",
    "vs_constant_estimate",
    "vs_constant_se",
    "vs_constant_ci_low",
    "vs_constant_ci_high",
    "vs_constant_p_value",
    "vs_constant_joint_low",
    "vs_constant_joint_high",
    "chance_lowest",
    "draw_share",
    "in_best_set",
    "policy_gain",
    "policy_gain_se",
    "treated_share",
    "policy_vs_front_runner",
    "policy_vs_front_runner_se",
    "policy_vs_front_runner_joint_low",
    "policy_vs_front_runner_joint_high",
    "autoc",
    "autoc_se",
    "qini",
    "qini_se",
    "blp_slope",
    "top_minus_bottom",
    "top_minus_bottom_se",
    "rmse_lower_bound",
]

#: Columns of :meth:`Client.arm_policy`, around one ``share_<arm>`` column
#: per arm (reference first), which come after ``vs_best_single_arm_ci_high``.
ARM_POLICY_COLUMNS = [
    "model",
    "value",
    "value_se",
    "value_ci_low",
    "value_ci_high",
    "vs_reference",
    "vs_reference_se",
    "vs_reference_ci_low",
    "vs_reference_ci_high",
    "vs_best_single_arm",
    "vs_best_single_arm_se",
    "vs_best_single_arm_ci_low",
    "vs_best_single_arm_ci_high",
]

#: Columns of :meth:`Client.arm_policy_pairwise`.
POLICY_PAIRWISE_COLUMNS = ["first", "second", "estimate", "se", "ci_low", "ci_high"]

#: Columns of :meth:`Client.list_datasets`.
DATASET_COLUMNS = [
    "name",
    "outcome_kind",
    "features",
    "units",
    "outcomes",
    "predictions",
    "active_models",
    "created_at",
]

#: Columns of :meth:`Client.overlap`: one row per arm.
OVERLAP_COLUMNS = ["arm", "effective_share", "max_weight"]


# --------------------------------------------------------------------- results


@dataclass
class Rejection:
    """Why one row of a refused batch was refused."""

    batch: int
    row: int
    field: str
    reason: str


@dataclass
class Receipt:
    """What an intake stream did (``IntakeReceipt`` in the proto).

    On success every batch was committed. Attached to a :class:`PlumblineError`
    it describes a refused stream: ``batches`` before the refused one were
    committed, the refused batch wrote nothing, later batches were not read.
    """

    batches: int = 0
    accepted: int = 0
    duplicate: int = 0
    rejected: int = 0
    rejections: List[Rejection] = field(default_factory=list)

    @classmethod
    def from_pb(cls, r: "pb.IntakeReceipt") -> "Receipt":
        return cls(
            batches=r.batches,
            accepted=r.accepted,
            duplicate=r.duplicate,
            rejected=r.rejected,
            rejections=[Rejection(x.batch, x.row, x.field, x.reason) for x in r.rejections],
        )


@dataclass
class RecomputeResult:
    """What a recompute did."""

    snapshot_id: int
    refitted: bool
    units: int
    millis: float


class PlumblineError(Exception):
    """A failed call.

    Attributes:
        rpc: the method that failed, e.g. ``"Intake.SendUnits"``.
        code: the :class:`grpc.StatusCode` (``INVALID_ARGUMENT``,
            ``ALREADY_EXISTS``, ``NOT_FOUND``, ``FAILED_PRECONDITION``, ...).
        message: the server's message (it names batch, row and field for a
            refused intake batch).
        receipt: for a refused intake stream, what was committed before it and
            the row-level reasons; otherwise ``None``.
    """

    def __init__(
        self,
        rpc: str,
        code: Optional[grpc.StatusCode],
        message: str,
        receipt: Optional[Receipt] = None,
    ):
        self.rpc = rpc
        self.code = code
        self.message = message
        self.receipt = receipt
        name = code.name if code is not None else "ERROR"
        super().__init__(f"{rpc}: {name}: {message}")

    @classmethod
    def from_rpc_error(cls, rpc: str, e: grpc.RpcError) -> "PlumblineError":
        code = e.code() if hasattr(e, "code") else None
        message = e.details() if hasattr(e, "details") else str(e)
        receipt = None
        # The service puts an encoded IntakeReceipt in the status details of a
        # refused intake batch (the `grpc-status-details-bin` trailer).
        trailers = e.trailing_metadata() if hasattr(e, "trailing_metadata") else None
        for key, value in trailers or ():
            if key == "grpc-status-details-bin" and isinstance(value, bytes):
                try:
                    receipt = Receipt.from_pb(pb.IntakeReceipt.FromString(value))
                except Exception:  # not a receipt: leave it out
                    receipt = None
        return cls(rpc, code, message or "", receipt)


# ---------------------------------------------------------------------- helpers


def _window(window: str = "cumulative", cohort: Optional[str] = None) -> "pb.Window":
    """Builds a Window from ``"cumulative"``, ``"recent"`` or ``"cohort"``.

    Passing ``cohort`` alone selects that cohort's window.
    """
    if cohort is not None:
        window = "cohort"
    try:
        kind = _WINDOW_KINDS[window]
    except KeyError:
        raise ValueError(f"window must be one of {sorted(_WINDOW_KINDS)}, not {window!r}") from None
    if kind == pb.Window.KIND_COHORT and not cohort:
        raise ValueError("a cohort window needs cohort=...")
    return pb.Window(kind=kind, cohort=cohort or "")


def _require(df: pd.DataFrame, columns: Iterable[str], what: str) -> None:
    missing = [c for c in columns if c not in df.columns]
    if missing:
        raise ValueError(f"{what}: missing column(s) {missing}; have {list(df.columns)}")


def _millis(series: pd.Series) -> List[int]:
    """Unix milliseconds from a datetime column or a numeric one (already ms).

    Timezone-naive datetimes are taken as UTC. Missing values become 0, which
    the service reads as "unknown".
    """
    if pd.api.types.is_datetime64_any_dtype(series):
        s = series
        if getattr(s.dt, "tz", None) is None:
            s = s.dt.tz_localize("UTC")
        ms = (s - pd.Timestamp(0, tz="UTC")) // pd.Timedelta(milliseconds=1)
        return [0 if pd.isna(v) else int(v) for v in ms]
    return [0 if pd.isna(v) else int(v) for v in series]


def _chunks(n: int, size: int) -> Iterator[range]:
    for start in range(0, n, size):
        yield range(start, min(start + size, n))


def _check_batch(batch_size: int) -> None:
    if not 1 <= batch_size <= MAX_BATCH:
        raise ValueError(f"batch_size must be in 1..{MAX_BATCH}, not {batch_size}")


def _treatment(t: Any, i: int) -> int:
    """0 or 1 from an int, bool or float cell; anything else is refused here
    (the proto field is unsigned, so 0.5 or -1 could not even be sent)."""
    try:
        f = float(t)
    except (TypeError, ValueError):
        f = float("nan")
    if f not in (0.0, 1.0):
        raise ValueError(f"send_units: row {i}: treatment must be 0 or 1, not {t!r}")
    return int(f)


# ----------------------------------------------------------------------- client


class Client:
    """A connection to one plumbline server; create it with :func:`connect`.

    Unary calls use ``timeout`` seconds as their deadline. Streams and
    recomputes have no deadline by default (a full refit on a large dataset
    may take minutes); pass ``timeout=`` to those methods to set one.
    """

    def __init__(self, channel: grpc.Channel, timeout: Optional[float] = 30.0):
        self.channel = channel
        self.timeout = timeout
        self.datasets = pb_grpc.DatasetRegistryStub(channel)
        self.models = pb_grpc.ModelRegistryStub(channel)
        self.intake = pb_grpc.IntakeStub(channel)
        self.scoring = pb_grpc.ScoringStub(channel)
        self.events = pb_grpc.EventFeedStub(channel)

    # -- plumbing

    def close(self) -> None:
        """Closes the channel."""
        self.channel.close()

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def _call(self, rpc: str, fn: Callable[..., Any], request: Any, timeout: Any = "default") -> Any:
        if timeout == "default":
            timeout = self.timeout
        try:
            return fn(request, timeout=timeout)
        except grpc.RpcError as e:
            raise PlumblineError.from_rpc_error(rpc, e) from None

    # -- datasets

    def create_dataset(
        self,
        name: str,
        feature_names: Sequence[str],
        outcome_kind: str = "continuous",
        *,
        treatment_cost: float = 0.0,
        folds: int = 0,
        eps: float = 0.0,
        max_extreme_share: float = 0.0,
        min_effective_share: float = 0.0,
        recent_last_outcomes: int = 0,
        recent_last_days: int = 0,
        recompute_every_outcomes: int = 0,
        recompute_every_seconds: int = 0,
        refit_growth: float = 0.0,
        refit_every_seconds: int = 0,
        min_coverage: float = 0.0,
        alpha: float = 0.0,
        seed: int = 0,
        arms: Optional[Sequence[str]] = None,
        arm_costs: Optional[Mapping[str, float]] = None,
    ) -> "pb.Dataset":
        """Creates a dataset (``DatasetRegistry.CreateDataset``).

        ``outcome_kind`` is ``"continuous"`` or ``"binary"``. Every other
        setting keeps the server's default when left at zero (5 folds,
        overlap eps 0.05, recent window of the last 5,000 outcomes, recompute
        every 1,000 outcomes or 60 s, refit at 50% growth, coverage 0.95,
        alpha 0.05, seed 0). Re-sending identical settings returns the
        existing dataset; other settings under the same name raise
        ``ALREADY_EXISTS``.

        ``arms`` declares a dataset with more than two arms: the reference
        arm first, then 2 to 15 others (every arm's effect is scored against
        the reference). ``arm_costs`` maps an arm to the cost of giving it to
        one unit, in outcome units (arms not named cost 0); with arms,
        ``treatment_cost`` must stay 0. Units then carry an arm label
        (``send_units(..., arm="arm")``) and predictions name the arm whose
        effect they predict (``send_predictions(..., arm="text")``).
        """
        try:
            kind = _OUTCOME_KINDS[outcome_kind]
        except KeyError:
            raise ValueError(f"outcome_kind must be 'continuous' or 'binary', not {outcome_kind!r}") from None
        arm_list = [str(a) for a in arms] if arms is not None else []
        costs = []
        for arm, cost in (arm_costs or {}).items():
            if str(arm) not in arm_list:
                raise ValueError(f"create_dataset: arm_costs: {arm!r} is not one of the arms {arm_list}")
            c = float(cost)
            if not math.isfinite(c):
                raise ValueError(f"create_dataset: arm_costs: the cost of {arm!r} must be finite, not {cost!r}")
            costs.append(pb.ArmCost(arm=str(arm), cost=c))
        spec = pb.DatasetSpec(
            name=name,
            feature_names=list(feature_names),
            outcome_kind=kind,
            treatment_cost=treatment_cost,
            folds=folds,
            overlap=pb.OverlapThresholds(
                eps=eps,
                max_extreme_share=max_extreme_share,
                min_effective_share=min_effective_share,
            ),
            recent=pb.RecentWindow(last_outcomes=recent_last_outcomes, last_days=recent_last_days),
            recompute=pb.RecomputePolicy(
                every_outcomes=recompute_every_outcomes,
                every_seconds=recompute_every_seconds,
                refit_growth=refit_growth,
                refit_every_seconds=refit_every_seconds,
            ),
            min_coverage=min_coverage,
            alpha=alpha,
            seed=seed,
            arms=arm_list,
            arm_costs=costs,
        )
        return self._call(
            "DatasetRegistry.CreateDataset",
            self.datasets.CreateDataset,
            pb.CreateDatasetRequest(spec=spec),
        )

    def get_dataset(self, name: str) -> "pb.Dataset":
        """Returns one dataset with its counts; ``NOT_FOUND`` if unknown."""
        return self._call("DatasetRegistry.GetDataset", self.datasets.GetDataset, pb.GetDatasetRequest(name=name))

    def dataset_messages(self) -> List["pb.Dataset"]:
        """Every dataset as the raw protobuf messages (with the full spec)."""
        return list(
            self._call(
                "DatasetRegistry.ListDatasets", self.datasets.ListDatasets, pb.ListDatasetsRequest()
            ).datasets
        )

    def list_datasets(self) -> pd.DataFrame:
        """Every dataset as a DataFrame, one row each (``DATASET_COLUMNS``):
        name, outcome_kind (``continuous`` or ``binary``), features (count),
        units, outcomes, predictions, active_models, created_at (UTC). The
        full specs are in :meth:`dataset_messages`."""
        return datasets_frame(self.dataset_messages())

    # -- models

    def register_model(self, dataset: str, name: str, version: str = "", description: str = "") -> "pb.Model":
        """Registers a model; an identical re-send is a no-op.

        The names ``zero-effect`` and ``constant-effect`` are reserved for the
        baselines.
        """
        return self._call(
            "ModelRegistry.RegisterModel",
            self.models.RegisterModel,
            pb.RegisterModelRequest(dataset=dataset, name=name, version=version, description=description),
        )

    def register_blend(
        self,
        dataset: str,
        name: str,
        version: str = "",
        description: str = "",
        window: str = "cumulative",
        cohort: Optional[str] = None,
    ) -> "pb.Model":
        """Registers the blend of a window's latest scoreboard as a model.

        The server computes its predictions: for each unit every member has
        predicted, the weighted sum of the members' predictions, with the
        weights frozen now (``Model.blend`` holds them and the snapshot they
        came from). It is ranked from the next recompute, where its error is
        in-sample for its weights (``registered_blend`` marks the row); the
        scoreboard's blend line stays the honest figure.
        """
        return self._call(
            "ModelRegistry.RegisterBlend",
            self.models.RegisterBlend,
            pb.RegisterBlendRequest(
                dataset=dataset,
                name=name,
                version=version,
                description=description,
                window=_window(window, cohort),
            ),
        )

    def list_models(self, dataset: str, include_retired: bool = False) -> List["pb.Model"]:
        """Returns a dataset's models, by registration time."""
        return list(
            self._call(
                "ModelRegistry.ListModels",
                self.models.ListModels,
                pb.ListModelsRequest(dataset=dataset, include_retired=include_retired),
            ).models
        )

    def retire_model(self, dataset: str, name: str) -> "pb.Model":
        """Retires a model: it stops being ranked; its data is kept."""
        return self._call(
            "ModelRegistry.RetireModel",
            self.models.RetireModel,
            pb.RetireModelRequest(dataset=dataset, name=name),
        )

    # -- intake

    def _stream(self, rpc: str, fn: Callable[..., Any], batches: Iterator[Any], timeout: Optional[float]) -> Receipt:
        # gRPC turns an exception raised while iterating the requests into a
        # bare UNKNOWN status; keep the original and raise that instead. (The
        # batches sent before it stay committed: each is its own transaction.)
        raised: List[BaseException] = []

        def guarded() -> Iterator[Any]:
            try:
                yield from batches
            except Exception as e:
                raised.append(e)
                raise

        try:
            reply = fn(guarded(), timeout=timeout)
        except grpc.RpcError as e:
            if raised:
                raise raised[0] from None
            raise PlumblineError.from_rpc_error(rpc, e) from None
        return Receipt.from_pb(reply)

    def send_units(
        self,
        dataset: str,
        df: pd.DataFrame,
        *,
        key: str = "unit_id",
        treatment: str = "treatment",
        features: Optional[Sequence[str]] = None,
        propensity: Optional[str] = None,
        cohort: Optional[str] = None,
        assigned_at: Optional[str] = None,
        arm: Optional[str] = None,
        batch_size: int = DEFAULT_BATCH,
        timeout: Optional[float] = None,
    ) -> Receipt:
        """Streams units from a DataFrame (``Intake.SendUnits``).

        Args:
            df: one row per unit.
            key: column of unit keys (converted to str).
            treatment: column of treatments, 0 or 1.
            features: feature columns, in the dataset's order; by default the
                dataset's own feature names, looked up with ``GetDataset``.
            propensity: optional column of logged assignment probabilities in
                (0, 1); a missing value (NaN) means "unknown" for that unit.
            cohort: optional column of cohort labels (for per-cohort scoreboards).
            assigned_at: optional column of assignment times: datetimes
                (naive ones are taken as UTC), or integers already in Unix
                milliseconds.
            arm: on a dataset with arms, the column of arm labels (each one
                of the dataset's arms); ``treatment`` is then not read, and
                ``propensity`` is the logged probability of the unit's arm.
            batch_size: rows per batch (one server transaction each).
        """
        _check_batch(batch_size)
        if features is None:
            features = list(self.get_dataset(dataset).spec.feature_names)
        cols = [key, *features] + ([treatment] if arm is None else [arm])
        cols += [c for c in (propensity, cohort, assigned_at) if c is not None]
        _require(df, cols, "send_units")
        keys = df[key].astype(str).tolist()
        if arm is None:
            treat = [_treatment(t, i) for i, t in enumerate(df[treatment].tolist())]
            arms = None
        else:
            treat = [0] * len(keys)
            arms = [_arm_label(a, i, arm) for i, a in enumerate(df[arm].tolist())]
        feats = df[list(features)].to_numpy(dtype=float).tolist()
        props = df[propensity].astype(float).tolist() if propensity else None
        cohorts = df[cohort].astype(str).tolist() if cohort else None
        times = _millis(df[assigned_at]) if assigned_at else None

        def batches() -> Iterator["pb.UnitBatch"]:
            for idx in _chunks(len(keys), batch_size):
                rows = []
                for i in idx:
                    row = pb.UnitRow(key=keys[i], features=feats[i], treatment=treat[i])
                    if props is not None and not math.isnan(props[i]):
                        row.propensity = float(props[i])
                    if cohorts is not None:
                        row.cohort = cohorts[i]
                    if times is not None:
                        row.assigned_at_ms = times[i]
                    if arms is not None:
                        row.arm = arms[i]
                    rows.append(row)
                yield pb.UnitBatch(dataset=dataset, rows=rows)

        return self._stream("Intake.SendUnits", self.intake.SendUnits, batches(), timeout)

    def send_outcomes(
        self,
        dataset: str,
        df: pd.DataFrame,
        *,
        key: str = "unit_id",
        value: str = "outcome",
        observed_at: Optional[str] = None,
        batch_size: int = DEFAULT_BATCH,
        timeout: Optional[float] = None,
    ) -> Receipt:
        """Streams factual outcomes of units already sent (``Intake.SendOutcomes``).

        ``observed_at`` optionally names a column of observation times
        (datetimes, or Unix milliseconds).
        """
        _check_batch(batch_size)
        cols = [key, value] + ([observed_at] if observed_at else [])
        _require(df, cols, "send_outcomes")
        keys = df[key].astype(str).tolist()
        values = df[value].astype(float).tolist()
        times = _millis(df[observed_at]) if observed_at else None

        def batches() -> Iterator["pb.OutcomeBatch"]:
            for idx in _chunks(len(keys), batch_size):
                yield pb.OutcomeBatch(
                    dataset=dataset,
                    rows=[
                        pb.OutcomeRow(
                            unit_key=keys[i],
                            value=values[i],
                            observed_at_ms=times[i] if times is not None else 0,
                        )
                        for i in idx
                    ],
                )

        return self._stream("Intake.SendOutcomes", self.intake.SendOutcomes, batches(), timeout)

    def send_predictions(
        self,
        dataset: str,
        df: pd.DataFrame,
        *,
        key: str = "unit_id",
        models: Optional[Sequence[str]] = None,
        model_column: Optional[str] = None,
        effect_column: str = "effect",
        predicted_at: Optional[str] = None,
        arm: str = "",
        batch_size: int = DEFAULT_BATCH,
        timeout: Optional[float] = None,
    ) -> Receipt:
        """Streams predicted effects (``Intake.SendPredictions``).

        Two layouts are accepted:

        * wide (default): ``key`` plus one column per model holding that
          model's predicted effect; ``models`` selects the columns (default:
          every column except ``key`` and ``predicted_at``). A missing cell
          (NaN) means the model made no prediction for that unit and is not
          sent.
        * long: pass ``model_column`` (e.g. ``"model"``); each row is one
          prediction with its effect in ``effect_column``.

        ``batch_size`` counts prediction rows (unit-model pairs). Send
        predictions before the outcomes of their units: the service refuses a
        prediction for a unit whose outcome it holds, unless both are stamped
        and the prediction is earlier.

        On a dataset with arms, ``arm`` names the arm whose effect against
        the reference arm every row of this call predicts; send one call per
        arm (each model needs a prediction for every non-reference arm).
        """
        _check_batch(batch_size)
        arm = str(arm)
        if model_column is not None:
            cols = [key, model_column, effect_column] + ([predicted_at] if predicted_at else [])
            _require(df, cols, "send_predictions")
            triples = list(
                zip(
                    df[model_column].astype(str).tolist(),
                    df[key].astype(str).tolist(),
                    df[effect_column].astype(float).tolist(),
                )
            )
            times = _millis(df[predicted_at]) if predicted_at else [0] * len(triples)
            flat = [(m, k, e, t) for (m, k, e), t in zip(triples, times)]
        else:
            if models is None:
                models = [c for c in df.columns if c not in (key, predicted_at)]
            _require(df, [key, *models] + ([predicted_at] if predicted_at else []), "send_predictions")
            keys = df[key].astype(str).tolist()
            times = _millis(df[predicted_at]) if predicted_at else [0] * len(keys)
            flat = []
            for m in models:
                for k, e, t in zip(keys, df[m].astype(float).tolist(), times):
                    if not math.isnan(e):
                        flat.append((str(m), k, e, t))

        def batches() -> Iterator["pb.PredictionBatch"]:
            for idx in _chunks(len(flat), batch_size):
                yield pb.PredictionBatch(
                    dataset=dataset,
                    rows=[
                        pb.PredictionRow(
                            model=flat[i][0],
                            unit_key=flat[i][1],
                            effect=flat[i][2],
                            predicted_at_ms=flat[i][3],
                            arm=arm,
                        )
                        for i in idx
                    ],
                )

        return self._stream("Intake.SendPredictions", self.intake.SendPredictions, batches(), timeout)

    # -- scoring

    def recompute(self, dataset: str, refit: bool = False, timeout: Optional[float] = None) -> RecomputeResult:
        """Recomputes now, synchronously, and stores a snapshot.

        ``refit=True`` refits the cross-fitted nuisance models from scratch
        instead of scoring new units with the current fits. Raises
        ``FAILED_PRECONDITION`` when the dataset has no outcomes yet.
        """
        r = self._call(
            "Scoring.Recompute",
            self.scoring.Recompute,
            pb.RecomputeRequest(dataset=dataset, refit=refit),
            timeout=timeout,
        )
        return RecomputeResult(snapshot_id=r.snapshot_id, refitted=r.refitted, units=r.units, millis=r.millis)

    def scoreboard_message(
        self, dataset: str, window: str = "cumulative", cohort: Optional[str] = None
    ) -> "pb.Scoreboard":
        """The latest scoreboard of a window as the raw protobuf message."""
        return self._call(
            "Scoring.GetScoreboard",
            self.scoring.GetScoreboard,
            pb.GetScoreboardRequest(dataset=dataset, window=_window(window, cohort)),
        )

    def scoreboard(self, dataset: str, window: str = "cumulative", cohort: Optional[str] = None) -> pd.DataFrame:
        """The latest scoreboard of a window as a DataFrame, one row per ranked model.

        On a dataset with arms there is one board per contrast (each
        non-reference arm against the reference); they come as one long
        frame with a first column ``arm`` (the contrast's arm, in the arms'
        order, then by rank within it), so ``df[df.arm == "text"]`` or
        ``df.groupby("arm")`` gives one board. ``df.attrs`` then holds the
        dataset-wide values (dataset, window, snapshot_id, units,
        ``reference_arm``, ``arms``) and ``contrasts``: arm -> that board's
        attrs as below (front_runner, ate, blend, ...). The arm policy
        report is :meth:`arm_policy`.

        ``window`` is ``"cumulative"`` (default), ``"recent"``, or pass
        ``cohort="LABEL"`` for one cohort. Columns (see
        ``SCOREBOARD_COLUMNS``), by rank:

        * ``rank`` (1 = lowest corrected PEHE), ``model``, ``baseline`` (True
          for zero-effect and constant-effect);
        * ``vs_constant_estimate``, ``_se``, ``_ci_low``, ``_ci_high``,
          ``_p_value``: corrected PEHE minus that of constant-effect, with its
          95% interval; below 0 means lower error than treating everyone
          alike (the p-value is one-sided for "no lower error");
        * ``draw_share``, ``in_best_set``;
        * two columns per error estimator the server scores with, in its
          order: ``<key>`` and ``<key>_se`` (``corrected_pehe``,
          ``plugin_pehe``, ``dr_loss``, ``r_loss``, ``ipw_loss`` today). The
          first, ``corrected_pehe``, is a *lower estimate* of the PEHE (its
          mean sits below the true PEHE by the plug-in model's own error, so
          it can be negative); read it through the differences above, not on
          its own;
        * ``policy_gain`` and ``policy_gain_se`` (value per unit of treating
          whoever the model predicts an effect above the cost),
          ``treated_share``;
        * ``policy_vs_front_runner``, ``_se``, ``_joint_low``,
          ``_joint_high``: the model's policy gain minus the front-runner's
          (above 0 = its targeting is worth more), with an interval that
          holds over all the board's comparisons with the front-runner
          (Bonferroni); NaN on the front-runner's row and from a server that
          predates it;
        * ``autoc``, ``autoc_se``, ``qini``, ``qini_se``, ``blp_slope`` (NaN
          when the predictions do not vary);
        * ``rmse_lower_bound``: a one-sided 95% lower confidence bound on the
          model's RMSE that holds whatever the nuisance models' quality (0
          says nothing; NaN from a server that predates it).

        The scoreboard's own fields travel in ``df.attrs``: ``dataset``,
        ``window``, ``snapshot_id``, ``computed_at_ms``, ``units``, ``ate``
        and ``ate_se``, ``front_runner``, ``best_set``,
        ``no_detectable_heterogeneity``, ``plugin_error_projection`` (what
        the RMSE bounds add to the corrected PEHE, ``estimate`` and ``se``),
        ``blend`` (the cross-fitted blend of the leading models: its nonzero
        ``weights``, ``corrected_pehe``, ``vs_best`` with its interval; None
        with fewer than two ranked models),
        ``incomplete`` (model -> coverage),
        ``overlap_degraded``, ``degenerate``, ``caveat``, ``json`` (the
        full document) and ``alerts`` (the alerts' view: their front-runner,
        ``front_runner_settled``, ``heterogeneity``, ``overlap_degraded``,
        ``looks``, ``units`` and ``drift``, feature -> standardized
        difference). Raises ``FAILED_PRECONDITION`` before the first
        recompute.
        """
        return scoreboard_frame(self.scoreboard_message(dataset, window, cohort))

    def history(
        self,
        dataset: str,
        model: str,
        estimator: str = "vs_constant",
        window: str = "cumulative",
        cohort: Optional[str] = None,
        from_ms: int = 0,
        to_ms: int = 0,
    ) -> pd.DataFrame:
        """One model's value of one estimator over time, oldest first.

        Estimators: vs_constant (the default, as for ``plumbline history``:
        corrected PEHE minus constant-effect's), corrected_pehe, plugin_pehe,
        dr_loss, r_loss, ipw_loss, policy_gain, autoc, qini. Columns: snapshot_id, computed_at
        (UTC datetime), estimate, se, rank, units.
        """
        r = self._call(
            "Scoring.GetHistory",
            self.scoring.GetHistory,
            pb.GetHistoryRequest(
                dataset=dataset,
                model=model,
                estimator=estimator,
                window=_window(window, cohort),
                from_ms=from_ms,
                to_ms=to_ms,
            ),
        )
        df = pd.DataFrame(
            [
                {
                    "snapshot_id": p.snapshot_id,
                    "computed_at": pd.to_datetime(p.computed_at_ms, unit="ms", utc=True),
                    "estimate": p.value.estimate,
                    "se": p.value.se,
                    "rank": p.rank,
                    "units": p.units,
                }
                for p in r.points
            ],
            columns=["snapshot_id", "computed_at", "estimate", "se", "rank", "units"],
        )
        return df

    def arm_policy(self, dataset: str, window: str = "cumulative", cohort: Optional[str] = None) -> pd.DataFrame:
        """The value of each model's arm choice on a dataset with arms, one row per model.

        A model's choice gives each unit the arm with the largest predicted
        effect net of its cost (the reference when none is positive); it is
        valued by the mean doubly robust score of the arm chosen, net of
        cost. Columns (``ARM_POLICY_COLUMNS``): ``model``; ``value`` (per
        unit, net of cost), ``vs_reference`` (minus giving everyone the
        reference arm) and ``vs_best_single_arm`` (minus giving everyone the
        best single arm), each with ``_se``, ``_ci_low`` and ``_ci_high``
        (95%); then ``share_<arm>`` for every arm, the share of units the
        choice gives it. ``df.attrs``: reference_arm, reference_value and
        best_single_arm_value (dicts of estimate, se, ci_low, ci_high),
        best_single_arm, costs (arm -> cost), note, and ``pairwise``: every
        pair's difference as a list of dicts
        (``POLICY_PAIRWISE_COLUMNS``; as a frame: :meth:`arm_policy_pairwise`
        or :func:`policy_pairwise_frame`). Raises ``ValueError`` on a
        dataset without arms.
        """
        return arm_policy_frame(self.scoreboard_message(dataset, window, cohort))

    def arm_policy_pairwise(
        self, dataset: str, window: str = "cumulative", cohort: Optional[str] = None
    ) -> pd.DataFrame:
        """Every pair of models' arm-choice values, first's minus second's
        (``POLICY_PAIRWISE_COLUMNS``: first, second, estimate, se, ci_low,
        ci_high; above 0 = first's choice is worth more per unit)."""
        return policy_pairwise_frame(self.arm_policy(dataset, window, cohort))

    def compare_models(
        self,
        dataset: str,
        first: str,
        second: str,
        window: str = "cumulative",
        cohort: Optional[str] = None,
        arm: str = "",
    ) -> dict:
        """Corrected PEHE of ``first`` minus ``second`` on the units both cover.

        On a dataset with arms, ``arm`` names the contrast (the arm whose
        board against the reference holds the pair); it is required there.

        Returns a dict with estimate, se, ci_low, ci_high, p_value (two-sided)
        and units; below 0 means ``first`` has lower error. ``policy`` holds
        the policy gain of ``first`` minus that of ``second`` (estimate, se,
        ci_low, ci_high, p_value; above 0 means ``first``'s targeting is
        worth more), or None where the window keeps no decisions for the
        pair.
        """
        r = self._call(
            "Scoring.CompareModels",
            self.scoring.CompareModels,
            pb.CompareModelsRequest(
                dataset=dataset, first=first, second=second, window=_window(window, cohort), arm=str(arm)
            ),
        )
        d = r.difference
        p = r.policy_difference if r.HasField("policy_difference") else None
        return {
            "estimate": d.estimate,
            "se": d.se,
            "ci_low": d.ci_low,
            "ci_high": d.ci_high,
            "p_value": d.p_value,
            "units": r.units,
            "policy": None
            if p is None
            else {"estimate": p.estimate, "se": p.se, "ci_low": p.ci_low, "ci_high": p.ci_high, "p_value": p.p_value},
        }

    def overlap_message(
        self, dataset: str, window: str = "cumulative", cohort: Optional[str] = None, arm: str = ""
    ) -> "pb.OverlapReport":
        """The latest overlap report as the raw protobuf message.

        On a dataset with arms, ``arm`` names the contrast (the arm compared
        with the reference); it is required there."""
        return self._call(
            "Scoring.GetOverlap",
            self.scoring.GetOverlap,
            pb.GetOverlapRequest(dataset=dataset, window=_window(window, cohort), arm=str(arm)),
        )

    def overlap(
        self, dataset: str, window: str = "cumulative", cohort: Optional[str] = None, arm: str = ""
    ) -> pd.DataFrame:
        """The latest overlap report as a DataFrame, one row per arm
        (``OVERLAP_COLUMNS``: arm, effective_share, max_weight). The summary
        travels in ``df.attrs``: eps, extreme_share (units outside
        [eps, 1 - eps]), outside_crump_share, imbalanced_features,
        propensity_auc, clipped, degraded and json (the full report, with the
        histograms).

        On a dataset with arms, ``arm`` names the contrast (required there):
        the rows are that arm and the reference, under the contrast's
        propensity, and ``df.attrs["generalized_propensity"]`` holds both
        arms' generalized propensity (quantiles, effective_share,
        extreme_share, clipped), the reference first."""
        return overlap_frame(self.overlap_message(dataset, window, cohort, arm))

    # -- events

    def list_events(self, dataset: str = "", after_id: int = 0, limit: int = 100) -> pd.DataFrame:
        """Stored events, oldest first: id, dataset, kind, at (UTC), snapshot_id, summary, details_json."""
        r = self._call(
            "EventFeed.ListEvents",
            self.events.ListEvents,
            pb.ListEventsRequest(dataset=dataset, after_id=after_id, limit=limit),
        )
        cols = ["id", "dataset", "kind", "at", "snapshot_id", "summary", "details_json"]
        return pd.DataFrame(
            [
                {
                    "id": e.id,
                    "dataset": e.dataset,
                    "kind": e.kind,
                    "at": pd.to_datetime(e.at_ms, unit="ms", utc=True),
                    "snapshot_id": e.snapshot_id,
                    "summary": e.summary,
                    "details_json": e.details_json,
                }
                for e in r.events
            ],
            columns=cols,
        )

    def watch_events(self, dataset: str = "", after_id: int = 0) -> Iterator["pb.Event"]:
        """Replays stored events after ``after_id``, then yields new ones as they happen.

        The iterator runs until the channel is closed or the server stops.
        """
        try:
            for e in self.events.WatchEvents(pb.WatchEventsRequest(dataset=dataset, after_id=after_id)):
                yield e
        except grpc.RpcError as e:
            if e.code() != grpc.StatusCode.CANCELLED:
                raise PlumblineError.from_rpc_error("EventFeed.WatchEvents", e) from None


def _arm_label(a: Any, i: int, column: str) -> str:
    """An arm label from a cell; a missing or empty one is refused here."""
    if a is None or (isinstance(a, float) and math.isnan(a)) or str(a) == "":
        raise ValueError(f"send_units: row {i}: {column} (the arm) is missing")
    return str(a)


def _optional(message: Any, field: str) -> float:
    """An optional double, or NaN when the server did not send it."""
    return getattr(message, field) if message.HasField(field) else float("nan")


def _policy_vs_front_runner(m: "pb.ModelScore") -> Dict[str, float]:
    """The four policy-comparison columns of a board row (NaN when absent)."""
    nan = float("nan")
    if not m.HasField("policy_vs_front_runner"):
        return {k: nan for k in SCOREBOARD_COLUMNS if k.startswith("policy_vs_front_runner")}
    d = m.policy_vs_front_runner
    return {
        "policy_vs_front_runner": d.estimate,
        "policy_vs_front_runner_se": d.se,
        "policy_vs_front_runner_joint_low": _optional(d, "joint_low"),
        "policy_vs_front_runner_joint_high": _optional(d, "joint_high"),
    }


def _blend(b: "pb.Blend") -> Dict[str, Any]:
    """A board's blend as plain values: ``weights`` (model -> nonzero weight,
    largest first), ``corrected_pehe``, ``best_model``, ``vs_best`` and
    ``vs_constant`` (each ``estimate``, ``se``, ``ci_low``, ``ci_high``,
    ``p_value``) and ``models_offered``."""

    def difference(d: "pb.Difference") -> Dict[str, float]:
        return {"estimate": d.estimate, "se": d.se, "ci_low": d.ci_low, "ci_high": d.ci_high, "p_value": d.p_value}

    return {
        "weights": {w.model: w.weight for w in b.weights},
        "corrected_pehe": b.corrected_pehe,
        "best_model": b.best_model,
        "vs_best": difference(b.vs_best),
        "vs_constant": difference(b.vs_constant),
        "models_offered": b.models_offered,
    }


def datasets_frame(datasets: Iterable["pb.Dataset"]) -> pd.DataFrame:
    """Turns ``Dataset`` messages into the DataFrame of :meth:`Client.list_datasets`."""
    kinds = {pb.OUTCOME_KIND_BINARY: "binary"}
    return pd.DataFrame(
        [
            {
                "name": d.spec.name,
                "outcome_kind": kinds.get(d.spec.outcome_kind, "continuous"),
                "features": len(d.spec.feature_names),
                "units": d.units,
                "outcomes": d.outcomes,
                "predictions": d.predictions,
                "active_models": d.active_models,
                "created_at": pd.to_datetime(d.created_at_ms, unit="ms", utc=True),
            }
            for d in datasets
        ],
        columns=DATASET_COLUMNS,
    )


def overlap_frame(report: "pb.OverlapReport") -> pd.DataFrame:
    """Turns an ``OverlapReport`` message into the DataFrame of :meth:`Client.overlap`."""
    o = report.summary
    doc = json.loads(report.json) if report.json else {}
    # A contrast's report names its two arms: the arm is the treated one.
    treated = doc.get("arm") or "treated"
    control = doc.get("reference_arm") or "control"
    df = pd.DataFrame(
        [
            {"arm": treated, "effective_share": o.treated_effective_share, "max_weight": o.treated_max_weight},
            {"arm": control, "effective_share": o.control_effective_share, "max_weight": o.control_max_weight},
        ],
        columns=OVERLAP_COLUMNS,
    )
    if "generalized_propensity" in doc:
        df.attrs["generalized_propensity"] = doc["generalized_propensity"]
    df.attrs.update(
        {
            "eps": o.eps,
            "extreme_share": o.extreme_share,
            "outside_crump_share": o.outside_crump_share,
            "imbalanced_features": list(o.imbalanced_features),
            "propensity_auc": o.propensity_auc,
            "clipped": o.clipped,
            "degraded": o.degraded,
            "json": report.json,
        }
    )
    return df


def _interval(v: "pb.IntervalValue") -> Dict[str, float]:
    return {"estimate": v.estimate, "se": v.se, "ci_low": v.ci_low, "ci_high": v.ci_high}


def arm_policy_frame(board: "pb.Scoreboard") -> pd.DataFrame:
    """Turns the arm policy report of a ``Scoreboard`` message into the
    DataFrame of :meth:`Client.arm_policy`."""
    if not board.HasField("arm_policy"):
        raise ValueError(f"arm_policy: dataset {board.dataset!r} has no arms (or no arm policy report yet)")
    p = board.arm_policy
    arms = [c.arm for c in p.costs] or [board.reference_arm] + [c.arm for c in board.contrasts]
    rows = []
    for m in p.models:
        row: Dict[str, Any] = {"model": m.model}
        for name in ("value", "vs_reference", "vs_best_single_arm"):
            v = _interval(getattr(m, name))
            row[name] = v["estimate"]
            row.update({f"{name}_{k}": v[k] for k in ("se", "ci_low", "ci_high")})
        shares = {s.arm: s.share for s in m.shares}
        row.update({f"share_{a}": shares.get(a, 0.0) for a in arms})
        rows.append(row)
    df = pd.DataFrame(rows, columns=ARM_POLICY_COLUMNS + [f"share_{a}" for a in arms])
    df.attrs.update(
        {
            "dataset": board.dataset,
            "snapshot_id": board.snapshot_id,
            "units": board.units,
            "reference_arm": board.reference_arm,
            "reference_value": _interval(p.reference_value),
            "best_single_arm": p.best_single_arm,
            "best_single_arm_value": _interval(p.best_single_arm_value),
            "costs": {c.arm: c.cost for c in p.costs},
            "note": p.note,
            "pairwise": [{"first": d.first, "second": d.second, **_interval(d.difference)} for d in p.pairwise],
        }
    )
    return df


def policy_pairwise_frame(policy: pd.DataFrame) -> pd.DataFrame:
    """The pairwise differences kept in an :func:`arm_policy_frame`'s attrs, as a frame."""
    return pd.DataFrame(policy.attrs.get("pairwise", []), columns=POLICY_PAIRWISE_COLUMNS)


def scoreboard_frame(board: "pb.Scoreboard") -> pd.DataFrame:
    """Turns a ``Scoreboard`` message into the DataFrame of :meth:`Client.scoreboard`.

    A board with contrasts (a dataset with arms) becomes one frame with a
    first column ``arm``, as :meth:`Client.scoreboard` describes.
    """
    if board.contrasts:
        return _contrasts_frame(board)
    rows = []
    for m in board.models:
        rows.append(
            {
                "rank": m.rank,
                "model": m.name,
                "baseline": m.baseline,
                "vs_constant_estimate": m.vs_constant.estimate,
                "vs_constant_se": m.vs_constant.se,
                "vs_constant_ci_low": m.vs_constant.ci_low,
                "vs_constant_ci_high": m.vs_constant.ci_high,
                "vs_constant_p_value": m.vs_constant.p_value,
                # Joint (max-t) interval and the pooled chance: NaN from a
                # server that predates them.
                "vs_constant_joint_low": _optional(m.vs_constant, "joint_low"),
                "vs_constant_joint_high": _optional(m.vs_constant, "joint_high"),
                "chance_lowest": _optional(m, "chance_lowest"),
                "draw_share": m.draw_share,
                "in_best_set": m.in_best_set,
                **{k: v for s in m.scores for k, v in ((s.estimator, s.estimate), (f"{s.estimator}_se", s.se))},
                "policy_gain": m.policy_gain.estimate,
                "policy_gain_se": m.policy_gain.se,
                "treated_share": m.treated_share,
                **_policy_vs_front_runner(m),
                "autoc": m.autoc.estimate,
                "autoc_se": m.autoc.se,
                "qini": m.qini.estimate,
                "qini_se": m.qini.se,
                "blp_slope": m.blp_slope.estimate if m.HasField("blp_slope") else float("nan"),
                "top_minus_bottom": m.top_minus_bottom.estimate if m.HasField("top_minus_bottom") else float("nan"),
                "top_minus_bottom_se": m.top_minus_bottom.se if m.HasField("top_minus_bottom") else float("nan"),
                "rmse_lower_bound": _optional(m, "rmse_lower_bound"),
            }
        )
    keys = [s.estimator for s in board.models[0].scores] if board.models else []
    cut = SCOREBOARD_COLUMNS.index("policy_gain")
    columns = SCOREBOARD_COLUMNS[:cut] + [c for k in keys for c in (k, f"{k}_se")] + SCOREBOARD_COLUMNS[cut:]
    df = pd.DataFrame(rows, columns=columns)
    if not df.empty:
        df = df.sort_values("rank", kind="stable").reset_index(drop=True)
    kind = pb.Window.Kind.Name(board.window.kind) if board.HasField("window") else "KIND_CUMULATIVE"
    window = {
        "KIND_UNSPECIFIED": "cumulative",
        "KIND_CUMULATIVE": "cumulative",
        "KIND_RECENT": "recent",
        "KIND_COHORT": f"cohort:{board.window.cohort}",
    }[kind]
    df.attrs.update(
        {
            "dataset": board.dataset,
            "window": window,
            "snapshot_id": board.snapshot_id,
            "computed_at_ms": board.computed_at_ms,
            "units": board.units,
            "ate": board.ate.estimate,
            "ate_se": board.ate.se,
            "front_runner": board.front_runner,
            # The front-runner's difference from constant-effect, its interval
            # allowing for its having been picked as the lowest.
            "front_runner_vs_constant": {
                "estimate": board.front_runner_vs_constant.estimate,
                "ci_low": board.front_runner_vs_constant.ci_low,
                "ci_high": board.front_runner_vs_constant.ci_high,
            }
            if board.HasField("front_runner_vs_constant")
            else None,
            "joint_critical_value": _optional(board, "joint_critical_value"),
            "plugin_error_projection": {
                "estimate": board.plugin_error_projection.estimate,
                "se": board.plugin_error_projection.se,
            }
            if board.HasField("plugin_error_projection")
            else None,
            "blend": _blend(board.blend) if board.HasField("blend") else None,
            "best_set": list(board.best_set),
            "no_detectable_heterogeneity": board.no_detectable_heterogeneity,
            "incomplete": {m.name: m.coverage for m in board.incomplete},
            "overlap_degraded": board.overlap.degraded if board.HasField("overlap") else False,
            "degenerate": board.degenerate,
            "caveat": board.caveat,
            "json": board.json,
            # The alerts' view: their front-runner moves only on evidence that
            # stays valid however often the service looks (README, "Alerts").
            "alerts": {
                "front_runner": board.alerts.front_runner,
                "front_runner_settled": board.alerts.front_runner_settled,
                "heterogeneity": board.alerts.heterogeneity,
                "overlap_degraded": board.alerts.overlap_degraded,
                "looks": board.alerts.looks,
                "units": board.alerts.units,
                "drift": {d.quantity: d.standardized_difference for d in board.alerts.drift},
            },
        }
    )
    return df


def _contrasts_frame(board: "pb.Scoreboard") -> pd.DataFrame:
    frames = []
    contrasts = {}
    for c in board.contrasts:
        f = scoreboard_frame(c)
        contrasts[c.arm] = dict(f.attrs)
        f.attrs = {}
        f.insert(0, "arm", c.arm)
        frames.append(f)
    # Every contrast ranks the same models with the same estimators, so the
    # columns agree; reindex keeps the first board's order regardless.
    columns = ["arm"] + [c for c in frames[0].columns if c != "arm"]
    df = pd.concat([f.reindex(columns=columns) for f in frames], ignore_index=True)
    kind = pb.Window.Kind.Name(board.window.kind) if board.HasField("window") else "KIND_CUMULATIVE"
    df.attrs = {
        "dataset": board.dataset,
        "window": {"KIND_RECENT": "recent", "KIND_COHORT": f"cohort:{board.window.cohort}"}.get(kind, "cumulative"),
        "snapshot_id": board.snapshot_id,
        "computed_at_ms": board.computed_at_ms,
        "units": board.units,
        "reference_arm": board.reference_arm,
        "arms": [board.reference_arm] + [c.arm for c in board.contrasts],
        "contrasts": contrasts,
        "degenerate": board.degenerate,
        "caveat": board.caveat,
    }
    return df


def connect(
    address: str = "127.0.0.1:7070",
    *,
    timeout: Optional[float] = 30.0,
    wait_ready: Optional[float] = 10.0,
    credentials: Optional[grpc.ChannelCredentials] = None,
    options: Optional[Sequence[tuple]] = None,
) -> Client:
    """Opens a channel to a plumbline server and returns a :class:`Client`.

    Args:
        address: ``host:port`` of the gRPC listener.
        timeout: deadline of unary calls, in seconds (``None`` for none).
        wait_ready: wait up to this many seconds for the channel to connect,
            raising :class:`PlumblineError` (``UNAVAILABLE``) if it does not;
            ``None`` connects lazily on the first call.
        credentials: TLS channel credentials; plaintext when ``None`` (the
            service itself speaks plaintext; put TLS in front of it).
        options: extra gRPC channel options.
    """
    opts = [
        ("grpc.max_receive_message_length", 64 * 1024 * 1024),
        ("grpc.max_send_message_length", 64 * 1024 * 1024),
    ]
    opts += list(options or [])
    if credentials is None:
        channel = grpc.insecure_channel(address, options=opts)
    else:
        channel = grpc.secure_channel(address, credentials, options=opts)
    if wait_ready is not None:
        try:
            grpc.channel_ready_future(channel).result(timeout=wait_ready)
        except grpc.FutureTimeoutError:
            channel.close()
            raise PlumblineError(
                "connect",
                grpc.StatusCode.UNAVAILABLE,
                f"no plumbline server answered at {address} within {wait_ready} s",
            ) from None
    return Client(channel, timeout=timeout)
