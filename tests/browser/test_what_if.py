"""The what-if page in headless Chromium: the form filled in as a person would,
its score held to the API's answer for the same record, one attribution per
field, and every sweep point held to a direct prediction of the same inputs.

Our own contract (docs/http-api.md, predictions and sweeps); sweeps are
individual conditional expectation curves (Goldstein, Kapelner, Bleich &
Pitkin, "Peeking Inside the Black Box", JCGS 24(1), 2015): the model's output
as one field moves while the others stay put, which is what the check below
rebuilds one prediction at a time.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any

import pytest

from service.tools.bench.served import Served
from service.tools.demo import data as demo_data
from tests.browser.pages import api, sign_in
from tests.browser.watch import Watched

pytestmark = [pytest.mark.browser, pytest.mark.xdist_group("browser")]

# A case to fill in (invented, not a check value: every figure checked below
# is the API's answer for it).
CASE = dict(demo_data.SHOWCASE[0][1])


def _fill(page: Watched, case: dict[str, Any]) -> None:
    for feature in demo_data.model_spec()["features"]:
        control = page.page.locator(f'[name="{feature["name"]}"]')
        value = case[feature["name"]]
        if feature["type"] == "numeric":
            control.fill(str(value))
        elif feature["type"] == "categorical":
            control.select_option(value)
        else:
            control.set_checked(bool(value))


def _scored_case(watch: Callable[[], Watched], served: Served) -> Watched:
    page = watch()
    sign_in(page, served.predict_token)
    page.goto(f"/models/{served.model}/what-if")
    _fill(page, CASE)
    page.submit(page.page.get_by_role("button", name="Score this case"))
    page.page.locator("[data-result-version]").wait_for()
    return page


def _predictions(served: Served, records: list[dict[str, Any]], version: int,
                 explain: str) -> list[dict[str, Any]]:
    status, answer = api(served, "POST", f"/v1/models/{served.model}/predictions",
                         {"records": [{"features": r} for r in records],
                          "version": version, "explain": explain},
                         token=served.predict_token)
    assert status == 200, answer
    return list(answer["results"])


def test_a_what_if_shows_the_apis_probability_and_one_attribution_per_field(
        watch: Callable[[], Watched], served: Served) -> None:
    page = _scored_case(watch, served)
    version = int(page.page.locator("[data-result-version]").get_attribute(
        "data-result-version") or "0")
    expected, = _predictions(served, [CASE], version, "integrated_gradients")

    shown = page.page.locator('[data-output="probability"]')
    assert shown.count() == len(demo_data.model_spec()["classes"])
    for label, probability in expected["result"]["probabilities"].items():
        cell = page.page.locator(f'[data-output="probability"][data-class="{label}"]')
        assert cell.inner_text() == f"{probability:.3f}"  # what a person reads
        assert float(cell.get_attribute("data-value") or "nan") == pytest.approx(
            probability, abs=1e-9)

    attributions = page.page.locator("[data-attribution-field]")
    fields = [f["name"] for f in demo_data.model_spec()["features"]]
    assert sorted(attributions.evaluate_all(
        "items => items.map(i => i.dataset.attributionField)")) == sorted(fields)
    for field, value in expected["explanation"]["attributions"].items():
        item = page.page.locator(f'[data-attribution-field="{field}"]')
        assert float(item.get_attribute("data-value") or "nan") == pytest.approx(
            value, abs=1e-9)
        said = item.inner_text()  # the sign in words, never in colour alone
        assert ("raises" in said) == (value > 0) and ("lowers" in said) == (value < 0)


def test_every_sweep_point_is_the_prediction_of_the_same_inputs(
        watch: Callable[[], Watched], served: Served) -> None:
    page = _scored_case(watch, served)
    version = int(page.page.locator("[data-result-version]").get_attribute(
        "data-result-version") or "0")
    sweeps = page.page.locator("[data-sweep-field]")
    numeric = [f["name"] for f in demo_data.model_spec()["features"]
               if f["type"] == "numeric"]
    assert sorted(sweeps.evaluate_all("s => s.map(e => e.dataset.sweepField)")) == \
        sorted(numeric)

    for field in numeric:
        sweep = page.page.locator(f'[data-sweep-field="{field}"]')
        xs = json.loads(sweep.get_attribute("data-x") or "[]")
        ys = json.loads(sweep.get_attribute("data-y") or "[]")
        swept_class = sweep.get_attribute("data-sweep-class")
        assert len(xs) == len(ys) >= 2 and xs == sorted(xs)
        assert float(sweep.get_attribute("data-current") or "nan") == CASE[field]
        results = _predictions(served, [{**CASE, field: x} for x in xs], version, "none")
        direct = [r["result"]["probabilities"][swept_class] for r in results]
        assert ys == pytest.approx(direct, abs=1e-9)
