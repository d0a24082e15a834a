"""Shared fixtures: stores on SQLite (a temporary file) and PostgreSQL (a fresh schema per test)."""

from __future__ import annotations

import uuid
from collections.abc import Iterator

import pytest
import sqlalchemy as sa

from drift.store import Store, open_store

PG_URL = "postgresql+psycopg://postgres@127.0.0.1:5432/test"


@pytest.fixture
def sqlite_store(tmp_path) -> Iterator[Store]:
    """A store in a fresh SQLite file."""
    store = open_store(f"sqlite:///{tmp_path / 'store.db'}")
    try:
        yield store
    finally:
        store.dispose()


@pytest.fixture
def pg_schema() -> Iterator[str]:
    """A fresh, uniquely named schema on the test PostgreSQL server (dropped afterwards); its URL selects it.

    Skips when the server cannot be reached.
    """
    try:
        admin = sa.create_engine(PG_URL)
        with admin.connect() as conn:
            conn.execute(sa.text("select 1"))
    except Exception as exc:  # noqa: BLE001 - any connection failure means "no server here"
        pytest.skip(f"PostgreSQL at 127.0.0.1:5432 is not reachable: {exc.__class__.__name__}")
    schema = f"drift_test_{uuid.uuid4().hex[:12]}"
    with admin.begin() as conn:
        conn.execute(sa.text(f'create schema "{schema}"'))
    try:
        yield f"{PG_URL}?options=-csearch_path%3D{schema}"
    finally:
        with admin.begin() as conn:
            conn.execute(sa.text(f'drop schema if exists "{schema}" cascade'))
        admin.dispose()


@pytest.fixture
def pg_store(pg_schema: str) -> Iterator[Store]:
    """A store in a fresh PostgreSQL schema."""
    store = open_store(pg_schema)
    try:
        yield store
    finally:
        store.dispose()


@pytest.fixture(params=["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
def store(request) -> Store:
    """The same test on both store backends."""
    return request.getfixturevalue("sqlite_store" if request.param == "sqlite" else "pg_store")
