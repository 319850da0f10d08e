"""/metrics domain series labelled by model (docs/http-api.md, "Operations").
Parsed with prometheus_client's own parser of the text format (reference
library); the values are our own contract, checked against the database."""

from __future__ import annotations

from prometheus_client.parser import text_string_to_metric_families

from service.web.extensions import get_database
from tests.service.helpers import ApiClient, count_records, ingest_raw, record
from tests.service.outcome_helpers import OUTCOMES, PREDICT, scored_pumps
from tests.service.test_predictions_api import PUMP_QUERY


def samples(api: ApiClient) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    response = api.client.get("/metrics")
    assert response.status_code == 200
    found = {}
    for family in text_string_to_metric_families(response.get_data(as_text=True)):
        for sample in family.samples:
            found[(sample.name, tuple(sorted(sample.labels.items())))] = sample.value
    return found


def value(found: dict[tuple[str, tuple[tuple[str, str], ...]], float], name: str,
          **labels: str) -> float:
    return found.get((name, tuple(sorted(labels.items()))), 0.0)


def test_model_state_is_read_at_scrape_time(any_api: ApiClient) -> None:
    scored_pumps(any_api, 2)
    ingest_raw(get_database(any_api.app).write, "pump-risk",
               [record(i, key=f"r-{i}") for i in range(5)])
    any_api.request("POST", OUTCOMES, 201, json_body={"outcomes": [
        {"key": "st-0", "label": "ok"}]})
    found = samples(any_api)
    stored = count_records(any_api.app, "pump-risk")
    assert stored == 6
    assert value(found, "keelson_model_state_up") == 1
    assert value(found, "keelson_records_stored", model="pump-risk") == stored
    # No worker runs here: every record waits past the trainer's cursor (0).
    assert value(found, "keelson_trainer_lag_records", model="pump-risk") == stored
    assert value(found, "keelson_active_version", model="pump-risk") == 1


def test_predictions_and_outcomes_are_counted(any_api: ApiClient) -> None:
    scored_pumps(any_api, 3)  # 3 records scored with explain=none
    before = samples(any_api)
    any_api.request("GET", f"{PREDICT}?{PUMP_QUERY}&key=k-1", 200)
    any_api.request("POST", PREDICT, 200, json_body={"explain": "gradient", "records": [
        {"features": {"vibration_rms": 1.0, "pump_family": "screw", "has_vfd": True}}] * 2})
    any_api.request("POST", OUTCOMES, 201, json_body={"outcomes": [
        {"key": "st-0", "label": "ok"}, {"key": "st-1", "label": "failed"}]})
    any_api.request("POST", OUTCOMES, 201, json_body={"outcomes": [
        {"key": "st-1", "label": "failed"}]})  # a duplicate: not received again
    after = samples(any_api)

    def moved(name: str, **labels: str) -> float:
        return value(after, name, **labels) - value(before, name, **labels)

    served = "keelson_predictions_served_total"
    assert moved(served, model="pump-risk", version="1",
                 explain="integrated_gradients") == 1
    assert moved(served, model="pump-risk", version="1", explain="gradient") == 2
    assert value(before, served, model="pump-risk", version="1", explain="none") >= 3
    assert moved("keelson_outcomes_received_total", model="pump-risk") == 2
