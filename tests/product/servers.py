"""Helpers for tests that start real servers: free loopback ports, waiting, stopping."""

from __future__ import annotations

import contextlib
import os
import signal
import socket
import subprocess
import time
import urllib.error
import urllib.request
from collections.abc import Iterator, Mapping
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def wait_until_answering(url: str, process: subprocess.Popen[bytes], timeout: float = 120.0
                         ) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise RuntimeError(f"server exited early with status {process.returncode}")
        try:
            with urllib.request.urlopen(url, timeout=1) as answer:
                if answer.status == 200:
                    return
        except (urllib.error.URLError, ConnectionError, TimeoutError):
            pass
        time.sleep(0.1)
    raise TimeoutError(f"{url} did not answer within {timeout} s")


@contextlib.contextmanager
def running(command: list[str], env: Mapping[str, str], log: Path) -> Iterator[
        subprocess.Popen[bytes]]:
    """Run ``command`` in its own process group; SIGTERM it (then SIGKILL) on exit."""
    with log.open("wb") as sink:
        process = subprocess.Popen(command, env={**os.environ, **env}, cwd=ROOT,
                                   stdout=sink, stderr=subprocess.STDOUT, process_group=0)
        try:
            yield process
        finally:
            if process.poll() is None:
                os.killpg(process.pid, signal.SIGTERM)
                try:
                    process.wait(timeout=30)
                except subprocess.TimeoutExpired:
                    os.killpg(process.pid, signal.SIGKILL)
                    process.wait()
