from __future__ import annotations

import pytest

from ensemblelab.widgets import MessageArea


def test_messagearea_guard_shows_traceback_instead_of_raising():
    area = MessageArea()

    def broken(change):
        raise ValueError("band outside the map")

    guarded = area.guard(broken, where="map view")
    assert guarded({"new": 1}) is None  # not re-raised: a widget callback has no caller
    assert len(area.errors) == 1
    text = area.widget.value
    assert "map view: ValueError: band outside the map" in text
    assert "Traceback (most recent call last)" in text  # the full traceback is visible
    assert "broken" in text  # ... naming the function that failed


def test_messagearea_keeps_only_recent_messages_and_escapes_html():
    area = MessageArea(max_messages=3)
    for i in range(5):
        area.info(f"<b>{i}</b>")
    assert [m["text"] for m in area.messages] == ["<b>2</b>", "<b>3</b>", "<b>4</b>"]
    assert "&lt;b&gt;4&lt;/b&gt;" in area.widget.value
    with pytest.raises(ValueError, match="level must be one of"):
        area.post("x", level="loud")
