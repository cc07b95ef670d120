"""Atomic file writes, shared by every layer: a temporary file beside the target, then
``os.replace``, so a reader never sees a half-written file and an interrupted write
leaves the previous file as it was.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import IO, Any

__all__ = ["atomic_file", "atomic_write_bytes", "atomic_write_text", "exchange_paths",
           "replace_folder"]


@contextlib.contextmanager
def atomic_file(path: str | os.PathLike[str], mode: str = "w", *, overwrite: bool = True,
                **open_kwargs: Any) -> Iterator[IO[Any]]:
    """Open a temporary file beside `path`; on success it replaces `path` atomically.

    Parameters
    ----------
    path : path-like
        The file to write; its folder is created if needed.
    mode : {"w", "wb"}
        Text or binary.
    overwrite : bool
        If False, refuse (``FileExistsError``) when `path` exists.
    **open_kwargs
        Passed to :func:`open` (``encoding``, ``newline``).

    Yields
    ------
    file object
        The open temporary file. On an exception it is removed and `path` is untouched.
    """
    target = Path(path)
    if not overwrite and target.exists():
        raise FileExistsError(f"{target} exists; pass overwrite=True to replace it.")
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        with os.fdopen(fd, mode, **open_kwargs) as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())  # the data is on disk before the name points at it
        os.chmod(tmp, 0o644)  # mkstemp makes 0600; give the file ordinary permissions
        os.replace(tmp, target)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def atomic_write_bytes(path: str | os.PathLike[str], data: bytes, *,
                       overwrite: bool = True) -> Path:
    """Write `data` to `path` atomically; returns the path."""
    with atomic_file(path, "wb", overwrite=overwrite) as fh:
        fh.write(data)
    return Path(path)


def atomic_write_text(path: str | os.PathLike[str], text: str, *, overwrite: bool = True,
                      encoding: str = "utf-8") -> Path:
    """Write `text` to `path` atomically (``\\n`` line endings); returns the path."""
    with atomic_file(path, "w", overwrite=overwrite, encoding=encoding, newline="\n") as fh:
        fh.write(text)
    return Path(path)


_RENAME_EXCHANGE = 2  # linux/fs.h
_AT_FDCWD = -100


def exchange_paths(a: str | os.PathLike[str], b: str | os.PathLike[str]) -> bool:
    """Swap the names `a` and `b` atomically (Linux ``renameat2(RENAME_EXCHANGE)``).

    Returns
    -------
    bool
        True when swapped; False when the system offers no atomic exchange (the
        caller then falls back to two renames). Other failures raise OSError.
    """
    import ctypes
    import ctypes.util
    import errno
    import sys

    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
        fn = libc.renameat2
    except (OSError, AttributeError):
        return False
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    rc = fn(_AT_FDCWD, os.fsencode(a), _AT_FDCWD, os.fsencode(b), _RENAME_EXCHANGE)
    if rc == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.ENOSYS, errno.EINVAL, errno.ENOTSUP):
        return False
    raise OSError(err, os.strerror(err), os.fspath(b))


def replace_folder(new: str | os.PathLike[str], target: str | os.PathLike[str]) -> Path | None:
    """Put the folder `new` at `target`; returns where the previous folder now is (or None).

    With an atomic exchange (Linux) `target` names either the old or the new
    folder at every instant; elsewhere the old folder is renamed aside first (a
    short window without a folder). The caller deletes the returned old folder.
    """
    new, target = Path(new), Path(target)
    if not target.exists():
        os.replace(new, target)
        return None
    if exchange_paths(new, target):
        return new  # `new` now names the previous folder
    old = target.with_name(f".{target.name}.old-{os.getpid()}-{id(new):x}")
    os.replace(target, old)
    try:
        os.replace(new, target)
    except BaseException:
        os.replace(old, target)
        raise
    return old
