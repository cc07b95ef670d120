"""Thread pools for small inputs: one thread where start-up and spin-waiting dominate.

scikit-learn (OpenMP) and BLAS start a thread pool per call; on inputs of a few
thousand rows the work per call is milliseconds, while a pool whose threads spin-wait
for a core (a loaded laptop, a shared machine, a notebook next to a browser) can cost
seconds. :func:`few_threads` runs such calls on one thread; results are unchanged
(the libraries' reductions do not depend on the thread count beyond round-off; the
tests compare labels and values).
"""

from __future__ import annotations

import contextlib
import sys
from collections.abc import Iterator
from typing import Any

__all__ = ["THREADED_MIN_ROWS", "few_threads", "thread_controller"]

#: fewest rows for which the libraries' thread pools are used (below: one thread);
#: the 80-trajectory demo (2 x 10^4 snapshots) clusters in ~1 s on one thread and took
#: 7 s with two spin-waiting OpenMP threads on a loaded 2-core machine
#: (benchmarks/bench_report.py)
THREADED_MIN_ROWS = 200_000


_CONTROLLER: dict[str, Any] = {}


def thread_controller() -> Any:
    """The threadpoolctl controller of the loaded OpenMP/BLAS libraries, made again only
    after new modules were imported (a new one scans every loaded library: ~3 ms, which
    dozens of small calls in a report added up to 0.1 s)."""
    from threadpoolctl import ThreadpoolController

    key = len(sys.modules)  # native libraries arrive with imports
    if _CONTROLLER.get("key") != key:
        _CONTROLLER["ctl"], _CONTROLLER["key"] = ThreadpoolController(), key
    return _CONTROLLER["ctl"]


@contextlib.contextmanager
def few_threads(n_rows: int) -> Iterator[None]:
    """Limit OpenMP/BLAS pools to one thread while inside, when `n_rows` is small.

    Parameters
    ----------
    n_rows : int
        Rows (snapshots, samples) the enclosed work handles; at or above
        :data:`THREADED_MIN_ROWS` the pools are left as they are.
    """
    if n_rows >= THREADED_MIN_ROWS:
        yield
        return
    with thread_controller().limit(limits=1):
        yield
