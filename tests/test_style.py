"""The tree passes the linter and the formatter with the settings in pyproject.toml.

ruff comes with the test extras; without it a developer's run skips these tests, but with CI=true
a missing ruff fails the run instead of hiding them.
"""

from __future__ import annotations

import importlib.util
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import IN_CI

ROOT = Path(__file__).resolve().parent.parent


def _ruff(*args: str) -> subprocess.CompletedProcess[str]:
    if importlib.util.find_spec("ruff") is None:
        msg = "ruff not installed (pip install -e '.[test]')"
        if IN_CI:
            pytest.fail(f"CI=true but {msg}")
        pytest.skip(msg)
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
