"""The drift tally (service/usecases/drift_tally.py): predictions counted in
memory with no database write, flushed as whole rows per process, every
process's rows added up, the flush thread stopped cleanly with a last flush."""

from __future__ import annotations

import datetime as dt
import threading

import numpy as np
import pytest
from sqlalchemy import event, select

from engine.drift_bins import reference_bins
from service.store.drift_tallies import count_tally_rows, sum_tallies
from service.store.tables import DriftTallyRow
from service.usecases.drift_tally import DriftTally
from service.web.extensions import get_database, get_drift_references, get_drift_tally
from tests.service.conftest import build_app
from tests.service.drift_setup import (
    predict_query,
    pump_model_with_reference,
    training_features,
)
from tests.service.helpers import PUMP_SPEC, ApiClient, model_row
from tests.service.predictions_factory import pump_rows

PATH = "/v1/models/pump-risk/predictions"
EPOCH = dt.datetime(2000, 1, 1, tzinfo=dt.UTC)


def sizes_of(app, version_id):
    bins = get_drift_references(app).load(version_id)
    return {b.name: b.size for b in bins}


def writes_during(app, action):
    """The INSERT/UPDATE/DELETE statements the app's engine runs during ``action``."""
    seen = []

    def record(_conn, _cursor, statement, *_rest):
        if statement.lstrip().split()[0].upper() in ("INSERT", "UPDATE", "DELETE"):
            seen.append(statement)

    engine = get_database(app).engine
    event.listen(engine, "before_cursor_execute", record)
    try:
        action()
    finally:
        event.remove(engine, "before_cursor_execute", record)
    return seen


def test_predictions_are_counted_without_a_database_write_and_flushed_whole(database_url):
    app = build_app(database_url, KEELSON_DRIFT_FLUSH_SECONDS=3600)
    api = ApiClient(app)
    version_id = pump_model_with_reference(api)
    tally = get_drift_tally(app)
    get_drift_references(app).load(version_id)  # warm: nothing waits for bins
    rows = pump_rows(25, seed=3)

    def predict_all():
        for row in rows:
            api.request("GET", f"{PATH}?{predict_query(row)}", 200)
        api.request("POST", f"{PATH}?explain=none", 200,
                    json_body={"records": [{"features": r} for r in rows[:5]]})

    assert writes_during(app, predict_all) == []
    assert tally.flush() == 1
    assert tally.flush() == 0  # nothing changed since
    sizes = sizes_of(app, version_id)
    with get_database(app).read() as session:
        summed = sum_tallies(session, model_row(app, "pump-risk").id, version_id, EPOCH, sizes)
    assert summed.predictions == 30 and summed.rows == 1
    bins = get_drift_references(app).get(version_id)
    for b in bins:
        expected = np.zeros(b.size, dtype=np.int64)
        for row in rows + rows[:5]:
            expected[b.bin_of(row[b.name])] += 1
        np.testing.assert_array_equal(summed.counts[b.name], expected)
    tally.close()


def test_the_reference_is_the_latest_training_records_of_the_version(sqlite_url):
    app = build_app(sqlite_url)
    api = ApiClient(app)
    version_id = pump_model_with_reference(api)
    expected = reference_bins(PUMP_SPEC["features"], training_features(app))
    loaded = get_drift_references(app).load(version_id)
    for ours, theirs in zip(loaded, expected, strict=True):
        assert ours.edges == theirs.edges
        np.testing.assert_array_equal(ours.reference, theirs.reference)


def test_rows_seen_before_the_bins_are_read_are_counted_by_the_flush(sqlite_url):
    app = build_app(sqlite_url, KEELSON_DRIFT_FLUSH_SECONDS=3600)
    api = ApiClient(app)
    version_id = pump_model_with_reference(api)
    tally = get_drift_tally(app)
    assert get_drift_references(app).get(version_id) is None
    for row in pump_rows(7, seed=4):
        api.request("GET", f"{PATH}?{predict_query(row)}", 200)
    tally.flush()
    with get_database(app).read() as session:
        summed = sum_tallies(session, model_row(app, "pump-risk").id, version_id, EPOCH,
                             sizes_of(app, version_id))
    assert summed.predictions == 7
    tally.close()


def test_two_processes_write_their_own_rows_and_the_sum_adds_them(database_url):
    app = build_app(database_url)
    api = ApiClient(app)
    version_id = pump_model_with_reference(api)
    model_id = model_row(app, "pump-risk").id
    references = get_drift_references(app)
    references.load(version_id)
    # Two tallies on one database stand for two gunicorn workers.
    first = DriftTally(get_database(app), references, 3600)
    second = DriftTally(get_database(app), references, 3600)
    rows = pump_rows(40, seed=5)
    first.observe(model_id, version_id, rows[:30])
    second.observe(model_id, version_id, rows[30:])
    first.flush()
    second.flush()
    first.observe(model_id, version_id, rows[:2])
    first.flush()  # the same row again, with the new totals
    with get_database(app).read() as session:
        writers = set(session.scalars(select(DriftTallyRow.writer)))
        summed = sum_tallies(session, model_id, version_id, EPOCH, sizes_of(app, version_id))
        assert count_tally_rows(session, model_id) == 2
    assert writers == {first.writer, second.writer}
    assert summed.predictions == 42
    assert int(summed.counts["has_vfd"].sum()) == 42
    first.close()
    second.close()


def test_the_flush_thread_writes_on_its_interval_and_close_stops_it(sqlite_url):
    app = build_app(sqlite_url, KEELSON_DRIFT_FLUSH_SECONDS=0.05)
    api = ApiClient(app)
    version_id = pump_model_with_reference(api)
    model_id = model_row(app, "pump-risk").id
    tally = get_drift_tally(app)
    flushed = threading.Event()
    original = tally.flush

    def watched_flush():
        written = original()
        if written:
            flushed.set()
        return written

    tally.flush = watched_flush
    for row in pump_rows(3, seed=6):
        api.request("GET", f"{PATH}?{predict_query(row)}", 200)
    assert flushed.wait(10), "the flush thread never wrote"
    thread = tally._thread
    assert thread is not None and thread.is_alive()
    tally.observe(model_id, version_id, pump_rows(4, seed=7))
    tally.close()
    assert not thread.is_alive()
    with get_database(app).read() as session:
        summed = sum_tallies(session, model_id, version_id, EPOCH, sizes_of(app, version_id))
    assert summed.predictions == 7  # the last four by close's own flush
    tally.observe(model_id, version_id, pump_rows(1, seed=8))  # closed: ignored
    assert tally._open == {} or all(not t.dirty for t in tally._open.values())


def test_drift_off_counts_nothing(sqlite_url):
    app = build_app(sqlite_url, KEELSON_DRIFT=False)
    assert get_drift_tally(app) is None
    api = ApiClient(app)
    pump_model_with_reference(api)
    api.request("GET", f"{PATH}?{predict_query(pump_rows(1)[0])}", 200)
    with get_database(app).read() as session:
        assert count_tally_rows(session, model_row(app, "pump-risk").id) == 0


def test_a_failed_flush_keeps_the_counts_for_the_next(sqlite_url, monkeypatch):
    import service.usecases.drift_tally as drift_tally

    app = build_app(sqlite_url, KEELSON_DRIFT_FLUSH_SECONDS=3600)
    api = ApiClient(app)
    version_id = pump_model_with_reference(api)
    model_id = model_row(app, "pump-risk").id
    tally = get_drift_tally(app)
    get_drift_references(app).load(version_id)
    tally.observe(model_id, version_id, pump_rows(9, seed=9))
    original = drift_tally.write_tallies

    def unreachable(*args, **kwargs):
        raise OSError("database unreachable")

    monkeypatch.setattr(drift_tally, "write_tallies", unreachable)
    with pytest.raises(OSError):
        tally.flush()
    monkeypatch.setattr(drift_tally, "write_tallies", original)
    assert tally.flush() == 1
    with get_database(app).read() as session:
        summed = sum_tallies(session, model_id, version_id, EPOCH, sizes_of(app, version_id))
    assert summed.predictions == 9
    tally.close()


def test_counts_of_a_deleted_model_are_dropped_at_the_flush(database_url):
    """Predictions counted just before their model was deleted (and its
    versions removed by the delete job) must not fail the flush: a failing
    flush would keep failing, losing every model's counts."""
    from sqlalchemy import delete as delete_rows

    from service.store.tables import VersionRow

    app = build_app(database_url, KEELSON_DRIFT_FLUSH_SECONDS=3600)
    api = ApiClient(app)
    version_id = pump_model_with_reference(api)
    tally = get_drift_tally(app)
    get_drift_references(app).load(version_id)
    for row in pump_rows(5, seed=4):
        api.request("GET", f"{PATH}?{predict_query(row)}", 200)
    api.request("DELETE", "/v1/models/pump-risk?confirm=pump-risk", 202)
    with get_database(app).write() as session:  # what the delete job ends with
        session.execute(delete_rows(VersionRow).where(VersionRow.id == version_id))
        session.commit()
    assert tally.flush() == 1  # handed to the store, which drops it
    with get_database(app).read() as session:
        assert session.scalars(select(DriftTallyRow)).all() == []
    assert tally.flush() == 0  # and not again
    tally.close()
