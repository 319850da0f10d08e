"""``keelson serve``: gunicorn and a training worker as two child processes.

Both children run in their own process group, so a Ctrl-C in the terminal
reaches only this supervisor, which then sends each child SIGTERM: gunicorn's
graceful stop (SIGINT would make it quit at once) and the worker's "finish the
step, write a version, exit". If either child dies on its own, the other is
stopped too and the exit status says so.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from collections.abc import Mapping

from service.config import read_setting
from service.process import block_stop_signals, stop_on_signals

# gunicorn's graceful timeout plus a margin; after that a child is killed.
STOP_GRACE_SECONDS = 30.0


def server_environment(
    host: str | None, port: int | None, web_workers: int | None,
    base: Mapping[str, str] | None = None,
) -> dict[str, str]:
    """The children's environment: ours, with the command-line choices on top."""
    env = dict(os.environ if base is None else base)
    if host is not None:
        env["KEELSON_HOST"] = host
    if port is not None:
        env["KEELSON_PORT"] = str(port)
    if web_workers is not None:
        env["KEELSON_WEB_WORKERS"] = str(web_workers)
    return env


def listen_address(env: Mapping[str, str]) -> str:
    host, port = read_setting("KEELSON_HOST", env), read_setting("KEELSON_PORT", env)
    return f"http://{host}:{port}"


def run_server(
    host: str | None = None, port: int | None = None, web_workers: int | None = None,
    with_worker: bool = True,
) -> int:
    """Run until a signal or a child's death; return the exit status."""
    env = server_environment(host, port, web_workers)
    own_metrics_dir = None
    if read_setting("PROMETHEUS_MULTIPROC_DIR", env) is None:
        own_metrics_dir = tempfile.mkdtemp(prefix="keelson-metrics-")
        env["PROMETHEUS_MULTIPROC_DIR"] = own_metrics_dir
    children: dict[str, subprocess.Popen[bytes]] = {}
    # Installed already by the entry point when `keelson serve` started; a stop
    # that came while it was loading or upgrading the schema is honoured here.
    stop = stop_on_signals()
    try:
        if stop.is_set():
            print("keelson: stopped while starting; nothing was started", file=sys.stderr,
                  flush=True)
            return 0
        children["api"] = subprocess.Popen(
            [sys.executable, "-m", "gunicorn", "--config", "python:service.web.server"],
            env=env, process_group=0, preexec_fn=_stop_with_parent,
        )
        if with_worker:
            children["worker"] = subprocess.Popen(
                [sys.executable, "-m", "service", "worker"], env=env, process_group=0,
                preexec_fn=_worker_child,
            )
        print(f"keelson: API on {listen_address(env)}"
              f"{' with a training worker' if with_worker else ''}; Ctrl-C stops",
              file=sys.stderr, flush=True)
        failed: tuple[str, int] | None = None
        while not stop.is_set() and failed is None:
            for name, child in children.items():
                code = child.poll()
                if code is not None:
                    failed = (name, code)
                    break
            stop.wait(0.2)
        status = _stop_all(children)
        if failed is not None:
            name, code = failed
            print(f"keelson: the {name} process exited with status {code}; stopped the rest",
                  file=sys.stderr, flush=True)
            return code or 1
        return status
    finally:
        _stop_all(children)
        if own_metrics_dir is not None:
            shutil.rmtree(own_metrics_dir, ignore_errors=True)


def _worker_child() -> None:
    """In the worker child, before exec: as ``_stop_with_parent``, and start
    with SIGTERM and SIGINT blocked, so a stop sent while its interpreter loads
    waits (pending) for the handler ``service.process.stop_on_signals``
    installs, which unblocks them, instead of killing it mid-start. (Not for
    gunicorn: it installs its handlers without unblocking.)"""
    block_stop_signals()
    _stop_with_parent()


def _stop_with_parent() -> None:
    """In the child, before exec: get SIGTERM if this supervisor dies, even by
    SIGKILL, so no orphan keeps serving (Linux prctl PR_SET_PDEATHSIG)."""
    if not sys.platform.startswith("linux"):
        return
    import ctypes

    pr_set_pdeathsig = 1
    with contextlib.suppress(OSError, AttributeError):
        ctypes.CDLL(None, use_errno=True).prctl(pr_set_pdeathsig, signal.SIGTERM)


def _stop_all(children: Mapping[str, subprocess.Popen[bytes]]) -> int:
    """SIGTERM every live child, wait for the lot, kill stragglers; 0 if all ended well."""
    for child in children.values():
        if child.poll() is None:
            child.send_signal(signal.SIGTERM)
    deadline = time.monotonic() + STOP_GRACE_SECONDS
    status = 0
    for child in children.values():
        try:
            code = child.wait(timeout=max(0.1, deadline - time.monotonic()))
        except subprocess.TimeoutExpired:
            child.kill()
            code = child.wait()
        # A child ended by our own SIGTERM is a clean stop.
        if code not in (0, -signal.SIGTERM):
            status = code if code > 0 else 1
    return status
