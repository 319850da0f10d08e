"""record_outcomes: outcomes joined with served scores fold into day sums and
alarms (service.usecases.track_record), on SQLite and PostgreSQL."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest
from sqlalchemy import func, select

from engine.track_record import Tally
from service.errors import InvalidInputError
from service.store.tables import ModelRow, TrackRecordAlarmRow, TrackRecordDayRow
from service.usecases.track_record import JoinedOutcome, record_outcomes, tally_of_row
from service.web.extensions import get_database
from tests.service.helpers import ApiClient, add_version, create_model

START = dt.datetime(2026, 6, 1, 8, 0, tzinfo=dt.UTC)


def joined_binary(n: int, version_id: int, *, seed: int = 0, start: dt.datetime = START,
                  every: dt.timedelta = dt.timedelta(hours=5)) -> list[JoinedOutcome]:
    rng = np.random.default_rng(seed)
    p = rng.uniform(0.0, 1.0, n)
    failed = rng.uniform(size=n) < p
    return [JoinedOutcome(version_id=version_id,
                          output={"label": "failed" if q > 0.5 else "ok",
                                  "probabilities": {"ok": 1.0 - q, "failed": q}},
                          label="failed" if f else "ok", scored_at=start + every * i,
                          outcome_at=start + every * i + dt.timedelta(days=30))
            for i, (q, f) in enumerate(zip(p.tolist(), failed.tolist(), strict=True))]


def record(app, joined):  # type: ignore[no-untyped-def]
    with get_database(app).write() as session:
        model = session.scalars(select(ModelRow)).one()
        record_outcomes(session, model, joined)
        session.commit()


def test_outcomes_in_batches_sum_to_the_tally_of_all_per_day(any_api: ApiClient) -> None:
    create_model(any_api)
    version = add_version(any_api.app, "pump-risk", 1, status="active", active=True)
    joined = joined_binary(500, version)
    for part in np.array_split(np.arange(500), 6):
        record(any_api.app, [joined[i] for i in part])
    with get_database(any_api.app).read() as session:
        rows = session.scalars(select(TrackRecordDayRow).order_by(TrackRecordDayRow.day)).all()
        days = [row.day for row in rows]
        stored = Tally("binary")
        for row in rows:
            stored = stored.merged(tally_of_row("binary", row))
        alarm = session.get_one(TrackRecordAlarmRow, (rows[0].model_id, version))
        assert alarm.n == 500
        assert alarm.raised_at is None
    # One row per UTC day of the outcome (5-hourly outcomes over ~104 days).
    assert days == sorted({(j.outcome_at).date() for j in joined})
    q = np.array([j.output["probabilities"]["failed"] for j in joined])
    y = np.array([j.label == "failed" for j in joined], dtype=np.int64)
    whole = Tally.of("binary", y, q[:, None]).metrics()
    for name, value in stored.metrics().items():
        assert value == pytest.approx(whole[name], rel=1e-12)


def test_the_alarm_raises_when_served_scores_turn_bad_and_names_the_outcome_time(
        api: ApiClient) -> None:
    create_model(api, alarm={"delta": 0.01, "threshold": 5.0})
    version = add_version(api.app, "pump-risk", 1, status="active", active=True)
    good = joined_binary(400, version, seed=1)
    # Then the scores say the opposite of what happens: every case is a sure miss.
    bad = [JoinedOutcome(version, {"probabilities": {"ok": 0.05, "failed": 0.95}}, "ok",
                         START, START + dt.timedelta(days=200, minutes=i)) for i in range(40)]
    record(api.app, good)
    record(api.app, bad)
    with get_database(api.app).read() as session:
        alarm = session.scalars(select(TrackRecordAlarmRow)).one()
    assert alarm.raised_at is not None
    assert alarm.raised_at.replace(tzinfo=dt.UTC) in {j.outcome_at for j in bad}


def test_a_label_outside_the_classes_is_refused(api: ApiClient) -> None:
    create_model(api)
    version = add_version(api.app, "pump-risk", 1, status="active", active=True)
    wrong = [JoinedOutcome(version, {"probabilities": {"ok": 0.5, "failed": 0.5}}, "leaking",
                           START, START)]
    with pytest.raises(InvalidInputError, match="Outcome 0"):
        record(api.app, wrong)
    with get_database(api.app).read() as session:
        assert session.scalar(select(func.count()).select_from(TrackRecordDayRow)) == 0


def test_regression_outcomes_keep_exact_sums(api: ApiClient) -> None:
    create_model(api, task="regression", classes=None, target="flow_m3h")
    version = add_version(api.app, "pump-risk", 1, status="active", active=True)
    rng = np.random.default_rng(4)
    truth = rng.normal(120.0, 15.0, 300)
    served = truth + rng.normal(0.0, 4.0, 300)
    joined = [JoinedOutcome(version, {"value": s}, t, START, START + dt.timedelta(hours=i))
              for i, (s, t) in enumerate(zip(served.tolist(), truth.tolist(), strict=True))]
    record(api.app, joined[:123])
    record(api.app, joined[123:])
    with get_database(api.app).read() as session:
        stored = Tally("regression")
        for row in session.scalars(select(TrackRecordDayRow)):
            stored = stored.merged(tally_of_row("regression", row))
    whole = Tally.of("regression", truth, served[:, None]).metrics()
    for name, value in stored.metrics().items():
        assert value == pytest.approx(whole[name], rel=1e-10)


def test_boolean_and_integer_classes_are_matched_by_their_json_keys(api: ApiClient) -> None:
    # Binary default classes [false, true]: outputs keyed "false"/"true" (class_key).
    create_model(api, classes=None)
    version = add_version(api.app, "pump-risk", 1, status="active", active=True)
    record(api.app, [
        JoinedOutcome(version, {"label": True, "probabilities": {"false": 0.2, "true": 0.8}},
                      True, START, START),
        JoinedOutcome(version, {"label": True, "probabilities": {"false": 0.4, "true": 0.6}},
                      False, START, START)])
    with get_database(api.app).read() as session:
        (row,) = session.scalars(select(TrackRecordDayRow)).all()
        metrics = tally_of_row("binary", row).metrics()
    assert metrics["accuracy"] == 0.5
    # Brier: ((0.8 - 1)^2 + (0.6 - 0)^2) / 2, worked by hand.
    assert metrics["brier"] == pytest.approx((0.04 + 0.36) / 2)


def test_multiclass_outcomes_use_every_class_probability(api: ApiClient) -> None:
    create_model(api, task="multiclass", classes=[1, 2, 3], target="wear_grade")
    version = add_version(api.app, "pump-risk", 1, status="active", active=True)
    record(api.app, [JoinedOutcome(
        version, {"label": 2, "probabilities": {"1": 0.1, "2": 0.7, "3": 0.2}}, 3, START,
        START)])
    with get_database(api.app).read() as session:
        (row,) = session.scalars(select(TrackRecordDayRow)).all()
        metrics = tally_of_row("multiclass", row).metrics()
    # Missed (served 2, outcome 3); log loss -ln 0.2; Brier 0.1^2 + 0.7^2 + 0.8^2, by hand.
    assert metrics["accuracy"] == 0.0
    assert metrics["log_loss"] == pytest.approx(-np.log(0.2))
    assert metrics["brier"] == pytest.approx(0.01 + 0.49 + 0.64)


def test_concurrent_batches_under_the_model_lock_keep_whole_sums(any_api: ApiClient) -> None:
    """Outcome batches run in transactions holding the model row lock (the
    outcomes route's); two threads of them lose no outcome from the sums."""
    import threading

    from service.usecases.common import find_model
    create_model(any_api)
    version = add_version(any_api.app, "pump-risk", 1, status="active", active=True)
    db = get_database(any_api.app)
    failures: list[BaseException] = []

    def send(seed: int) -> None:
        try:
            for batch in range(10):
                joined = joined_binary(50, version, seed=seed * 100 + batch)
                with db.write() as session, session.begin():
                    record_outcomes(session, find_model(session, "pump-risk", lock=True),
                                    joined)
        except BaseException as exc:  # reported below, not lost in the thread
            failures.append(exc)

    threads = [threading.Thread(target=send, args=(seed,)) for seed in (1, 2)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert failures == []
    with db.read() as session:
        total = sum(row.n for row in session.scalars(select(TrackRecordDayRow)))
        alarm = session.scalars(select(TrackRecordAlarmRow)).one()
    assert total == alarm.n == 2 * 10 * 50
