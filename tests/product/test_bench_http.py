"""`keelson bench http` reads wrk's report correctly.

The first sample is wrk 4.1's `--latency` report as printed here (Debian's wrk
package against Python's http.server); the error lines of the second follow
wrk's report format from memory (src/wrk.c prints them only when non-zero).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from service.tools.bench.http import parse_wrk

CLEAN = """Running 2s test @ http://127.0.0.1:8856/
  1 threads and 2 connections
  Thread Stats   Avg      Stdev     Max   +/- Stdev
    Latency     6.89ms    6.83ms  43.80ms   88.37%
    Req/Sec   358.45     85.08   480.00     65.00%
  Latency Distribution
     50%    4.03ms
     75%    7.61ms
     90%   15.88ms
     99%   34.10ms
  717 requests in 2.02s, 4.90MB read
Requests/sec:    355.34
Transfer/sec:      2.43MB
"""

WITH_ERRORS = """Running 10s test @ http://127.0.0.1:9000/v1/models/m/records
  2 threads and 16 connections
  Thread Stats   Avg      Stdev     Max   +/- Stdev
    Latency   812.33ms  402.10ms   2.58s    70.00%
    Req/Sec     9.12      4.01    20.00     60.00%
  Latency Distribution
     50%  750.20ms
     75%    1.02s
     90%    1.50s
     99%    2.58s
  160 requests in 10.04s, 40.12KB read
  Socket errors: connect 0, read 2, write 0, timeout 5
  Non-2xx or 3xx responses: 12
Requests/sec:     15.94
Transfer/sec:      4.00KB
"""


def test_a_clean_report_gives_rate_percentiles_and_no_errors() -> None:
    assert parse_wrk(CLEAN) == {
        "requests_per_s": 355.34, "requests": 717, "p50_ms": 4.03, "p90_ms": 15.88,
        "p99_ms": 34.1, "non_2xx": 0, "socket_errors": 0}


def test_seconds_are_converted_and_errors_counted() -> None:
    figures = parse_wrk(WITH_ERRORS)
    assert figures["p50_ms"] == pytest.approx(750.2)
    assert figures["p99_ms"] == pytest.approx(2580.0)
    assert figures["non_2xx"] == 12
    assert figures["socket_errors"] == 7


def test_output_that_is_not_a_report_is_refused() -> None:
    with pytest.raises(Exception, match="could not read wrk's output"):
        parse_wrk("unable to connect to 127.0.0.1:1 Connection refused")


def test_without_wrk_the_command_says_what_to_install(monkeypatch: pytest.MonkeyPatch,
                                                      tmp_path: Path) -> None:
    from click.testing import CliRunner

    from service.tools.cli import cli

    monkeypatch.setenv("PATH", str(tmp_path))  # an empty folder: no wrk on it
    result = CliRunner().invoke(cli, ["bench", "http", "--json"], prog_name="keelson")
    assert result.exit_code == 1
    assert "needs wrk" in result.output and "apt-get install wrk" in result.output
    assert "Nothing was measured" in result.output


def test_bench_cases_without_wrk_says_what_to_install(monkeypatch: pytest.MonkeyPatch,
                                                      tmp_path: Path) -> None:
    from click.testing import CliRunner

    from service.tools.cli import cli

    monkeypatch.setenv("PATH", str(tmp_path))
    result = CliRunner().invoke(cli, ["bench", "cases", "--json"], prog_name="keelson")
    assert result.exit_code == 1
    assert "keelson bench cases needs wrk" in result.output
    assert "Nothing was measured" in result.output
