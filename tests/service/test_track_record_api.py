"""GET /v1/models/{name}/track-record: live metrics per version over a window,
the daily series and the alarm. Outcomes are folded in with record_outcomes, as
the outcomes route does once it has joined them with their scored cases.

Reference library: scikit-learn's `metrics` on the same served scores."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest
from sklearn import metrics as skm

from service.usecases.track_record import JoinedOutcome
from tests.service.helpers import ApiClient, add_version, create_model
from tests.service.test_track_record_store import joined_binary, record

START = dt.datetime(2026, 6, 1, 8, 0, tzinfo=dt.UTC)
URL = "/v1/models/pump-risk/track-record"


def served(joined: list[JoinedOutcome]) -> tuple[np.ndarray, np.ndarray]:
    p = np.array([j.output["probabilities"]["failed"] for j in joined])
    y = np.array([j.label == "failed" for j in joined], dtype=np.int64)
    return y, p


def test_the_track_record_of_a_window_equals_scikit_learn_on_its_outcomes(
        any_api: ApiClient) -> None:
    create_model(any_api)
    version = add_version(any_api.app, "pump-risk", 1, status="active", active=True)
    # 600 outcomes, two an hour from 1 July: 13 UTC days.
    joined = joined_binary(600, version, start=START, every=dt.timedelta(minutes=30))
    record(any_api.app, joined[:250])
    record(any_api.app, joined[250:])
    since, until = dt.date(2026, 7, 3), dt.date(2026, 7, 9)
    body = any_api.request("GET", f"{URL}?since={since}&until={until}", 200)
    inside = [j for j in joined if since <= j.outcome_at.date() <= until]
    y, p = served(inside)
    assert body["since"] == "2026-07-03" and body["until"] == "2026-07-09"
    assert body["main_metric"] == "log_loss" and body["active_version"] == 1
    (entry,) = body["versions"]
    assert entry["version"] == 1 and entry["active"] is True
    metrics = entry["metrics"]
    assert metrics["n"] == len(inside) == 7 * 48
    assert metrics["accuracy"] == pytest.approx(skm.accuracy_score(y, p > 0.5))
    assert metrics["log_loss"] == pytest.approx(skm.log_loss(y, p), rel=1e-12)
    assert metrics["brier"] == pytest.approx(skm.brier_score_loss(y, p), rel=1e-12)
    assert metrics["roc_auc"] == pytest.approx(skm.roc_auc_score(y, p), abs=2e-3)
    assert [row["count"] for row in entry["calibration"]] == np.bincount(
        np.searchsorted(np.linspace(0, 1, 11)[1:-1], p), minlength=10).tolist()
    days = [row["day"] for row in entry["daily"]]
    assert days == [str(since + dt.timedelta(days=d)) for d in range(7)]
    for row in entry["daily"]:
        on_day = [j for j in inside if str(j.outcome_at.date()) == row["day"]]
        y_day, p_day = served(on_day)
        assert row["n"] == len(on_day)
        assert row["value"] == pytest.approx(skm.log_loss(y_day, p_day, labels=[0, 1]),
                                             rel=1e-12)
    assert body["alarm"] == entry["alarm"]
    assert body["alarm"] == {"state": "calm", "since": None, "cases": 600,
                             "statistic": pytest.approx(body["alarm"]["statistic"]),
                             "delta": 0.01, "threshold": 20.0, "loss": "brier"}


def test_each_version_has_its_own_record_and_alarm(api: ApiClient) -> None:
    create_model(api, alarm={"delta": 0.01, "threshold": 5.0})
    first = add_version(api.app, "pump-risk", 1, status="retired")
    add_version(api.app, "pump-risk", 2, status="active", active=True)
    sure_misses = [JoinedOutcome(first, {"probabilities": {"ok": 0.02, "failed": 0.98}}, "ok",
                                 START, START + dt.timedelta(hours=i)) for i in range(60)]
    record(api.app, joined_binary(200, first, seed=2) + sure_misses)
    body = api.request("GET", f"{URL}?since=2026-06-01&until=2026-12-31", 200)
    (entry,) = body["versions"]
    assert entry["version"] == 1 and entry["active"] is False
    assert entry["alarm"]["state"] == "raised"
    assert dt.datetime.fromisoformat(entry["alarm"]["since"]) in {
        j.outcome_at for j in sure_misses}
    # Version 2 is served and has no outcomes yet: its alarm is calm.
    assert body["active_version"] == 2
    assert body["alarm"]["state"] == "calm" and body["alarm"]["cases"] == 0


def test_regression_reports_rmse_mae_and_r2(api: ApiClient) -> None:
    create_model(api, task="regression", classes=None, target="flow_m3h")
    version = add_version(api.app, "pump-risk", 1, status="active", active=True)
    rng = np.random.default_rng(8)
    truth = rng.normal(140.0, 12.0, 200)
    values = truth + rng.normal(0.0, 3.0, 200)
    now = dt.datetime.now(dt.UTC)
    record(api.app, [JoinedOutcome(version, {"value": v}, t, now, now)
                     for v, t in zip(values.tolist(), truth.tolist(), strict=True)])
    body = api.request("GET", URL, 200)  # default window: the last 30 days, today included
    today = now.date()
    assert body["until"] == str(today) and body["since"] == str(today - dt.timedelta(days=29))
    assert body["main_metric"] == "rmse"
    metrics = body["versions"][0]["metrics"]
    assert metrics["rmse"] == pytest.approx(np.sqrt(skm.mean_squared_error(truth, values)))
    assert metrics["mae"] == pytest.approx(skm.mean_absolute_error(truth, values))
    assert metrics["r2"] == pytest.approx(skm.r2_score(truth, values))
    assert body["versions"][0]["calibration"] == []
    assert body["alarm"]["loss"] == "relative_absolute_error"
    assert body["alarm"]["delta"] == 0.1


def test_no_outcomes_yet_answers_an_empty_record(api: ApiClient) -> None:
    create_model(api)
    body = api.request("GET", URL, 200)
    assert body["versions"] == [] and body["active_version"] is None and body["alarm"] is None


@pytest.mark.parametrize(("query", "field"), [
    ("since=yesterday", "since"),
    ("until=2026-02-30", "until"),
    ("window=7", "window"),
])
def test_a_bad_window_is_refused_naming_the_parameter(api: ApiClient, query: str,
                                                      field: str) -> None:
    create_model(api)
    body = api.request("GET", f"{URL}?{query}", 422)
    assert f"query.{field}" in body["errors"], body


@pytest.mark.parametrize(("query", "since", "until"), [
    # Longer than 366 days: cut to the 366 ending at `until`.
    ("since=2025-01-01&until=2026-07-01", "2025-07-01", "2026-07-01"),
    # Reversed: answered as asked, and no day is read.
    ("since=2026-07-09&until=2026-07-01", "2026-07-09", "2026-07-01"),
    # The calendar's edges do not overflow the default window.
    ("until=0001-01-05", "0001-01-01", "0001-01-05"),
    ("since=9999-12-31", "9999-12-31", "9999-12-31"),
])
def test_every_window_of_valid_dates_is_answered(api: ApiClient, query: str, since: str,
                                                 until: str) -> None:
    create_model(api)
    version = add_version(api.app, "pump-risk", 1, status="active", active=True)
    # Outcomes in 2027, outside every window below.
    record(api.app, joined_binary(50, version, start=dt.datetime(2027, 3, 1, tzinfo=dt.UTC)))
    body = api.request("GET", f"{URL}?{query}", 200)
    assert (body["since"], body["until"]) == (since, until)
    assert body["versions"] == []


def test_the_route_needs_the_predict_scope_and_a_model(api: ApiClient) -> None:
    create_model(api)
    api.request("GET", URL, 403, token=api.token("ingest"))
    api.request("GET", URL, 200, token=api.token("predict"))
    api.request("GET", "/v1/models/no-such-pump/track-record", 404)


def test_metrics_shows_the_active_versions_live_metric_and_alarm(api: ApiClient) -> None:
    from prometheus_client.parser import text_string_to_metric_families
    create_model(api)
    version = add_version(api.app, "pump-risk", 1, status="active", active=True)
    now = dt.datetime.now(dt.UTC)
    joined = joined_binary(120, version, start=now - dt.timedelta(days=40),
                           every=dt.timedelta(minutes=1))
    record(api.app, joined)
    y, p = served(joined)
    text = api.client.get("/metrics").get_data(as_text=True)
    samples = {(s.name, tuple(sorted(s.labels.items()))): s.value
               for family in text_string_to_metric_families(text) for s in family.samples}
    labels = (("model", "pump-risk"), ("version", "1"))
    assert samples[("keelson_live_metric", tuple(sorted(
        (*labels, ("metric", "log_loss")))))] == pytest.approx(skm.log_loss(y, p), rel=1e-12)
    assert samples[("keelson_live_outcomes", labels)] == 120
    assert samples[("keelson_alarm_raised", labels)] == 0
