"""The visible message area: callback errors (with their traceback) and status lines.

In a notebook or a Voila page, output and exceptions raised inside widget callbacks
vanish unless they are captured. Every handler of every view is wrapped with
:meth:`MessageArea.guard`, which shows the exception and its traceback here.
"""

from __future__ import annotations

import functools
import html
import time
import traceback
from collections.abc import Callable
from typing import Any, TypeVar

import ipywidgets as widgets

__all__ = ["MessageArea"]

F = TypeVar("F", bound=Callable[..., Any])

_STYLE = {
    "info": "color:#333",
    "warning": "color:#8a5a00",
    "error": "color:#b00020",
}


class MessageArea:
    """A list of recent messages shown in an HTML widget.

    Parameters
    ----------
    max_messages : int
        How many messages are kept (oldest dropped first).

    Attributes
    ----------
    widget : ipywidgets.HTML
        The rendered message list.
    messages : list of dict
        ``{"level", "text", "detail", "time"}``, newest last.
    """

    def __init__(self, *, max_messages: int = 8) -> None:
        self.max_messages = int(max_messages)
        self.messages: list[dict[str, Any]] = []
        self.widget = widgets.HTML(value="", layout=widgets.Layout(width="100%"))
        self.widget.add_class("ensemblelab-messages")

    # ------------------------------------------------------------------ posting
    def post(self, text: str, *, level: str = "info", detail: str | None = None) -> None:
        """Show one message; `detail` (e.g. a traceback) is shown preformatted below it."""
        if level not in _STYLE:
            raise ValueError(f"level must be one of {sorted(_STYLE)}; got {level!r}.")
        self.messages.append(
            {"level": level, "text": str(text), "detail": detail, "time": time.time()}
        )
        del self.messages[: -self.max_messages]
        self._render()

    def info(self, text: str) -> None:
        """Show a status line."""
        self.post(text, level="info")

    def warning(self, text: str) -> None:
        """Show a warning line."""
        self.post(text, level="warning")

    def exception(self, exc: BaseException, *, where: str = "") -> None:
        """Show an exception with its full traceback."""
        tb = "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))
        head = f"{type(exc).__name__}: {exc}"
        if where:
            head = f"{where}: {head}"
        self.post(head, level="error", detail=tb)

    def clear(self) -> None:
        """Remove every message."""
        self.messages.clear()
        self._render()

    @property
    def errors(self) -> list[dict[str, Any]]:
        """The error messages still shown."""
        return [m for m in self.messages if m["level"] == "error"]

    # ------------------------------------------------------------------ wrapping
    def guard(self, func: F, *, where: str | None = None) -> F:
        """Wrap a callback so that an exception raised in it is shown here, not lost.

        The exception is not re-raised (a widget callback has no caller to
        receive it); it is shown with its traceback.
        """
        label = where if where else str(getattr(func, "__qualname__", "callback"))

        @functools.wraps(func)
        def wrapper(*args: Any, **kwargs: Any) -> Any:
            try:
                return func(*args, **kwargs)
            except Exception as exc:  # noqa: BLE001 - shown to the user, never swallowed
                self.exception(exc, where=label)
                return None

        return wrapper  # type: ignore[return-value]

    # ------------------------------------------------------------------ rendering
    def _render(self) -> None:
        parts = []
        for m in reversed(self.messages):
            stamp = time.strftime("%H:%M:%S", time.localtime(m["time"]))
            line = (
                f"<div class='ensemblelab-msg ensemblelab-msg-{m['level']}' "
                f"style='{_STYLE[m['level']]}'>[{stamp}] {html.escape(m['text'])}"
            )
            if m["detail"]:
                line += (
                    "<details><summary>traceback</summary><pre style='font-size:11px'>"
                    f"{html.escape(m['detail'])}</pre></details>"
                )
            parts.append(line + "</div>")
        self.widget.value = "".join(parts)
