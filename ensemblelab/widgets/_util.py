"""Small helpers shared by the views: debouncing, busy indicator, figure helpers."""

from __future__ import annotations

import asyncio
import contextlib
from collections.abc import Callable, Iterator
from typing import Any

import ipywidgets as widgets

__all__ = ["Debouncer", "busy", "format_percent", "trait_default", "running_loop",
           "legend_html"]


class Debouncer:
    """Call `func` once, `delay` seconds after the last of a burst of triggers.

    Inside a running kernel the call is scheduled on the kernel's event loop
    (the thread that owns the widgets). With ``delay == 0`` or without a running
    event loop (plain Python, tests) the call happens at once.

    Parameters
    ----------
    func : callable
        Called with no arguments.
    delay : float
        Seconds of quiet before the call.
    """

    def __init__(self, func: Callable[[], Any], *, delay: float = 0.3) -> None:
        self.func = func
        self.delay = float(delay)
        self._handle: asyncio.TimerHandle | None = None

    def __call__(self, *_: Any, **__: Any) -> None:
        if self._handle is not None:
            self._handle.cancel()
            self._handle = None
        loop = _running_loop()
        if self.delay <= 0 or loop is None:
            self.func()
            return
        self._handle = loop.call_later(self.delay, self._fire)

    def _fire(self) -> None:
        self._handle = None
        self.func()

    @property
    def pending(self) -> bool:
        """True while a call is scheduled."""
        return self._handle is not None

    def flush(self) -> None:
        """Run a scheduled call now."""
        if self._handle is not None:
            self._handle.cancel()
            self._fire()


def _running_loop() -> asyncio.AbstractEventLoop | None:
    try:
        return asyncio.get_running_loop()
    except RuntimeError:
        pass
    try:  # ipykernel runs handlers from its own loop on the main thread
        from ipykernel.kernelbase import Kernel  # noqa: PLC0415

        if Kernel.initialized():
            loop = asyncio.get_event_loop_policy().get_event_loop()
            return loop if loop.is_running() else None
    except Exception:  # noqa: BLE001 - no kernel: run synchronously
        return None
    return None


def legend_html(entries: list[tuple[str, str, str]]) -> str:
    """A legend beside a figure (never over its curves): ``(label, colour, style)`` entries,
    style ``"solid"``, ``"dashed"`` or ``"marker"``."""
    import html as _html

    parts = []
    for label, color, style in entries:
        if style == "marker":
            swatch = f"<span style='color:{color}'>&#9670;</span>"
        else:
            border = "dashed" if style == "dashed" else "solid"
            swatch = (f"<span style='display:inline-block;width:18px;height:0;vertical-align:"
                      f"middle;border-top:2px {border} {color}'></span>")
        parts.append(f"<span style='margin-right:12px;white-space:nowrap'>{swatch} "
                     f"{_html.escape(label)}</span>")
    return "<div class='ensemblelab-legend' style='font-size:12px'>" + "".join(parts) + \
        "</div>"


def running_loop() -> asyncio.AbstractEventLoop | None:
    """The event loop of the running kernel (None in plain Python and in tests)."""
    return _running_loop()


@contextlib.contextmanager
def busy(label: widgets.HTML, text: str) -> Iterator[None]:
    """Show `text` in `label` while the block runs (the front end sees it at once)."""
    label.value = f"<span class='ensemblelab-busy'>&#8987; {text}</span>"
    try:
        yield
    finally:
        label.value = ""


def trait_default(value: Any, default: Any) -> Any:
    """`value` unless it is None."""
    return default if value is None else value


def format_percent(fraction: float | None) -> str:
    """A fraction as a percentage with sensible digits: ``"86.7 %"``, ``"< 0.1 %"``.

    One decimal from 0.1 % up (``"100.0 %"`` for the whole); below that two
    significant digits down to 0.001 %, then ``"< 0.001 %"``; exactly 0 is ``"0 %"``;
    None or NaN is ``"-"``.
    """
    if fraction is None or fraction != fraction:
        return "-"
    p = 100.0 * float(fraction)
    if p == 0.0:
        return "0 %"
    if abs(p) >= 0.1:
        return f"{p:.1f} %"
    if abs(p) >= 0.001:
        return f"{p:.2g} %"
    return "< 0.001 %" if p > 0 else "> -0.001 %"
