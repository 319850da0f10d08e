"""Probe: no model is too large for the server that stores it (keelson serve
with its worker, on SQLite and PostgreSQL).

- the reported spec (1,000 fields of 1,000 levels, 8 x 4,096 hidden units,
  some 10 MB) is refused at once (422 naming the limit), not stored;
- ``GET /v1/models`` answers a bounded page, whatever the number of models,
  and a misspelt paging parameter is refused rather than ignored;
- ``checkpoint_every: 1`` on a network of a quarter million parameters is
  refused stating the smallest spacing; at that spacing the worker writes at
  most ``KEELSON_MAX_VERSION_BYTES_PER_RECORD`` snapshot bytes per record.

The service-level cases are tests/service/test_model_limits.py and
tests/service/test_paging.py. Figures are printed (run with -s).
"""

from __future__ import annotations

import json
import time
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import create_engine, func, select

from service.store.tables import ModelRow, VersionRow
from tests.reliability.harness import Client, api_server, wait_for

pytestmark = pytest.mark.slow
FLOOR = 65_536  # KEELSON_MAX_VERSION_BYTES_PER_RECORD's default


def pump_spec(name: str, **changes: Any) -> dict[str, Any]:
    return {"name": name, "task": "regression", "target": "flow_m3h",
            "features": [{"name": f"sensor_{i}", "type": "numeric"} for i in range(20)],
            **changes}


def test_sizes_are_bounded_on_a_real_server(database_url: str, tmp_path: Path) -> None:
    figures: dict[str, Any] = {}
    # No idle versions: every version the worker writes is a count boundary.
    with api_server(database_url, tmp_path, workers=1, with_worker=True,
                    KEELSON_WORKER_IDLE_SECONDS="600") as (base, _process):
        client = Client(base)

        # 1. The reported spec.
        reported = {"name": "pump-giant", "task": "binary", "target": "failed",
                    "features": [{"name": f"station_{i}", "type": "categorical",
                                  "levels": [f"pump-{j}" for j in range(1000)]}
                                 for i in range(1000)],
                    "hidden_layers": [4096] * 8}
        raw = json.dumps(reported).encode()
        began = time.monotonic()
        status, body, _ = client.request("POST", "/v1/models", raw=raw)
        figures["reported_spec_bytes"] = len(raw)
        figures["reported_refused_in_s"] = round(time.monotonic() - began, 3)
        assert status == 422, body
        assert "at most 65,536 (KEELSON_MAX_SPEC_BYTES)" in body["errors"]["body"][0]
        assert figures["reported_refused_in_s"] < 2.0

        # 2. checkpoint_every: 1 on a large network, then the smallest spacing.
        large = pump_spec("pump-large", hidden_layers=[512, 512],
                          training={"checkpoint_every": 1, "warmup_records": 16,
                                    "holdout_fraction": 0.0})
        status, body, _ = client.request("POST", "/v1/models", large)
        assert status == 422 and list(body["errors"]) == ["training.checkpoint_every"]
        message = body["errors"]["training.checkpoint_every"][0]
        spacing = int(message.rsplit(" ", 1)[1].rstrip(".").replace(",", ""))
        figures["smallest_checkpoint_every"] = spacing
        large["training"]["checkpoint_every"] = spacing
        assert client.request("POST", "/v1/models", large)[0] == 201
        records = [{"features": {f"sensor_{i}": float((n * 7 + i) % 13) for i in range(20)},
                    "label": float(n % 5), "key": f"week-{n}"} for n in range(16 + 3 * spacing)]
        assert client.request("POST", "/v1/models/pump-large/records",
                              {"records": records})[0] == 201

        def versions() -> list[dict[str, Any]]:
            status, page, _ = client.request("GET", "/v1/models/pump-large/versions")
            assert status == 200, page
            return list(page["versions"])

        wait_for(lambda: len(versions()) >= 3, timeout=120)
        engine = create_engine(database_url)
        try:
            with engine.connect() as connection:
                written = connection.execute(
                    select(VersionRow.number, VersionRow.records_seen,
                           func.length(VersionRow.snapshot))
                    .join(ModelRow, ModelRow.id == VersionRow.model_id)
                    .where(ModelRow.name == "pump-large").order_by(VersionRow.number)).all()
        finally:
            engine.dispose()
        seen = [0] + [row.records_seen for row in written]
        per_record = [size / (seen[i + 1] - seen[i])
                      for i, (_, _, size) in enumerate(written)]
        figures["version_bytes"] = [row[2] for row in written]
        figures["bytes_per_record"] = [round(x) for x in per_record]
        assert [row.records_seen for row in written][:3] == [spacing, 2 * spacing, 3 * spacing]
        assert max(per_record) <= FLOOR

        # 3. Pages: 120 models listed 100 at a time; a misspelt parameter is refused.
        for n in range(119):
            assert client.request("POST", "/v1/models", pump_spec(f"station-{n:03d}"))[0] == 201
        status, page, _ = client.request("GET", "/v1/models")
        assert status == 200 and len(page["models"]) == 100
        figures["first_page_bytes"] = len(json.dumps(page))
        status, rest, _ = client.request("GET", f"/v1/models?after={page['next']}")
        assert len(rest["models"]) == 20 and rest["next"] is None
        status, body, _ = client.request("GET", "/v1/models?per_page=1000")
        assert status == 422 and list(body["errors"]) == ["query.per_page"]
        client.close()
    print(f"probe figures: {json.dumps(figures)}")
