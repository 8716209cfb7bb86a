"""The tree passes the linter, the formatter and the type checker with the settings in
pyproject.toml.

ruff and mypy come with the test extras; without them a developer's run skips these tests, but
with CI=true a missing tool fails the run instead of hiding them.
"""

from __future__ import annotations

import importlib.util
import os
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import IN_CI

ROOT = Path(__file__).resolve().parent.parent


def _need(tool: str) -> None:
    if importlib.util.find_spec(tool) is None:
        msg = f"{tool} not installed (pip install -e '.[test]')"
        if IN_CI:
            pytest.fail(f"CI=true but {msg}")
        pytest.skip(msg)


def _ruff(*args: str) -> subprocess.CompletedProcess[str]:
    _need("ruff")
    # From the root, so ruff finds pyproject.toml and checks the whole tree.
    return subprocess.run(
        [sys.executable, "-m", "ruff", *args],
        cwd=ROOT,
        capture_output=True,
        text=True,
        timeout=120,
    )


def test_ruff_check_finds_nothing():
    """`ruff check .` reports no finding anywhere in the tree."""
    r = _ruff("check", ".")
    assert r.returncode == 0, f"ruff check failed:\n{r.stdout}{r.stderr}"


def test_ruff_format_changes_nothing():
    """`ruff format --check .` would leave every file as it is."""
    r = _ruff("format", "--check", ".")
    assert r.returncode == 0, f"ruff format --check failed:\n{r.stdout}{r.stderr}"


def test_mypy_finds_nothing(tmp_path):
    """mypy reports no error in predictors/, storage/ and daemon/, checked as the installed
    ``thermeta.*`` packages so that every import between them is followed.

    The folders are mapped to ``thermeta.*`` through symlinks on mypy's search path (mypy cannot
    follow setuptools' editable-install finder).  paho-mqtt 2 ships its own types; some machines
    also carry types-paho-mqtt, stubs of paho 1.x that mypy would prefer and that lack paho 2's
    API, so the installed paho goes on the search path first.
    """
    _need("mypy")
    pkg = tmp_path / "thermeta"
    pkg.mkdir()
    for name in ("predictors", "storage", "daemon"):
        (pkg / name).symlink_to(ROOT / name, target_is_directory=True)
    paho = importlib.util.find_spec("paho")
    if paho is not None and paho.submodule_search_locations:
        (tmp_path / "paho").symlink_to(list(paho.submodule_search_locations)[0])
    r = subprocess.run(
        [sys.executable, "-m", "mypy", "-p", "thermeta.predictors", "-p", "thermeta.storage"]
        + ["-p", "thermeta.daemon", "--cache-dir", str(ROOT / ".mypy_cache")],
        cwd=ROOT,
        env=dict(os.environ, MYPYPATH=str(tmp_path)),
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert r.returncode == 0, f"mypy failed:\n{r.stdout}{r.stderr}"
