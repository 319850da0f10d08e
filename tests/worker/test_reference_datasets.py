"""Open datasets shipped with scikit-learn, sent through the HTTP API as
records, retrained through the admin endpoint by a running worker, and scored
on the records the service held out.

- Breast Cancer Wisconsin (Diagnostic), 569 x 30: holdout accuracy >= 0.95
  (Street, Wolberg & Mangasarian 1993; UCI copy shipped with scikit-learn;
  the 0.95 floor is common practice).
- Iris, 150 x 4, three classes: holdout accuracy >= 0.9 (Fisher 1936).

The holdout accuracy is computed here from predictions served over HTTP for
the held-out records (pinned to the retrain's version), against the dataset's
own labels; the version's stored holdout metrics must agree with it.
"""

from __future__ import annotations

import re
from typing import Any

import pytest
from sklearn.datasets import load_breast_cancer, load_iris
from sqlalchemy import select

from service.store.tables import RecordRow
from service.web.app import create_app
from tests.worker.helpers import database, wait_until, worker_thread

TOKEN = "reference-admin-token"
AUTH = {"Authorization": f"Bearer {TOKEN}"}


def field(name: str) -> str:
    return re.sub(r"[^a-z0-9]+", "_", name.lower()).strip("_")


def call(client: Any, method: str, path: str, expect: int, **kwargs: Any) -> Any:
    response = client.open(path, method=method, headers=AUTH, **kwargs)
    assert response.status_code == expect, response.get_data(as_text=True)
    return response.get_json()


@pytest.mark.parametrize(
    ("loader", "name", "task", "training", "floor"),
    [
        (load_breast_cancer, "breast-cancer", "binary", {}, 0.95),
        # 120 training rows: a larger step and smaller batches, or 200 epochs
        # are only a few hundred steps.
        (load_iris, "iris", "multiclass", {"learning_rate": 0.05, "batch_size": 16}, 0.9),
    ],
)
def test_a_dataset_sent_as_records_and_retrained_scores_its_holdout(
    sqlite_url: str, loader: Any, name: str, task: str, training: dict, floor: float
) -> None:
    data = loader()
    fields = [field(f) for f in data.feature_names]
    classes = [str(c) for c in data.target_names]
    client = create_app({"KEELSON_DATABASE_URL": sqlite_url,
                         "KEELSON_ADMIN_TOKEN": TOKEN}).test_client()
    spec = {"name": name, "task": task, "target": "diagnosis", "classes": classes,
            "features": [{"name": f, "type": "numeric"} for f in fields],
            "training": training}
    call(client, "POST", "/v1/models", 201, json=spec)
    records = [{"key": f"{name}-{i}",
                "features": dict(zip(fields, map(float, row), strict=True)),
                "label": classes[target]}
               for i, (row, target) in enumerate(zip(data.data, data.target, strict=True))]
    assert call(client, "POST", f"/v1/models/{name}/records", 201,
                json={"records": records}) == {"accepted": len(records), "duplicates": 0}

    job = call(client, "POST", f"/v1/models/{name}/retrain", 202,
               json={"warm_start": False})["job"]
    with worker_thread(sqlite_url):
        done = wait_until(lambda: _finished(client, job["id"]), timeout=120)
    assert done["status"] == "succeeded", done

    db = database(sqlite_url)
    with db.read() as session:
        held_out = set(session.scalars(select(RecordRow.key).where(RecordRow.split == "holdout")))
    db.engine.dispose()
    holdout = [r for r in records if r["key"] in held_out]
    assert 0.1 < len(holdout) / len(records) < 0.3  # holdout_fraction 0.2 by key hash
    answer = call(client, "POST",
                  f"/v1/models/{name}/predictions?explain=none&version={done['version']}", 200,
                  json={"records": [{"features": r["features"]} for r in holdout]})
    predicted = [result["result"]["label"] for result in answer["results"]]
    accuracy = sum(p == r["label"] for p, r in zip(predicted, holdout, strict=True)) / len(holdout)
    print(name, "holdout accuracy", accuracy, "of", len(holdout))
    assert accuracy >= floor, accuracy

    retrained = call(client, "GET", f"/v1/models/{name}/versions/{done['version']}", 200)
    assert retrained["origin"] == "retrain"
    assert retrained["metrics"]["holdout"]["accuracy"] == pytest.approx(accuracy, abs=1e-12)


def _finished(client: Any, job_id: int) -> dict | None:
    job = call(client, "GET", f"/v1/jobs/{job_id}", 200)
    return job if job["status"] in ("succeeded", "failed") else None
