"""Shared fixtures: a real Mosquitto broker on a free loopback port, and a PostgreSQL URL.

Broker tests skip with a clear reason when the ``mosquitto`` binary is missing on a developer's
machine, but with CI=true a missing broker fails the run instead of hiding the tests.
"""

from __future__ import annotations

import os
import shutil
import uuid

import pytest
from sqlalchemy import create_engine, text
from thermeta.daemon.testing import Mosquitto, free_port

__all__ = ["IN_CI", "free_port"]  # test modules import these from here

IN_CI = os.environ.get("CI", "").lower() in ("1", "true", "yes")


def _need_mosquitto() -> None:
    if shutil.which("mosquitto") is None or shutil.which("mosquitto_pub") is None:
        msg = (
            "mosquitto / mosquitto-clients not installed "
            "(apt-get install mosquitto mosquitto-clients)"
        )
        if IN_CI:
            pytest.fail(f"CI=true but {msg}")
        pytest.skip(msg)


@pytest.fixture
def broker(tmp_path_factory) -> Mosquitto:
    """A fresh Mosquitto on a free loopback port, persistence on, unlimited queue."""
    _need_mosquitto()
    with Mosquitto(tmp_path_factory.mktemp("mosquitto")) as b:
        yield b


@pytest.fixture
def pg_url() -> str:
    """THERMETA_TEST_PG_URL (a SQLAlchemy URL); skipped when unset, failed in CI when unset."""
    url = os.environ.get("THERMETA_TEST_PG_URL")
    if not url:
        if IN_CI and os.environ.get("THERMETA_REQUIRE_PG"):
            pytest.fail("THERMETA_REQUIRE_PG set but THERMETA_TEST_PG_URL is empty")
        pytest.skip(
            "THERMETA_TEST_PG_URL not set (e.g. postgresql+psycopg://postgres@127.0.0.1/test)"
        )
    return url


@pytest.fixture
def pg_schema_url(pg_url):
    """A URL whose search_path is a fresh schema of THERMETA_TEST_PG_URL's database."""
    schema = f"fault_{uuid.uuid4().hex[:10]}"
    admin = create_engine(pg_url)
    with admin.begin() as conn:
        conn.execute(text(f"CREATE SCHEMA {schema}"))
    sep = "&" if "?" in pg_url else "?"
    yield f"{pg_url}{sep}options=-csearch_path%3D{schema}"
    with admin.begin() as conn:
        conn.execute(text(f"DROP SCHEMA {schema} CASCADE"))
    admin.dispose()


@pytest.fixture(params=["sqlite", "postgresql"])
def store_url(request, tmp_path):
    """The test's store: SQLite, then PostgreSQL (skipped without THERMETA_TEST_PG_URL)."""
    if request.param == "sqlite":
        return f"sqlite:///{tmp_path / 'store.db'}"
    return request.getfixturevalue("pg_schema_url")
