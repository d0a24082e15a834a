"""Helpers for the ingest tests: configs built in code, reading the store back."""

from __future__ import annotations

from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import pandas as pd
import sqlalchemy as sa

from drift.config import Config
from drift.store import Store, batches, observations, quarantine

NOW = datetime(2024, 6, 3, 12, 0, tzinfo=timezone.utc)
LATER = datetime(2024, 6, 10, 12, 0, tzinfo=timezone.utc)


def utc(*args: int) -> pd.Timestamp:
    return pd.Timestamp(datetime(*args, tzinfo=timezone.utc))


def make_config(base: Path, sources: list[dict[str, Any]], models: list[dict[str, Any]] | None = None) -> Config:
    return Config.model_validate({"sources": sources, "models": models or [], "base_dir": base})


def weekly_model(target: str, drivers: list[dict[str, Any]] | None = None, start: str = "2023-01-02",
                 frequency: str = "W") -> dict[str, Any]:
    return {"name": f"m_{target}", "target": target, "frequency": frequency, "drivers": drivers or [],
            "reference": {"start": start, "end": "2023-12-25"}}


def obs(store: Store) -> pd.DataFrame:
    o = observations
    with store.connect() as conn:
        rows = conn.execute(sa.select(o.c.series, o.c.period, o.c.issued_at, o.c.value, o.c.available_at,
                                      o.c.ingested_at, o.c.source).order_by(o.c.id)).fetchall()
    df = pd.DataFrame(rows, columns=["series", "period", "issued_at", "value", "available_at", "ingested_at",
                                     "source"])
    df["period"] = pd.to_datetime(df["period"])
    for c in ("issued_at", "available_at", "ingested_at"):
        df[c] = pd.to_datetime(df[c], utc=True)
    return df


def quar(store: Store) -> pd.DataFrame:
    q = quarantine
    with store.connect() as conn:
        rows = conn.execute(sa.select(q.c.source, q.c.file, q.c.row, q.c.column, q.c.raw_value, q.c.reason)
                            .order_by(q.c.id)).fetchall()
    return pd.DataFrame(rows, columns=["source", "file", "row", "column", "raw_value", "reason"])


def counts(store: Store) -> tuple[int, int, int]:
    with store.connect() as conn:
        return tuple(int(conn.execute(sa.select(sa.func.count()).select_from(t)).scalar())  # type: ignore
                     for t in (observations, quarantine, batches))


def value(df: pd.DataFrame, series: str, period: str) -> pd.DataFrame:
    return df[(df["series"] == series) & (df["period"] == pd.Timestamp(period))]
