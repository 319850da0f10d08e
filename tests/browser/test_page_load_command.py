"""`keelson bench page-load` runs end to end: it measures the model page and
makes the README's three screenshots. Its figures are checked for shape only
(speed targets are the benchmark's to report, never a test's).

Our own contract (docs/http-api.md, "The `keelson` command"); PNG signature
and IHDR layout from the PNG specification (W3C, 2003), section 5.
"""

from __future__ import annotations

import json
import struct
import subprocess
import sys
from pathlib import Path

import pytest

from tests.browser.conftest import CHROMIUM, require_browser
from tests.product.servers import ROOT

pytestmark = [pytest.mark.browser, pytest.mark.slow, pytest.mark.xdist_group("browser")]
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def test_the_page_load_bench_measures_the_model_page_and_makes_the_screenshots(
        tmp_path: Path) -> None:
    require_browser()
    # Its own process: the command drives its own Playwright, which cannot start in
    # a thread where the tests' one runs.
    done = subprocess.run(
        [sys.executable, "-m", "service", "bench", "page-load", "--json", "--runs", "1",
         "--records", "1000", "--screenshots", str(tmp_path / "shots"),
         "--chromium", str(CHROMIUM)], cwd=ROOT, capture_output=True, timeout=600)
    assert done.returncode == 0, done.stderr.decode(errors="replace")[-3000:]
    figures = json.loads(done.stdout)
    assert figures["page"] == "/models/pump-risk" and figures["runs"] == 1
    load = figures["load_event_ms"]
    assert 0 < load["cold_median"] == load["cold_max"] and load["warm_median"] > 0
    shipped = figures["js_css_bytes"]
    assert shipped["total"] == sum(shipped["files"].values()) > 0
    assert {name.rsplit(".", 1)[-1] for name in shipped["files"]} == {"js", "css"}

    names = sorted(Path(made).name for made in figures["screenshots"])
    assert names == ["model.png", "overview.png", "what-if.png"]
    for name in names:
        head = (tmp_path / "shots" / name).read_bytes()[:24]
        assert head[:8] == PNG_SIGNATURE and head[12:16] == b"IHDR"
        width, height = struct.unpack(">II", head[16:24])
        assert width == 1280 and height >= 900  # the viewport, the whole page
