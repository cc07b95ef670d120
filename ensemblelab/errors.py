"""Exception and warning classes of ensemblelab.

Every error is a subclass of a built-in exception, so ``except ValueError`` and
``except OSError`` keep working for callers who do not know this package.
Messages name the file, the frame or line, the field, what was expected, what
was found, and end with a hint.
"""

from __future__ import annotations

__all__ = [
    "EnsembleError",
    "SchemaError",
    "ParseError",
    "UnknownFormatError",
    "StoreError",
    "MissingDependencyError",
    "EnsembleWarning",
    "UnitWarning",
    "NumericalWarning",
    "format_location",
]


def format_location(
    path: object | None = None,
    *,
    line: int | None = None,
    frame: int | None = None,
    field: str | None = None,
) -> str:
    """Return ``"file.xyz, frame 3, line 41, field 'energies'"`` for error messages.

    Parameters
    ----------
    path : path-like or None
        The file (or folder) the problem was found in.
    line : int or None
        1-based line number in that file.
    frame : int or None
        0-based frame (time step) index within the file.
    field : str or None
        Name of the offending field or column.

    Returns
    -------
    str
        A comma-separated location, empty when nothing is known.
    """
    parts = []
    if path is not None:
        parts.append(str(path))
    if frame is not None:
        parts.append(f"frame {frame}")
    if line is not None:
        parts.append(f"line {line}")
    if field is not None:
        parts.append(f"field {field!r}")
    return ", ".join(parts)


class EnsembleError(Exception):
    """Base class of all ensemblelab errors."""


class SchemaError(EnsembleError, ValueError):
    """Arrays or frames of an Ensemble have wrong shapes, dtypes, ranges or columns."""


class ParseError(EnsembleError, ValueError):
    """A file could not be parsed.

    Parameters
    ----------
    message : str
        What was expected and what was found.
    path, line, frame, field
        Where it was found; see :func:`format_location`.
    hint : str, optional
        What the user can do about it.
    """

    def __init__(
        self,
        message: str,
        *,
        path: object | None = None,
        line: int | None = None,
        frame: int | None = None,
        field: str | None = None,
        hint: str | None = None,
    ) -> None:
        self.path = path
        self.line = line
        self.frame = frame
        self.field = field
        self.hint = hint
        where = format_location(path, line=line, frame=frame, field=field)
        text = f"{where}: {message}" if where else message
        if hint:
            text += f" Hint: {hint}"
        super().__init__(text)


class UnknownFormatError(EnsembleError, ValueError):
    """The input format could not be detected or is not supported."""


class StoreError(EnsembleError, OSError):
    """A native store is corrupt, has a future schema, or cannot be written safely."""


class MissingDependencyError(EnsembleError, ImportError):
    """An optional dependency needed for this feature is not installed."""


class EnsembleWarning(UserWarning):
    """Something in the data is suspicious but usable."""


class UnitWarning(EnsembleWarning):
    """Values look like they are in a different unit than the one declared."""


class NumericalWarning(EnsembleWarning):
    """A numerical procedure is ill-conditioned or its result is unreliable."""


class DegenerateFitWarning(NumericalWarning):
    """A fit's parameters are not identifiable from the data (equal or unbounded values)."""
