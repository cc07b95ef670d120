"""Work that runs after the explorer is shown: clustering and trajectory flags.

Inside a kernel the jobs run one after the other in a worker thread; each result is
handed back to the kernel's event loop (the thread that owns the widgets), which
applies it to the shared model. The status line says what runs and for how long.
Without a running event loop (plain Python, tests) the jobs run at once.
"""

from __future__ import annotations

import ctypes
import functools
import gc
import html
import sys
import threading
import time
from collections.abc import Callable
from typing import Any

import ipywidgets as widgets

from ._messages import MessageArea
from ._util import running_loop

__all__ = ["BackgroundJobs", "Job", "release_freed_memory"]

#: (what the job does, compute(), apply(result)); compute runs off the widget thread
Job = tuple[str, Callable[[], Any], Callable[[Any], None]]


def release_freed_memory() -> bool:
    """Hand memory freed by finished jobs back to the operating system.

    Clustering and flagging allocate large temporaries (feature rows, pair
    distances) and free them; the C allocator keeps freed heap pages for reuse, so
    the kernel's resident memory would stay at the jobs' peak. On glibc (Linux)
    ``malloc_trim(0)`` returns them; elsewhere only the garbage collector runs.
    Nothing the explorer holds is touched.

    Returns
    -------
    bool
        True when the allocator released memory.
    """
    gc.collect()
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL("libc.so.6")
        return bool(libc.malloc_trim(0))
    except (OSError, AttributeError):  # not glibc (musl, ...): nothing to trim
        return False


class BackgroundJobs:
    """Run jobs in a worker thread with a status line, or at once without a kernel loop.

    Parameters
    ----------
    messages : MessageArea
        Where a failed job's error goes (the explorer keeps working without it).
    background : bool, optional
        Run in a worker thread (default: when a kernel's event loop is running).

    Attributes
    ----------
    status : ipywidgets.HTML
        What runs and for how long; empty when nothing runs.
    done : threading.Event
        Set when every job finished and its result was applied.
    seconds : dict
        Wall time of each finished job (s).
    """

    def __init__(self, messages: MessageArea, *, background: bool | None = None) -> None:
        self.messages = messages
        self.loop = running_loop()
        self.background = (self.loop is not None) if background is None else bool(background)
        if self.background and self.loop is None:
            raise RuntimeError("background jobs need a running event loop (a kernel); pass "
                               "background=False in plain Python.")
        self.status = widgets.HTML()
        self.status.add_class("ensemblelab-background")
        self.done = threading.Event()
        self.seconds: dict[str, float] = {}
        self._thread: threading.Thread | None = None

    def run(self, jobs: list[Job]) -> None:
        """Start the jobs (in order)."""
        if not jobs:
            self.done.set()
            return
        if not self.background:
            for name, compute, apply in jobs:
                self._one(name, compute, apply, threaded=False)
            release_freed_memory()
            self.done.set()
            return
        self._show(self._text(jobs[0][0], 0, len(jobs)))  # at once, before the thread runs
        self._thread = threading.Thread(target=self._worker, args=(jobs,), daemon=True,
                                        name="ensemblelab-background")
        self._thread.start()

    def wait(self, timeout: float | None = None) -> bool:
        """Wait until every job finished and was applied; True when done."""
        return self.done.wait(timeout)

    # ------------------------------------------------------------------ internals
    def _text(self, name: str, index: int, total: int) -> str:
        step = f" ({index + 1} of {total})" if total > 1 else ""
        where = "... (in the background; the map is ready to use)" if self.background else "..."
        return (f"<span class='ensemblelab-busy'>{html.escape(name)}{step} "
                f"{where}</span>")

    def _show(self, text: str) -> None:
        self.status.value = text

    def _call(self, func: Callable[..., Any], *args: Any) -> None:
        """Run `func` on the widget thread (the kernel's loop) or here without one."""
        if self.background and self.loop is not None:
            self.loop.call_soon_threadsafe(self.messages.guard(func), *args)
        else:
            func(*args)

    def _one(self, name: str, compute: Callable[[], Any], apply: Callable[[Any], None], *,
             threaded: bool, index: int = 0, total: int = 1) -> None:
        start = time.perf_counter()
        text = self._text(name, index, total)
        if threaded:
            self._call(self._show, text)
        else:
            self._show(text)
        try:
            result = compute()
        except Exception as exc:  # noqa: BLE001 - shown; the explorer works without it
            report = functools.partial(self.messages.exception, exc, where=name)
            self._call(report)
            return
        finally:
            self.seconds[name] = time.perf_counter() - start
        self._call(apply, result)

    def _worker(self, jobs: list[Job]) -> None:
        for i, (name, compute, apply) in enumerate(jobs):
            self._one(name, compute, apply, threaded=True, index=i, total=len(jobs))
        self._call(self._finish)

    def _finish(self) -> None:
        self._show("")
        release_freed_memory()
        self.done.set()
