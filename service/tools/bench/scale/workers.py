"""Worker processes for a scale run, and what /proc says of them."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path

from service.tools.bench.worker import ROOT, _cpu_seconds, _peak_rss_mib

cpu_seconds, peak_rss_mib = _cpu_seconds, _peak_rss_mib


def start_worker(url: str, worker_id: str, log: Path, settings: dict[str, str]
                 ) -> subprocess.Popen[bytes]:
    """``python -m service.worker ID``: the same process ``keelson worker`` runs."""
    env = {**os.environ, "KEELSON_DATABASE_URL": url, **settings,
           "PYTHONPATH": os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")]))}
    with log.open("ab") as out:
        return subprocess.Popen([sys.executable, "-m", "service.worker", worker_id],
                                env=env, stdout=out, stderr=subprocess.STDOUT)


def stop_worker(process: subprocess.Popen[bytes]) -> int:
    if process.poll() is None:
        process.send_signal(signal.SIGTERM)
        try:
            process.wait(60)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait()
    return int(process.returncode)


def rss_mib(pid: int) -> float | None:
    """VmRSS of a process now (Linux /proc), in MiB."""
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return round(int(line.split()[1]) / 1024, 1)
    except OSError:
        return None
    return None
