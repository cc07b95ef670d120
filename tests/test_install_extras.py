"""The README's main-job command installs the compiled kernels (numba), the fallback stays.

Parses README.md, scripts/*.sh and pyproject.toml (no network, no installation): the
command the README gives for the main job must reach ``scripts/setup.sh`` with extras that,
resolved through pyproject's self-references (``ensemblelab[a,b]``), include numba. numba
itself must stay optional (not a core dependency), so platforms without it keep the numpy
fallback; the fallback is exercised by the kernels' own twin tests.
"""

from __future__ import annotations

import re
import shlex
import tomllib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _requirement_name(req: str) -> str:
    """Distribution name of a PEP 508 requirement string ("numba>=0.60" -> "numba")."""
    return re.split(r"[\s\[<>=!~;(]", req.strip(), maxsplit=1)[0].lower()


def resolve_extras(pyproject: dict, extras: list[str]) -> set[str]:
    """Every distribution an install of ``ensemblelab[extras]`` pulls in (names only)."""
    opt = pyproject["project"].get("optional-dependencies", {})
    name = pyproject["project"]["name"].lower()
    out = {_requirement_name(r) for r in pyproject["project"].get("dependencies", [])}
    todo, seen = list(extras), set()
    while todo:
        extra = todo.pop()
        if extra in seen:
            continue
        seen.add(extra)
        if extra not in opt:
            raise KeyError(f"extra {extra!r} is not defined in pyproject.toml")
        for req in opt[extra]:
            if _requirement_name(req) == name:
                inner = re.search(r"\[([^\]]*)\]", req)
                todo.extend(e.strip() for e in (inner.group(1) if inner else "").split(","))
            else:
                out.add(_requirement_name(req))
    return out


def setup_extras(script: Path) -> list[str]:
    """The extras a script passes to ``scripts/setup.sh`` (follows one level of scripts)."""
    for line in script.read_text(encoding="utf-8").splitlines():
        line = line.split("#", 1)[0].strip()
        if not line:
            continue
        words = shlex.split(line)
        if len(words) >= 3 and words[0] == "bash" and words[1].endswith("setup.sh"):
            return [e.strip() for e in words[2].split(",") if e.strip()]
    raise AssertionError(f"{script.name} does not call scripts/setup.sh")


def main_job_script() -> Path:
    """The script named by the README's first bash block (the main job)."""
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    block = re.search(r"```bash\n(.*?)```", text, flags=re.S)
    assert block, "README has no bash block"
    words = shlex.split(block.group(1).strip().splitlines()[0])
    assert words[0] == "bash", words
    return ROOT / words[1]


@pytest.fixture(scope="module")
def pyproject() -> dict:
    return tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))


def test_main_job_is_explore_script() -> None:
    # the README's main job (common practice: the first command a new user copies)
    assert main_job_script() == ROOT / "scripts" / "explore.sh"


def test_main_job_installs_numba(pyproject: dict) -> None:
    extras = setup_extras(main_job_script())
    assert "numba" in resolve_extras(pyproject, extras), extras


def test_numba_stays_optional(pyproject: dict) -> None:
    # the numpy fallback must remain installable without numba (platforms without wheels)
    core = {_requirement_name(r) for r in pyproject["project"]["dependencies"]}
    assert "numba" not in core
    assert "numba" in resolve_extras(pyproject, ["fast"])


def test_bench_extra_has_peer_libraries(pyproject: dict) -> None:
    # the RMSD benchmark's peers are installed by the bench extra, not by the test extra
    bench = resolve_extras(pyproject, ["bench"])
    assert {"mdtraj", "mdanalysis", "numba"} <= bench


def test_resolver_sees_a_missing_extra(tmp_path: Path) -> None:
    # the parser must be able to fail: an explore script without `fast` lacks numba
    fake = {"project": {"name": "ensemblelab", "dependencies": ["numpy"],
                        "optional-dependencies": {"widgets": ["ipywidgets"],
                                                  "fast": ["numba>=0.60"],
                                                  "all": ["ensemblelab[widgets,fast]"]}}}
    script = tmp_path / "explore.sh"
    script.write_text('set -e\nbash scripts/setup.sh "widgets"\n', encoding="utf-8")
    assert "numba" not in resolve_extras(fake, setup_extras(script))
    script.write_text('bash scripts/setup.sh "all"  # comment\n', encoding="utf-8")
    assert "numba" in resolve_extras(fake, setup_extras(script))
