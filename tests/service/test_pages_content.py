"""What the pages show, against the API's own answers for the same model
(our own contract, docs/http-api.md "Pages"; no outside source)."""

from __future__ import annotations

import html
import json
import re

import pytest

from tests.service.helpers import ADMIN_TOKEN, ApiClient, create_model
from tests.service.page_client import PageClient, served_model

CASE = {"vibration_rms": "63.5", "pump_family": "screw", "has_vfd": "true"}


@pytest.fixture
def pages(any_api: ApiClient) -> PageClient:
    create_model(any_api)
    served_model(any_api.app, versions=3)
    client = PageClient(any_api.app)
    client.sign_in(ADMIN_TOKEN)
    return client


def attribute(page: str, element: str, name: str) -> str:
    found = re.search(rf'{element}[^>]*?\s{name}="([^"]*)"', page, re.S)
    assert found is not None, (element, name)
    return html.unescape(found.group(1))


def test_the_model_page_has_a_row_and_a_curve_point_per_version(pages: PageClient) -> None:
    page = pages.get("/models/pump-risk").get_data(as_text=True)
    rows = re.findall(r'<tr data-version="(\d+)" data-status="(\w+)"', page)
    assert sorted(rows) == [("1", "active"), ("2", "candidate"), ("3", "candidate")]
    # served_model stores no figures: the curve plots versions with one only.
    assert attribute(page, 'data-chart="learning-curve"', "data-points") == "0"


def test_the_curve_plots_every_version_with_a_figure(pages: PageClient) -> None:
    from sqlalchemy import update

    from service.store.tables import VersionRow
    from service.web.extensions import get_database
    with get_database(pages.app).write() as session:
        session.execute(update(VersionRow).values(
            metrics={"holdout": {"n": 10, "log_loss": 0.3}, "prequential": {"n": 9}}))
        session.commit()
    page = pages.get("/models/pump-risk").get_data(as_text=True)
    assert attribute(page, 'data-chart="learning-curve"', "data-points") == "3"
    series = json.loads(attribute(page, 'data-chart="learning-curve"', "data-series"))
    assert series["version"] == [1, 2, 3] and series["x"] == [100, 200, 300]
    assert series["holdout"] == [0.3, 0.3, 0.3] and series["active"] == 0


def test_the_what_if_shows_the_apis_answer(pages: PageClient, any_api: ApiClient) -> None:
    query = "&".join(f"{k}={v}" for k, v in CASE.items())
    page = pages.get(f"/models/pump-risk/what-if?{query}&show=1").get_data(as_text=True)
    answer = any_api.request("GET", f"/v1/models/pump-risk/predictions?{query}", 200)
    for label, p in answer["result"]["probabilities"].items():
        shown = attribute(page, f'data-output="probability" data-class="{label}"', "data-value")
        assert float(shown) == p
    shown = dict(re.findall(r'data-attribution-field="(\w+)" data-value="([^"]+)"', page))
    assert {k: float(v) for k, v in shown.items()} == answer["explanation"]["attributions"]
    for field, value in answer["explanation"]["attributions"].items():
        sign = attribute(page, f'data-attribution-field="{field}"', "data-sign")
        assert sign == ("raises" if value > 0 else "lowers" if value < 0 else "none")


def test_the_what_if_sweeps_are_the_sweeps_route(pages: PageClient, any_api: ApiClient) -> None:
    query = "&".join(f"{k}={v}" for k, v in CASE.items())
    page = pages.get(f"/models/pump-risk/what-if?{query}&show=1").get_data(as_text=True)
    xs = json.loads(attribute(page, 'data-sweep-field="vibration_rms"', "data-x"))
    ys = json.loads(attribute(page, 'data-sweep-field="vibration_rms"', "data-y"))
    shown_class = attribute(page, 'data-sweep-field="vibration_rms"', "data-sweep-class")
    body = any_api.request("POST", "/v1/models/pump-risk/sweeps", 200, json_body={
        "features": {"vibration_rms": 63.5, "pump_family": "screw", "has_vfd": True}})
    assert body["output"] == shown_class
    assert (xs, ys) == (body["sweeps"][0]["x"], body["sweeps"][0]["y"])


def test_the_what_if_form_starts_from_the_baseline(pages: PageClient) -> None:
    page = pages.get("/models/pump-risk/what-if").get_data(as_text=True)
    assert re.search(r'<input id="f-vibration_rms" name="vibration_rms" type="number"', page)
    assert 'min="0"' in page and 'max="100"' in page and "(mm/s)" in page
    assert '<select id="f-pump_family" name="pump_family">' in page
    assert 'type="checkbox" role="switch" id="f-has_vfd"' in page
    assert "decision support, not decisions" in page
    assert "data-output" not in page  # nothing scored until the form is sent


def test_a_bad_value_is_shown_beside_its_field(pages: PageClient) -> None:
    page = pages.get("/models/pump-risk/what-if?vibration_rms=lots&pump_family=screw&show=1"
                     ).get_data(as_text=True)
    assert 'id="e-vibration_rms"' in page and "data-output" not in page


def test_a_regression_what_if_shows_the_value_and_its_sweeps(any_api: ApiClient) -> None:
    from tests.service.predictions_factory import (
        add_version,
        numeric_rows,
        stored_spec,
        train_learner,
    )
    any_api.request("POST", "/v1/models", 201, json_body={
        "name": "flow-rate", "task": "regression", "target": "flow_m3h", "classes": None,
        "features": [{"name": "a", "type": "numeric", "min": 0, "max": 10},
                     {"name": "b", "type": "numeric", "min": -5, "max": 5}]})
    learner = train_learner(stored_spec(any_api.app, "flow-rate"), numeric_rows(200),
                            lambda row: 2 * row["a"] - row["b"])
    add_version(any_api.app, "flow-rate", learner.to_bytes())
    pages = PageClient(any_api.app)
    pages.sign_in(ADMIN_TOKEN)
    page = pages.get("/models/flow-rate/what-if?a=3&b=1&show=1").get_data(as_text=True)
    answer = any_api.request("GET", "/v1/models/flow-rate/predictions?a=3&b=1", 200)
    assert float(attribute(page, 'data-output="value"', "data-value")) == \
        answer["result"]["value"]
    assert 'data-sweep-field="a"' in page and 'data-sweep-field="b"' in page
    assert "data-sweep-class" not in page
    pages.get("/models/flow-rate")  # no calibration for regression, and no error
