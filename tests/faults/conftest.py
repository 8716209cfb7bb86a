"""Fixtures of the fault suite: a store URL per test (a SQLite file, or a private schema in the
test PostgreSQL database, dropped afterwards)."""

from __future__ import annotations

import uuid

import pytest
from sqlalchemy import create_engine, text


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
