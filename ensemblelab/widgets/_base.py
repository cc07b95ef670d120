"""Common plumbing of the views: the shared model, the message area, display."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import ipywidgets as widgets

from ..data.ensemble import Ensemble
from ._messages import MessageArea
from ._selection import SelectionModel

__all__ = ["View", "as_model"]


def as_model(model_or_ens: SelectionModel | Ensemble) -> SelectionModel:
    """A SelectionModel: the given one, or a new one around an Ensemble."""
    if isinstance(model_or_ens, SelectionModel):
        return model_or_ens
    if isinstance(model_or_ens, Ensemble):
        return SelectionModel(model_or_ens)
    raise TypeError(
        "expected a SelectionModel or an ensemblelab.Ensemble; got "
        f"{type(model_or_ens).__name__}."
    )


class View:
    """Base of every view: composes ipywidgets (never subclasses them).

    Parameters
    ----------
    model : SelectionModel or Ensemble
        The shared selection state (a new one is made around an Ensemble, so
        each view is usable on its own).
    messages : MessageArea, optional
        Where callback errors go; a view used alone shows its own.

    Attributes
    ----------
    model : SelectionModel
    messages : MessageArea
    widget : ipywidgets.Widget
        The root widget to display.
    """

    title = "view"

    def __init__(self, model: SelectionModel | Ensemble, *,
                 messages: MessageArea | None = None) -> None:
        self.model = as_model(model)
        self._own_messages = messages is None
        self.messages = messages if messages is not None else MessageArea()
        self.widget: widgets.Widget = widgets.VBox()

    # observe a model trait with the handler guarded by the message area
    def _observe(self, handler: Callable[[dict], Any], names: str | list[str]) -> None:
        self.model.observe(self.messages.guard(handler), names=names)

    def _guard(self, func: Callable[..., Any]) -> Callable[..., Any]:
        return self.messages.guard(func)

    def _finish(self, *children: widgets.Widget) -> widgets.Widget:
        """Build the root widget from `children` (plus the message area when standalone)."""
        items = list(children)
        if self._own_messages:
            items.append(self.messages.widget)
        box = widgets.VBox(items)
        box.add_class(f"ensemblelab-{self.title.replace(' ', '-')}")
        self.widget = box
        return box

    def _repr_mimebundle_(self, **kwargs: Any) -> Any:
        return self.widget._repr_mimebundle_(**kwargs)
