"""Parquet reader (pyarrow): one file -> :class:`~drift.ingest.validate.RawTable` of typed columns.

Columns keep their types (floats, dates, timestamps, strings). Null cells are missing observations; a NaN
or infinity stored in a float column is a value, and validation quarantines it as not finite. Rows are
numbered from 1 (the first data row). An unreadable or truncated file raises :class:`InputError`.
"""

from __future__ import annotations

import io
import logging
from pathlib import Path

import numpy as np

from drift.config import SourceConfig
from drift.exceptions import InputError
from drift.ingest.validate import FileBytes, RawTable, read_file

log = logging.getLogger(__name__)


def read_parquet(path: Path, source: SourceConfig, file: FileBytes | None = None) -> RawTable:
    """Read one Parquet file of a source.

    Parameters
    ----------
    path : the file.
    file : its bytes when already read (:func:`drift.ingest.validate.read_file`); read here otherwise.
    source : the source (its layout is checked by validation).

    Returns
    -------
    RawTable
        typed cells with explicit null masks, ``first_row=1``.

    Raises
    ------
    InputError
        naming the file when it cannot be read as Parquet.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    label = str(path)
    file = file or read_file(path)
    data, digest = file.data, file.digest
    try:
        table = pq.read_table(io.BytesIO(data))
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise InputError(f"is not a readable Parquet file (truncated or corrupt?): {exc}", file=label) from None
    names = [str(n) for n in table.column_names]
    dup = {n for n in names if names.count(n) > 1}
    if dup:
        raise InputError(f"column '{min(dup)}' appears twice; every column needs its own name",
                         file=label, column=min(dup))
    empty: dict[str, np.ndarray] = {}
    for name, col in zip(names, table.columns, strict=True):
        mask = col.is_null().to_numpy(zero_copy_only=False)
        if pa.types.is_string(col.type) or pa.types.is_large_string(col.type):
            import pyarrow.compute as pc

            blank = pc.equal(pc.utf8_trim_whitespace(col), "").fill_null(False).to_numpy(zero_copy_only=False)
            mask = mask | blank
        empty[name] = np.asarray(mask, dtype=bool)
    try:
        frame = table.to_pandas(date_as_object=False)
    except (pa.ArrowException, ValueError) as exc:
        raise InputError(f"cannot convert the Parquet columns: {exc}", file=label) from None
    frame.columns = names
    log.debug("read %s: %d rows, %d columns", label, len(frame), len(names))
    return RawTable(label=label, content_hash=digest, frame=frame, first_row=1, empty=empty)
