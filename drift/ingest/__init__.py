"""Ingest: read sources (CSV, Parquet, SQL), validate every cell, quarantine bad ones, store vintages.

See :mod:`drift.ingest.base` for the flow and the available_at rules, :mod:`drift.ingest.validate` for
what is quarantined and how rows are numbered.
"""

from drift.ingest.base import IngestSummary, ingest_all, ingest_source, readmit

__all__ = ["IngestSummary", "ingest_all", "ingest_source", "readmit"]
