"""A small typed client of the probity gRPC service.

    from probity_client import Client, Outcome
    with Client("127.0.0.1:50051") as c:
        s = c.score("card-fraud", {"amount": 42.0, "channel": "online"}, prediction_id="tx-1")
        c.send_outcomes([Outcome("tx-1", label=False)])
        r = c.report(route="card-fraud")

Stubs are generated from the repository's proto/ when the package is built (see setup.py).
"""

from probity_client.client import (
    Client,
    FeatureStability,
    OperatingPoint,
    Outcome,
    OutcomeResult,
    Report,
    ReportSeries,
    Score,
    ScoreBand,
    ServedRule,
    Warning,
)

__all__ = [
    "Client",
    "FeatureStability",
    "OperatingPoint",
    "Outcome",
    "OutcomeResult",
    "Report",
    "ReportSeries",
    "Score",
    "ScoreBand",
    "ServedRule",
    "Warning",
]
