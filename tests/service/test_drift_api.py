"""GET /v1/models/{name}/drift (docs/http-api.md, "Drift"): the answer's shape,
its figures recomputed from the stored records and the predictions sent,
the scope, the window and the refusals."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest

from engine.drift import chi_square_homogeneity, ks_from_counts, psi
from engine.drift_bins import reference_bins
from service.web.extensions import get_drift_tally
from service.web.schemas.drift import DriftSchema
from tests.service.conftest import build_app
from tests.service.drift_setup import (
    predict_query,
    pump_model_with_reference,
    training_features,
)
from tests.service.helpers import PUMP_SPEC, ApiClient, create_model
from tests.service.predictions_factory import pump_rows

DRIFT = "/v1/models/pump-risk/drift"
PREDICT = "/v1/models/pump-risk/predictions"


def hotter(rows):
    """The same pumps vibrating harder (invented), and all of them screw pumps."""
    return [{**row, "vibration_rms": min(100.0, row["vibration_rms"] * 1.6 + 15.0),
             "pump_family": "screw"} for row in rows]


@pytest.fixture
def drift_api(database_url):
    app = build_app(database_url, KEELSON_DRIFT_FLUSH_SECONDS=3600)
    yield ApiClient(app)
    get_drift_tally(app).close()


def test_drift_answer_recomputes_from_records_and_predictions(drift_api):
    api = drift_api
    pump_model_with_reference(api)
    sent = hotter(pump_rows(120, seed=21))
    for row in sent:
        api.request("GET", f"{PREDICT}?{predict_query(row)}", 200)
    get_drift_tally(api.app).flush()
    body = api.request("GET", DRIFT, 200, token=api.token("predict"))
    assert DriftSchema().validate(body) == {}
    reference = reference_bins(PUMP_SPEC["features"], training_features(api.app))
    assert body["model"] == "pump-risk" and body["version"] == 1
    assert body["window"]["days"] == 7
    assert body["reference_records"] == len(training_features(api.app))
    assert body["recent_predictions"] == 120
    by_name = {f["name"]: f for f in body["fields"]}
    assert [f["name"] for f in body["fields"]] == [f["name"] for f in PUMP_SPEC["features"]]
    for bins in reference:
        recent = np.zeros(bins.size, dtype=np.int64)
        for row in sent:
            recent[bins.bin_of(row[bins.name])] += 1
        field = by_name[bins.name]
        assert field["reference_counts"] == bins.psi_counts(bins.reference).tolist()
        assert field["recent_counts"] == bins.psi_counts(recent).tolist()
        assert field["psi"] == pytest.approx(
            psi(bins.psi_counts(bins.reference), bins.psi_counts(recent)), rel=1e-12)
        if bins.kind == "numeric":
            ks = ks_from_counts(bins.reference, recent)
            assert field["ks"] == {"statistic": ks.statistic,
                                   "statistic_bound": ks.statistic_bound,
                                   "p_value": ks.p_value}
            assert field["chi_square"] is None
        else:
            chi = chi_square_homogeneity(bins.reference, recent)
            assert field["chi_square"] == {"statistic": chi.statistic, "dof": chi.dof,
                                           "p_value": chi.p_value}
            assert field["ks"] is None
    assert by_name["vibration_rms"]["status"] == "shifted"
    assert by_name["pump_family"]["status"] == "shifted"
    assert by_name["has_vfd"]["status"] == "steady"
    assert body["status"] == "shifted"
    assert len(by_name["vibration_rms"]["bins"]) == 10


def test_no_predictions_yet_answers_null_statistics(drift_api):
    pump_model_with_reference(drift_api)
    body = drift_api.request("GET", f"{DRIFT}?window_days=1", 200)
    assert body["recent_predictions"] == 0 and body["status"] is None
    assert all(f["psi"] is None and f["status"] is None for f in body["fields"])
    assert body["window"]["days"] == 1
    since = dt.datetime.fromisoformat(body["window"]["since"])
    assert since.minute == since.second == 0


def test_refusals(drift_api):
    api = drift_api
    create_model(api)
    problem = api.request("GET", DRIFT, 409)
    assert "no active version" in problem["detail"]
    api.request("GET", "/v1/models/no-such-model/drift", 404)
    for bad in ("0", "367", "seven", "1.5"):
        problem = api.request("GET", f"{DRIFT}?window_days={bad}", 422)
        assert "window_days" in str(problem["errors"])
    api.request("GET", f"{DRIFT}?windowdays=3", 422)
    api.request("GET", DRIFT, 403, token=api.token("ingest"))
    api.request("GET", DRIFT, 401, token=None)


def test_metrics_carry_psi_per_field_and_the_worst_status(drift_api):
    # Parsed with prometheus_client's own parser of the text exposition format.
    from prometheus_client.parser import text_string_to_metric_families

    api = drift_api
    pump_model_with_reference(api)
    for row in hotter(pump_rows(60, seed=22)):
        api.request("GET", f"{PREDICT}?{predict_query(row)}", 200)
    get_drift_tally(api.app).flush()
    body = api.request("GET", DRIFT, 200)
    text = api.client.get("/metrics").get_data(as_text=True)
    families = {f.name: f for f in text_string_to_metric_families(text)}
    psi_samples = {s.labels["field"]: s.value for s in families["keelson_drift_psi"].samples
                   if s.labels["model"] == "pump-risk"}
    assert psi_samples == {f["name"]: pytest.approx(f["psi"]) for f in body["fields"]}
    states = {s.labels["status"]: s.value for s in families["keelson_drift_status"].samples}
    assert states == {"steady": 0.0, "shifting": 0.0, "shifted": 1.0}
