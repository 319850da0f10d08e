"""Each long-running process keeps BLAS to one thread (service/process.py),
whether or not NumPy was loaded when it asked: the worker and the API
processes ask before their first NumPy import (gunicorn's post_fork runs
before the app loads)."""

from __future__ import annotations

import json
import subprocess
import sys

from tests.worker.helpers import ROOT

PROBE = """
import json, sys
from service.process import pin_blas_to_one_thread
assert "numpy" not in sys.modules
pin_blas_to_one_thread()
import numpy
from threadpoolctl import threadpool_info
print(json.dumps([i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"]))
"""


def test_blas_is_pinned_to_one_thread_even_before_numpy_is_loaded() -> None:
    out = subprocess.run([sys.executable, "-c", PROBE], cwd=ROOT, capture_output=True,
                         text=True, check=True, env={"PATH": "/usr/bin:/bin"})
    threads = json.loads(out.stdout)
    assert threads and set(threads) == {1}, threads
