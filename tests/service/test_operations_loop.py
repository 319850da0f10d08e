"""The operations loop end to end over HTTP: cases scored with keys, their
outcomes sent later as CSV, then the track record and drift read back.

Checks against an outside source: the track record's accuracy, log loss,
Brier score and ROC AUC of the served scores against scikit-learn's
accuracy_score, log_loss, brier_score_loss and roc_auc_score on the same
scores and outcomes (the AUC read from a histogram: docs/architecture.md
states its bound, 2e-3 on the reference data)."""

from __future__ import annotations

import numpy as np
from sklearn.metrics import accuracy_score, brier_score_loss, log_loss, roc_auc_score

from service.web.extensions import get_drift_tally
from tests.service.helpers import ApiClient
from tests.service.outcome_helpers import OUTCOMES, scored_pumps

TRACK = "/v1/models/pump-risk/track-record"
DRIFT = "/v1/models/pump-risk/drift"


def test_outcomes_sent_as_csv_reach_the_track_record_and_drift(any_api: ApiClient) -> None:
    results = scored_pumps(any_api, 200)
    rng = np.random.default_rng(3)
    # The outcomes: drawn from the served probability itself, so both classes occur.
    p_failed = np.array([r["result"]["probabilities"]["failed"] for r in results])
    failed = rng.random(len(results)) < p_failed
    lines = ["key,label"] + [f"st-{i},{'failed' if f else 'ok'}" for i, f in enumerate(failed)]
    body = any_api.request("POST", OUTCOMES, 201, data="\n".join(lines) + "\n",
                           content_type="text/csv")
    assert body == {"accepted": 200, "duplicates": 0}

    record = any_api.request("GET", TRACK, 200)
    (version,) = record["versions"]
    metrics = version["metrics"]
    served = np.array([r["result"]["label"] == "failed" for r in results])
    assert metrics["n"] == 200
    assert np.isclose(metrics["accuracy"], accuracy_score(failed, served), rtol=0, atol=1e-12)
    assert np.isclose(metrics["log_loss"], log_loss(failed, p_failed, labels=[False, True]),
                      rtol=1e-9)
    assert np.isclose(metrics["brier"], brier_score_loss(failed, p_failed), rtol=1e-9)
    assert abs(metrics["roc_auc"] - roc_auc_score(failed, p_failed)) <= 2e-3
    assert sum(row["count"] for row in version["calibration"]) == 200
    assert record["alarm"]["state"] in ("calm", "raised")

    tally = get_drift_tally(any_api.app)
    assert tally is not None
    tally.flush()
    drift = any_api.request("GET", DRIFT, 200)
    assert drift["recent_predictions"] == 200
    for field in drift["fields"]:
        assert sum(field["recent_counts"]) == 200, field
