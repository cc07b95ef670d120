"""Repository-wide pytest setup: a test run never writes into the package tree.

* numba's on-disk cache of compiled kernels (``cache=True``) would go to
  ``ensemblelab/**/__pycache__``; it is sent to a per-user folder under the system
  temporary directory instead (set before any kernel is compiled).
* At the end of the session every file under ``ensemblelab/`` (outside ``__pycache__``)
  must be one that existed at its start; a test that leaves a file there fails the run.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent / "ensemblelab"
os.environ.setdefault(
    "NUMBA_CACHE_DIR",
    os.path.join(tempfile.gettempdir(), f"ensemblelab-numba-cache-{os.getuid()}"),
)


def _package_files() -> set[str]:
    return {p.relative_to(PACKAGE).as_posix() for p in PACKAGE.rglob("*")
            if p.is_file() and "__pycache__" not in p.parts}


def pytest_sessionstart(session: pytest.Session) -> None:
    session.config.stash[_BEFORE] = _package_files()


def pytest_sessionfinish(session: pytest.Session, exitstatus: int) -> None:
    before = session.config.stash.get(_BEFORE, None)
    if before is None:
        return
    new = sorted(_package_files() - before)
    if new:
        reporter = session.config.pluginmanager.get_plugin("terminalreporter")
        if reporter is not None:
            reporter.write_line(f"ERROR: the test run wrote into the package tree: {new}",
                                red=True)
        session.exitstatus = pytest.ExitCode.TESTS_FAILED


_BEFORE = pytest.StashKey[set]()
