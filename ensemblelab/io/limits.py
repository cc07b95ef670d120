"""Documented limits that protect the readers from hostile or broken input.

=====================  =========================  ===============================================
name                   default                    what it bounds
=====================  =========================  ===============================================
``MAX_COMMENT_CHARS``  4 Mi characters            one extended-XYZ comment line
``MAX_VALUE_CHARS``    2 Mi characters            one ``key=value`` value of a comment line
``MAX_FILE_BYTES``     2 GiB                      one trajectory file, after gzip decompression
``MAX_GZIP_RATIO``     100                        expansion of a ``.gz`` file over its size on
                                                  disk, once above ``GZIP_RATIO_FLOOR``
``GZIP_RATIO_FLOOR``   64 MiB                     below this a ``.gz`` may expand freely
``MAX_STORE_ELEMENTS`` 2**36                      elements a store manifest may declare
``MAX_MANIFEST_BYTES`` 64 MiB                     one ``manifest.json`` or ``metadata.json``
=====================  =========================  ===============================================

Keys of a comment line are at most 128 characters. Exceeding a limit gives a
:class:`~ensemblelab.errors.ParseError` or :class:`~ensemblelab.errors.StoreError`
that names the file (and the frame and line where known). A genuine, larger
input can be read after raising the limit::

    from ensemblelab.io import limits
    limits.set_limits(MAX_FILE_BYTES=8 * 2**30)
"""

from __future__ import annotations

from typing import Any

from . import _safety

__all__ = ["set_limits", "get_limits", "NAMES"]

#: the names of the limits
NAMES = ("MAX_COMMENT_CHARS", "MAX_VALUE_CHARS", "MAX_FILE_BYTES", "MAX_GZIP_RATIO",
         "GZIP_RATIO_FLOOR", "MAX_STORE_ELEMENTS", "MAX_MANIFEST_BYTES")


def get_limits() -> dict[str, int]:
    """The current limits by name."""
    return {name: int(getattr(_safety, name)) for name in NAMES}


def set_limits(**values: Any) -> dict[str, int]:
    """Change limits (positive integers) for this process; returns the previous values."""
    unknown = sorted(set(values) - set(NAMES))
    if unknown:
        raise ValueError(f"unknown limit(s) {unknown}; the limits are {list(NAMES)}.")
    for name, value in values.items():
        if not isinstance(value, int) or isinstance(value, bool) or value < 1:
            raise ValueError(f"The {name!r} limit must be an int >= 1; got {value!r}.")
    before = get_limits()
    for name, value in values.items():
        setattr(_safety, name, value)
    return before
