"""The typed wrapper: plain dataclasses in, plain dataclasses out; gRPC errors are raised as `grpc.RpcError`."""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Iterable, Mapping, Optional, Sequence, Union

import grpc

from probity_client.v1 import outcomes_pb2, outcomes_pb2_grpc, scoring_pb2, scoring_pb2_grpc

FeatureValue = Union[float, int, str, None]

_STATUS = {
    outcomes_pb2.OUTCOME_STATUS_MATCHED: "matched",
    outcomes_pb2.OUTCOME_STATUS_DUPLICATE: "duplicate",
    outcomes_pb2.OUTCOME_STATUS_CORRECTED: "corrected",
    outcomes_pb2.OUTCOME_STATUS_PENDING: "pending",
    outcomes_pb2.OUTCOME_STATUS_INVALID: "invalid",
}


@dataclass(frozen=True)
class Warning:
    """Something noticed about a row that was scored anyway (a missing feature, an unknown category...)."""

    kind: str
    feature: str
    message: str


@dataclass(frozen=True)
class Score:
    """What the server said about one row."""

    prediction_id: str
    route: str
    model: str
    model_version: str
    role: str
    margin: float
    log_odds: float
    calibrated_log_odds: float
    adjusted_log_odds: float
    probability: float
    score: Optional[float] = None
    decision: Optional[str] = None
    warnings: tuple[Warning, ...] = ()


@dataclass(frozen=True)
class Outcome:
    """What happened to a prediction: its id, the label (True = positive class) and when (ms since the epoch; 0 =
    when the server receives it)."""

    prediction_id: str
    label: bool
    outcome_time_unix_ms: int = 0


@dataclass(frozen=True)
class OutcomeResult:
    """The server's answer for one outcome: matched, duplicate, corrected, pending or invalid."""

    index: int
    prediction_id: str
    status: str
    predictions_matched: int
    message: str = ""


@dataclass(frozen=True)
class OperatingPoint:
    """Approvals and declines at one probability threshold (declined when the probability is above it)."""

    threshold: float
    true_positive: int
    false_positive: int
    true_negative: int
    false_negative: int
    approval_rate: float
    decline_rate: float
    precision: Optional[float]
    recall: Optional[float]
    expected_cost: Optional[float]


@dataclass(frozen=True)
class ScoreBand:
    """One band of a bands rule, and the operating point of declining it and every band above."""

    label: str
    lower: float
    upper: float
    count: int
    positives: int
    positive_rate: Optional[float]
    declining_from_here: OperatingPoint


@dataclass(frozen=True)
class ServedRule:
    """The predictions of a series served under one decision rule (in words, e.g. `threshold 0.5`), with the
    operating point at its threshold (threshold and cost rules) or its bands, on the pairs with an outcome."""

    rule: str
    predictions: int
    with_outcome: int
    positives: int
    false_positive_cost: Optional[float]
    false_negative_cost: Optional[float]
    point: Optional[OperatingPoint]
    bands: tuple[ScoreBand, ...]


@dataclass(frozen=True)
class FeatureStability:
    """One monitored feature over a report's range (one-hour windows aligned to UTC hours, the range widened to
    whole hours), against its training distribution in the model file: PSI (shares floored at 1e-4), missing rate
    and unknown-category rate (None for a numeric feature), and the rows per slot (value bins, missing, unknown)."""

    feature: str
    rows: int
    psi: Optional[float]
    missing_rate: Optional[float]
    unknown_rate: Optional[float]
    counts: tuple[int, ...]


@dataclass(frozen=True)
class ReportSeries:
    """The headline figures of one route, model, version and role (None where the report could not compute one)."""

    route: str
    model: str
    version: str
    role: str
    predictions: int
    with_outcome: int
    immature: int
    log_loss: Optional[float]
    brier: Optional[float]
    roc_auc: Optional[float]
    ks: Optional[float]
    ece: Optional[float]
    observed_base_rate: Optional[float]
    predicted_base_rate: Optional[float]
    # One entry per decision rule the series' predictions were served under, in the order first served.
    operating_points: tuple[ServedRule, ...] = ()
    # Per-feature stability of the model file's monitored features, in its order; empty when none was counted.
    features: tuple[FeatureStability, ...] = ()


@dataclass(frozen=True)
class Report:
    """A report: one entry per series, the outcome counts, and the full report as the server's JSON."""

    series: tuple[ReportSeries, ...]
    pending_outcomes: int
    unmatched_outcomes: int
    full: dict = field(default_factory=dict)


def _opt(msg, name: str) -> Optional[float]:
    return getattr(msg, name) if msg.HasField(name) else None


def _point(p) -> OperatingPoint:
    return OperatingPoint(
        threshold=p.threshold,
        true_positive=p.true_positive,
        false_positive=p.false_positive,
        true_negative=p.true_negative,
        false_negative=p.false_negative,
        approval_rate=p.approval_rate,
        decline_rate=p.decline_rate,
        precision=_opt(p, "precision"),
        recall=_opt(p, "recall"),
        expected_cost=_opt(p, "expected_cost"),
    )


def _served_rule(r) -> ServedRule:
    return ServedRule(
        rule=r.rule,
        predictions=r.predictions,
        with_outcome=r.with_outcome,
        positives=r.positives,
        false_positive_cost=_opt(r, "false_positive_cost"),
        false_negative_cost=_opt(r, "false_negative_cost"),
        point=_point(r.point) if r.HasField("point") else None,
        bands=tuple(
            ScoreBand(
                label=b.label,
                lower=b.lower,
                upper=b.upper,
                count=b.count,
                positives=b.positives,
                positive_rate=_opt(b, "positive_rate"),
                declining_from_here=_point(b.declining_from_here),
            )
            for b in r.bands
        ),
    )


def _row(features: Mapping[str, FeatureValue], prediction_id: str, subject_key: str) -> scoring_pb2.Row:
    row = scoring_pb2.Row(prediction_id=prediction_id, subject_key=subject_key)
    for name, value in features.items():
        if value is None:
            continue  # absent: the server reads it as missing
        if isinstance(value, str):
            row.named.values[name].category = value
        elif isinstance(value, (int, float)) and not isinstance(value, bool):
            row.named.values[name].number = float(value)
        else:
            raise TypeError(f"feature {name!r}: expected a number, a category name or None, got {type(value).__name__}")
    if not features:
        row.named.SetInParent()
    return row


def _score(r: scoring_pb2.ScoreResponse) -> Score:
    return Score(
        prediction_id=r.prediction_id,
        route=r.route,
        model=r.model,
        model_version=r.model_version,
        role=r.role,
        margin=r.margin,
        log_odds=r.log_odds,
        calibrated_log_odds=r.calibrated_log_odds,
        adjusted_log_odds=r.adjusted_log_odds,
        probability=r.probability,
        score=_opt(r, "score"),
        decision=_opt(r, "decision"),
        warnings=tuple(
            Warning(scoring_pb2.WarningKind.Name(w.kind).removeprefix("WARNING_KIND_").lower(), w.feature, w.message)
            for w in r.warnings
        ),
    )


class Client:
    """A connection to a probity server.

    `target` is `host:port`. Pass `credentials` (`grpc.ssl_channel_credentials(...)`) for TLS, and `token` for a
    configured caller's bearer token (sent as `authorization: Bearer ...`). `timeout` is per call, in seconds.
    """

    def __init__(
        self,
        target: str,
        *,
        credentials: Optional[grpc.ChannelCredentials] = None,
        token: Optional[str] = None,
        timeout: float = 30.0,
        options: Sequence[tuple[str, object]] = (),
    ):
        if credentials is None:
            self._channel = grpc.insecure_channel(target, options=list(options))
        else:
            self._channel = grpc.secure_channel(target, credentials, options=list(options))
        self._metadata = [("authorization", f"Bearer {token}")] if token else []
        self._timeout = timeout
        self._scoring = scoring_pb2_grpc.ScoringStub(self._channel)
        self._outcomes = outcomes_pb2_grpc.OutcomesStub(self._channel)

    def close(self) -> None:
        self._channel.close()

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def _call(self, method, request):
        return method(request, timeout=self._timeout, metadata=self._metadata)

    def score(
        self, route: str, features: Mapping[str, FeatureValue], *, prediction_id: str = "", subject_key: str = ""
    ) -> Score:
        """Scores one row given by feature name (numbers, category names, None for missing)."""
        request = scoring_pb2.ScoreRequest(route=route, row=_row(features, prediction_id, subject_key))
        return _score(self._call(self._scoring.Score, request))

    def score_batch(
        self, route: str, rows: Sequence[Mapping[str, FeatureValue]], *, prediction_ids: Optional[Sequence[str]] = None
    ) -> list[Score]:
        """Scores many rows in one call (at most the server's `limits.max_batch_rows`), answers in row order."""
        if prediction_ids is not None and len(prediction_ids) != len(rows):
            raise ValueError(f"{len(prediction_ids)} prediction ids for {len(rows)} rows")
        ids = prediction_ids or [""] * len(rows)
        request = scoring_pb2.ScoreBatchRequest(route=route, rows=[_row(r, i, "") for r, i in zip(rows, ids)])
        return [_score(r) for r in self._call(self._scoring.ScoreBatch, request).results]

    def send_outcomes(self, outcomes: Iterable[Union[Outcome, tuple]]) -> list[OutcomeResult]:
        """Records outcomes (Outcome or (prediction_id, label[, time_ms]) tuples); one result per outcome."""
        items = [o if isinstance(o, Outcome) else Outcome(*o) for o in outcomes]
        request = outcomes_pb2.RecordOutcomesRequest(
            outcomes=[
                outcomes_pb2.Outcome(
                    prediction_id=o.prediction_id, label=bool(o.label), outcome_time_unix_ms=int(o.outcome_time_unix_ms)
                )
                for o in items
            ]
        )
        answer = self._call(self._outcomes.RecordOutcomes, request)
        return [
            OutcomeResult(r.index, r.prediction_id, _STATUS.get(r.status, "unknown"), r.predictions_matched, r.message)
            for r in answer.results
        ]

    def report(
        self,
        *,
        route: str = "",
        model: str = "",
        version: str = "",
        from_unix_ms: int = 0,
        to_unix_ms: int = 0,
    ) -> Report:
        """The report from the server's prediction store over a time range (0 = open) and filters."""
        request = outcomes_pb2.ReportRequest(
            route=route, model=model, version=version, from_unix_ms=from_unix_ms, to_unix_ms=to_unix_ms
        )
        r = self._call(self._outcomes.Report, request)
        return Report(
            series=tuple(
                ReportSeries(
                    route=s.route,
                    model=s.model,
                    version=s.version,
                    role=s.role,
                    predictions=s.predictions,
                    with_outcome=s.with_outcome,
                    immature=s.immature,
                    log_loss=_opt(s, "log_loss"),
                    brier=_opt(s, "brier"),
                    roc_auc=_opt(s, "roc_auc"),
                    ks=_opt(s, "ks"),
                    ece=_opt(s, "ece"),
                    observed_base_rate=_opt(s, "observed_base_rate"),
                    predicted_base_rate=_opt(s, "predicted_base_rate"),
                    operating_points=tuple(_served_rule(r) for r in s.operating_points),
                    features=tuple(
                        FeatureStability(
                            feature=f.feature,
                            rows=f.rows,
                            psi=_opt(f, "psi"),
                            missing_rate=_opt(f, "missing_rate"),
                            unknown_rate=_opt(f, "unknown_rate"),
                            counts=tuple(f.counts),
                        )
                        for f in s.features
                    ),
                )
                for s in r.series
            ),
            pending_outcomes=r.pending_outcomes,
            unmatched_outcomes=r.unmatched_outcomes,
            full=json.loads(r.json) if r.json else {},
        )
