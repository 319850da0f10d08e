"""One BLAS thread per process.

Keelson's arrays are small (one record, or a few dozen integrated-gradient
steps): a multi-threaded BLAS spends more on waking and spinning its threads
than it saves, and on a shared host it takes cores from the database and the
API. Each long-running process pins BLAS to one thread at start and scales
out by processes instead (measured: the worker's CPU for 100k records fell
from about 9 s to 3.5 s on 2 cores, `keelson bench worker`).
"""

from __future__ import annotations

from threadpoolctl import threadpool_limits


def pin_blas_to_one_thread() -> None:
    """Limit every loaded BLAS library to one thread for the rest of the process."""
    threadpool_limits(limits=1, user_api="blas")
