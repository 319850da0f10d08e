"""The pages say what is true when a first-time user reads them (our own
contract, docs/http-api.md "Pages"; no outside source): drift bins read as
rounded ranges with the exact edges kept in data-* attributes, the sweeps mark
where the version's training data lay, and a version made serving after the
outcomes arrived neither hides the live figure nor reads as "no reference"."""

from __future__ import annotations

import html
import json
import re

import numpy as np
import pytest
from sqlalchemy import func, select

from service.store.tables import RecordRow
from service.web.extensions import get_database, get_drift_tally, get_version_cache
from service.web.pages.numbers import edge_texts, numeric_bins, rounded
from tests.service.conftest import build_app
from tests.service.drift_setup import pump_model_with_reference, training_features
from tests.service.helpers import ADMIN_TOKEN, ApiClient
from tests.service.page_client import PageClient
from tests.service.predictions_factory import (
    add_version,
    pump_rows,
    pump_rule,
    stored_spec,
    train_learner,
)

PREDICT = "/v1/models/pump-risk/predictions"


@pytest.fixture
def served(database_url: str):
    app = build_app(database_url, KEELSON_DRIFT_FLUSH_SECONDS=3600)
    api = ApiClient(app)
    pump_model_with_reference(api)
    pages = PageClient(app)
    pages.sign_in(ADMIN_TOKEN)
    yield api, pages
    get_drift_tally(app).close()


def test_numbers_are_rounded_without_float_noise() -> None:
    assert rounded(2.1320000000000006) == "2.132"
    assert rounded(50000.0) == "50,000"
    assert rounded(-0.000123456) == "-0.0001235"
    # Neighbours that differ keep the digits that tell them apart.
    assert edge_texts([2.13201, 2.13249, 7.0]) == ["2.132", "2.1325", "7"]


def test_open_ends_are_said_in_words() -> None:
    bins = numeric_bins(["-inf", "2.1320000000000006", "5.0", "9.75"])
    assert [b["short"] for b in bins] == ["< 2.132", "2.132–5", "5–9.75", "≥ 9.75"]
    assert [b["label"] for b in bins] == ["below 2.132", "2.132 to 5", "5 to 9.75",
                                          "9.75 and above"]
    assert (bins[0]["lower"], bins[0]["upper"]) == (None, 2.1320000000000006)
    assert (bins[-1]["lower"], bins[-1]["upper"]) == (9.75, None)


def test_the_distribution_table_reads_as_ranges_and_keeps_the_exact_edges(served) -> None:
    api, pages = served
    page = pages.get("/models/pump-risk?field=vibration_rms").get_data(as_text=True)
    table = page[page.index('data-table="distribution"'):]
    table = table[:table.index("</table>")]
    answer = api.request("GET", "/v1/models/pump-risk/drift", 200)
    (field,) = [f for f in answer["fields"] if f["name"] == "vibration_rms"]
    rows = re.findall(r'<tr data-bin="([^"]*)" data-lower="([^"]*)" data-upper="([^"]*)">'
                      r'<th scope="row">([^<]*)</th>', table)
    assert [r[0] for r in rows] == field["bins"]
    edges = [float(b) for b in field["bins"][1:]]
    assert [float(r[2]) for r in rows[:-1]] == edges  # exact, as the API answers them
    assert [float(r[1]) for r in rows[1:]] == edges
    assert html.unescape(rows[0][3]).startswith("below ")
    assert html.unescape(rows[-1][3]).endswith(" and above")
    assert "-inf" not in re.sub(r'data-[\w-]+="[^"]*"', "", table)


def test_each_sweep_marks_the_training_datas_range(served) -> None:
    _, pages = served
    page = pages.get("/models/pump-risk/what-if?vibration_rms=63.5&pump_family=screw"
                     "&has_vfd=true&show=1").get_data(as_text=True)
    figure = re.search(r'<figure[^>]*data-sweep-field="vibration_rms"[^>]*>', page).group(0)
    low = float(re.search(r'data-trained-low="([^"]+)"', figure).group(1))
    high = float(re.search(r'data-trained-high="([^"]+)"', figure).group(1))
    values = [row["vibration_rms"] for row in training_features(pages.app)]
    # The 1st and 99th percentiles of what the version learned from (numpy's
    # default linear interpolation, as the drift reference computes them).
    assert (low, high) == (float(np.quantile(values, 0.01)), float(np.quantile(values, 0.99)))
    assert "Outside the band the curve is an extrapolation" in page
    xs = json.loads(html.unescape(re.search(r'data-x="([^"]+)"', figure).group(1)))
    marks = re.findall(r'<tr data-inside="(true|false)">', page[page.index(figure):])
    assert marks[:len(xs)] == ["true" if low <= x <= high else "false" for x in xs]
    assert "outside: extrapolation" in page and "within the training data" in page


def test_a_newly_serving_version_shows_the_last_live_figure_and_says_why_no_drift(
        served) -> None:
    api, pages = served
    rows = pump_rows(40, seed=31)
    api.request("POST", PREDICT, 200, json_body={"explain": "none", "records": [
        {"key": f"c-{i}", "features": row} for i, row in enumerate(rows)]})
    api.request("POST", "/v1/models/pump-risk/outcomes", 201, json_body={"outcomes": [
        {"key": f"c-{i}", "label": pump_rule(row)} for i, row in enumerate(rows)]})
    get_drift_tally(pages.app).flush()
    before = pages.get("/").get_data(as_text=True)
    assert 'data-live-version="1" data-live-serving="true"' in before
    # The worker writes version 2 and makes it serve: no predictions, no outcomes yet.
    learner = train_learner(stored_spec(pages.app, "pump-risk"), rows, pump_rule)
    with get_database(pages.app).read() as session:
        last = int(session.scalar(select(func.max(RecordRow.seq))))
    add_version(pages.app, "pump-risk", learner.to_bytes(), activate=True, records_seen=last)
    # This process notices the new pointer at its next check; make that now.
    get_version_cache(pages.app).forget("pump-risk")
    overview = pages.get("/").get_data(as_text=True)
    assert 'data-live-version="1" data-live-serving="false"' in overview
    assert "40 outcomes of version 1" in overview and "not the serving version" in overview
    assert "no reference" not in overview
    cell = re.search(r'<tr data-model="pump-risk".*?</tr>', overview, re.S).group(0)
    assert "no predictions by version 2 in the last 7 days" in cell, cell
    # Version 1's drift over the predictions it served, marked as not serving.
    old = api.request("GET", "/v1/models/pump-risk/drift", 200)
    assert old["version"] == 2 and old["recent_predictions"] == 0 and old["status"] is None
    assert 'data-drift-version="1"' in cell and "not the serving version" in cell
    record = api.request("GET", "/v1/models/pump-risk/track-record", 200)
    assert record["active_version"] == 2  # the API's answer keeps its meaning
    assert [v["version"] for v in record["versions"]] == [1]
    model = pages.get("/models/pump-risk").get_data(as_text=True)
    assert 'data-live-version="1" data-live-serving="false"' in model
    assert 'data-calibration-version="1"' in model
    assert "No predictions by version 2" in model and "data-drift-empty" in model
    assert '<strong data-drift-version="1">version 1, not the serving version</strong>' in model
    assert "predictions version 1 served moved from what version 1 learned from" in model
