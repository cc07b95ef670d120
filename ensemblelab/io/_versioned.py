"""Crash-safe, locked writes of a native store folder (single or chunked layout).

A store folder holds one ``manifest.json`` and the data files it names. Since
version 0.x the data files of one save live in a version sub-folder
``v-<12 hex digits>/`` and the manifest names them there
(``"file": "v-1a2b3c4d5e6f/energies.npy"``); a store written before keeps its
files at the top level and is read the same way (the manifest names them).

Replacing a store (``overwrite=True``):

1. take the writer lock: ``fcntl.flock`` on ``.lock`` inside the store (released by
   the operating system when the process ends, even by ``kill -9``); a second
   writer gets "the store is being written by another process";
2. check that every entry of the folder was written by ensemblelab (refuse a store
   with foreign files inside), and delete version folders that the manifest does
   not name (left by an interrupted save);
3. write the new version folder and fsync it;
4. replace ``manifest.json`` atomically (temporary file, fsync, ``os.replace``):
   this single rename is the switch from the old to the new version;
5. delete the old version's files.

At every instant the path holds one complete store: the old manifest with the old
files, or the new manifest with the new files. Files of a version are never
modified once written, so a reader that loads what one manifest names gets one
version; a reader that finds a file gone (deleted after a switch) reads the
manifest again (:func:`read_consistent`).

A new store (no folder at the path) is built in a sibling ``.<name>.new-<hex>/``
(holding its own lock) and renamed into place; a sibling left by a killed save is
recognised by its free lock and deleted at the next save.
"""

from __future__ import annotations

import contextlib
import errno
import json
import os
import re
import shutil
import time
import uuid
from collections.abc import Callable, Iterator, Mapping
from pathlib import Path
from typing import Any, TypeVar

from .._atomic import atomic_write_text
from ..errors import StoreError
from ._safety import try_lock, writer_lock

__all__ = ["StoreTransaction", "store_transaction", "foreign_entries", "read_consistent",
           "VERSION_RE", "LOCK_NAME", "MANIFEST_NAME"]

MANIFEST_NAME = "manifest.json"
LOCK_NAME = ".lock"
STORE_FORMAT = "ensemblelab-store"
#: name of a version folder
VERSION_RE = re.compile(r"^v-[0-9a-f]{12}$")
_DATA_FILE_RE = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*\.(npy|parquet)$")
_CHUNK_DIR_RE = re.compile(r"^c[0-9]{6}$")
_MANIFEST_TMP_RE = re.compile(r"^\.manifest\.json\..*\.tmp$")
_STALE_AFTER = 60.0  # s: a staging folder without a lock file is stale after this

T = TypeVar("T")


def _read_json(path: Path) -> Any:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def _is_store_manifest(path: Path) -> dict[str, Any] | None:
    data = _read_json(path / MANIFEST_NAME)
    return data if isinstance(data, dict) and data.get("format") == STORE_FORMAT else None


def _ours_in_data_folder(rel: Path, is_dir: bool) -> bool:
    """Whether a path below a version folder (or a legacy ``chunks/``) is a name we write."""
    parts = rel.parts
    if not parts:
        return True
    if parts[0] == "chunks":
        if len(parts) == 1:
            return is_dir
        if not _CHUNK_DIR_RE.match(parts[1]):
            return False
        return len(parts) == 2 and is_dir or len(parts) == 3 and not is_dir and bool(
            _DATA_FILE_RE.match(parts[2]))
    return len(parts) == 1 and not is_dir and bool(_DATA_FILE_RE.match(parts[0]))


def foreign_entries(root: Path, manifest: Mapping[str, Any] | None = None) -> list[str]:
    """Entries of the store folder `root` that ensemblelab did not write (relative paths).

    Ours are: ``manifest.json``, ``.lock``, manifest temporary files, version folders
    ``v-<hex>/`` holding data files (``<name>.npy``, ``<name>.parquet``,
    ``chunks/c<6 digits>/<name>.npy|parquet``), and in a store of the previous
    layout the top-level data files and ``chunks/``. Symbolic links are never ours.
    """
    root = Path(root)
    if manifest is None:
        manifest = _is_store_manifest(root) or {}
    found: list[str] = []
    for top in sorted(os.listdir(root)):
        p = root / top
        if not os.path.lexists(p):  # removed meanwhile (a reader never removes; be tolerant)
            continue
        if p.is_symlink():
            found.append(top)
            continue
        if top in (MANIFEST_NAME, LOCK_NAME) or _MANIFEST_TMP_RE.match(top):
            if p.is_dir():
                found.append(top)
            continue
        if VERSION_RE.match(top) and p.is_dir():
            base = p
        elif top == "chunks" and p.is_dir():  # previous layout (chunked)
            base = root
        elif _DATA_FILE_RE.match(top) and p.is_file():  # previous layout (single)
            continue
        else:
            found.append(top)
            continue
        start = p
        for dirpath, dirnames, filenames in os.walk(start, followlinks=False):
            d = Path(dirpath)
            for name in [*dirnames, *filenames]:
                q = d / name
                rel = q.relative_to(base)
                if q.is_symlink() or not _ours_in_data_folder(rel, q.is_dir()):
                    found.append(str(q.relative_to(root)))
            dirnames[:] = [n for n in dirnames if not (d / n).is_symlink()]
    return found


def _fsync_tree(folder: Path) -> None:
    for dirpath, _dirs, files in os.walk(folder):
        for name in files:
            fd = os.open(os.path.join(dirpath, name), os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
        _fsync_dir(Path(dirpath))


def _fsync_dir(folder: Path) -> None:
    with contextlib.suppress(OSError):
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def _clean_stale_siblings(target: Path) -> None:
    """Delete ``.<name>.new-*`` folders beside `target` whose writer is gone."""
    prefix = f".{target.name}.new-"
    with contextlib.suppress(OSError):
        for p in target.parent.iterdir():
            if not p.name.startswith(prefix) or p.is_symlink() or not p.is_dir():
                continue
            lock = p / LOCK_NAME
            if not lock.exists():
                with contextlib.suppress(OSError):
                    if time.time() - p.stat().st_mtime > _STALE_AFTER:
                        shutil.rmtree(p, ignore_errors=True)
                continue
            fd = try_lock(lock)
            if fd is not None:  # nobody holds it: the writer died
                try:
                    shutil.rmtree(p, ignore_errors=True)
                finally:
                    os.close(fd)


class StoreTransaction:
    """One save of a store: lock, a fresh version folder, and the switch.

    Use through :func:`store_transaction`. Write the data files into
    :attr:`folder` and name them in the manifest by :meth:`rel`; then call
    :meth:`commit` with the manifest.
    """

    def __init__(self, target: str | os.PathLike[str], *, overwrite: bool,
                 kind: str = "native store") -> None:
        self.target = Path(target)
        self.overwrite = bool(overwrite)
        self.kind = kind
        self.version = f"v-{uuid.uuid4().hex[:12]}"
        self._stack = contextlib.ExitStack()
        self._staging: Path | None = None
        self._root: Path | None = None
        self.committed = False

    # -- checks
    def _check_existing(self, target: Path, *, locked: bool = True) -> dict[str, Any]:
        if not target.is_dir() or target.is_symlink():
            what = "a symbolic link" if target.is_symlink() else "a file"
            raise StoreError(f"{target}: exists and is {what}, not a {self.kind} folder. Hint: "
                             "choose another path.")
        manifest = _is_store_manifest(target)
        if manifest is None:
            raise StoreError(f"{target}: refusing to overwrite a folder that is not a "
                             f"{self.kind}. Hint: choose a new path or remove the folder "
                             "yourself.")
        if not self.overwrite:
            raise StoreError(f"{target}: a {self.kind} already exists. Hint: pass "
                             "overwrite=True (--overwrite) to replace it.")
        foreign = foreign_entries(target, manifest) if locked else []
        if foreign:
            shown = ", ".join(repr(f) for f in foreign[:5]) + (" ..." if len(foreign) > 5
                                                               else "")
            raise StoreError(f"{target}: refusing to overwrite: the {self.kind} holds "
                             f"{len(foreign)} entr{'y' if len(foreign) == 1 else 'ies'} "
                             f"ensemblelab did not write ({shown}). Hint: move them out, or "
                             "save to a new path.")
        return manifest

    def __enter__(self) -> StoreTransaction:
        target = self.target
        with contextlib.suppress(OSError):
            if target.is_dir() and not target.is_symlink() and not any(target.iterdir()):
                target.rmdir()  # an empty folder holds nothing to lose
        target.parent.mkdir(parents=True, exist_ok=True)
        _clean_stale_siblings(target)
        if target.exists() or target.is_symlink():
            self._check_existing(target, locked=False)  # a store, and overwrite allowed
            self._stack.enter_context(writer_lock(target / LOCK_NAME, store=target))
            manifest = self._check_existing(target)  # again, now that we hold the lock
            self._clean_unreferenced(target, manifest)
            self._root = target
        else:
            staging = target.with_name(f".{target.name}.new-{uuid.uuid4().hex[:12]}")
            staging.mkdir()
            self._staging = staging
            self._stack.enter_context(writer_lock(staging / LOCK_NAME, store=target))
            self._root = staging
        (self._root / self.version).mkdir()
        return self

    def __exit__(self, exc_type: Any, exc: Any, tb: Any) -> None:
        try:
            if not self.committed:
                self.abort()
        finally:
            self._stack.close()

    @property
    def folder(self) -> Path:
        """Where to write this version's data files."""
        assert self._root is not None
        return self._root / self.version

    def rel(self, name: str) -> str:
        """The manifest entry of data file `name` of this version."""
        return f"{self.version}/{name}"

    def abort(self) -> None:
        """Remove what this save wrote; the previous store (if any) stays as it was."""
        if self._staging is not None:
            shutil.rmtree(self._staging, ignore_errors=True)
        elif self._root is not None:
            shutil.rmtree(self._root / self.version, ignore_errors=True)

    def _clean_unreferenced(self, root: Path, manifest: Mapping[str, Any]) -> None:
        """Delete version folders the manifest does not name (we hold the lock)."""
        used = _referenced_tops(manifest)
        for p in root.iterdir():
            if VERSION_RE.match(p.name) and p.name not in used and p.is_dir() and \
                    not p.is_symlink():
                shutil.rmtree(p, ignore_errors=True)
            elif _MANIFEST_TMP_RE.match(p.name) and p.is_file():
                with contextlib.suppress(OSError):
                    p.unlink()

    # -- the switch
    def commit(self, manifest: Mapping[str, Any], dumps: Callable[[Any], str]) -> Path:
        """fsync the version, then switch the store to `manifest` atomically."""
        assert self._root is not None
        _fsync_tree(self.folder)
        text = dumps(manifest)
        if self._staging is not None:
            atomic_write_text(self._staging / MANIFEST_NAME, text)
            _fsync_dir(self._staging)
            try:
                os.rename(self._staging, self.target)
            except OSError as exc:
                if exc.errno not in (errno.ENOTEMPTY, errno.EEXIST, errno.ENOTDIR,
                                     errno.EISDIR):
                    raise
                self._adopt_into_existing(text)
            else:
                self._staging = None
                self._root = self.target
            _fsync_dir(self.target.parent)
            self.committed = True
            return self.target
        old = _is_store_manifest(self._root) or {}
        atomic_write_text(self._root / MANIFEST_NAME, text)  # the switch
        _fsync_dir(self._root)
        self.committed = True
        self._delete_old(old)
        return self.target

    def _adopt_into_existing(self, text: str) -> None:
        """Another process created the store while we wrote ours: replace it if allowed."""
        assert self._staging is not None
        target = self.target
        self._check_existing(target, locked=False)
        with writer_lock(target / LOCK_NAME, store=target):
            manifest = self._check_existing(target)
            os.rename(self._staging / self.version, target / self.version)
            atomic_write_text(target / MANIFEST_NAME, text)
            _fsync_dir(target)
            shutil.rmtree(self._staging, ignore_errors=True)
            self._staging = None
            self._root = target
            self._delete_old(manifest)

    def _delete_old(self, old: Mapping[str, Any]) -> None:
        assert self._root is not None
        for top in _referenced_tops(old):
            if top == self.version or top in (MANIFEST_NAME, LOCK_NAME):
                continue
            p = self._root / top
            if p.is_symlink():
                continue
            if p.is_dir() and (VERSION_RE.match(top) or top == "chunks"):
                shutil.rmtree(p, ignore_errors=True)
            elif p.is_file() and _DATA_FILE_RE.match(top):
                with contextlib.suppress(OSError):
                    p.unlink()


def _referenced_tops(manifest: Mapping[str, Any]) -> set[str]:
    """First path components of every file or folder a manifest names."""
    names: list[Any] = []
    arrays = manifest.get("arrays")
    if isinstance(arrays, list):
        names += [e.get("file") for e in arrays if isinstance(e, dict)]
    tables = manifest.get("tables")
    if isinstance(tables, dict):
        names += list(tables.values())
    chunks = manifest.get("chunks")
    if isinstance(chunks, list):
        names += [c.get("dir") for c in chunks if isinstance(c, dict)]
    out = set()
    for n in names:
        if isinstance(n, str) and n and not n.startswith("/") and ".." not in Path(n).parts:
            out.add(Path(n).parts[0])
    return out


@contextlib.contextmanager
def store_transaction(target: str | os.PathLike[str], *, overwrite: bool,
                      kind: str = "native store") -> Iterator[StoreTransaction]:
    """Context manager around :class:`StoreTransaction` (aborts on an exception)."""
    with StoreTransaction(target, overwrite=overwrite, kind=kind) as txn:
        yield txn


def read_consistent(path: Path, read: Callable[[], T], *, attempts: int = 5) -> T:
    """Run `read()` again when a file vanished because a save switched versions meanwhile.

    `read` must re-read the manifest each time. A missing file with an unchanged
    manifest is a real error and is raised at once.
    """
    mpath = Path(path) / MANIFEST_NAME
    for i in range(attempts):
        try:
            before = mpath.stat().st_mtime_ns, mpath.stat().st_ino
        except OSError:
            before = None
        try:
            return read()
        except (StoreError, FileNotFoundError):
            try:
                after = mpath.stat().st_mtime_ns, mpath.stat().st_ino
            except OSError:
                after = None
            if before == after or i == attempts - 1:
                raise
    raise AssertionError("unreachable")  # pragma: no cover
