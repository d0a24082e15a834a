"""CSV reader: bytes -> :class:`~drift.ingest.validate.RawTable` of strings, or :class:`InputError`.

The file must be UTF-8 (a byte-order mark is dropped), or in the source's ``encoding``, with a header row. Every cell is read as text;
empty fields stay empty strings (missing observations). Rows are numbered with the header as row 1, so the
first data row is row 2 (record numbers: a quoted field spanning lines counts as one record). A row with
more or fewer fields than the header, bad quoting, invalid UTF-8, an empty file or a repeated header name
make the whole file unreadable: nothing of it is written. A header cell left empty names its column
``(column N)``; validation quarantines that column's values (they belong to no series).
"""

from __future__ import annotations

import codecs
import csv as _csv
import io
import logging
from pathlib import Path

import numpy as np
import pandas as pd

from drift.config import SourceConfig
from drift.exceptions import InputError
from drift.ingest.validate import FileBytes, RawTable, read_file

log = logging.getLogger(__name__)

_BOM = b"\xef\xbb\xbf"


def read_csv(path: Path, source: SourceConfig, file: FileBytes | None = None) -> RawTable:
    """Read one CSV file of a source.

    Parameters
    ----------
    path : the file.
    file : its bytes when already read (:func:`drift.ingest.validate.read_file`); read here otherwise.
    source : the source (``delimiter`` is used here; layout is checked by validation).

    Returns
    -------
    RawTable
        string cells, ``first_row=2``.

    Raises
    ------
    InputError
        naming the file (and the row where known) when the file cannot be read as a whole.
    """
    import pyarrow as pa
    import pyarrow.csv as pacsv

    label = str(path)
    file = file or read_file(path)
    data, digest = file.data, file.digest
    data = data.removeprefix(_BOM)
    encoding = codecs.lookup(source.encoding).name
    try:
        text = data.decode(encoding)
    except UnicodeDecodeError as exc:
        row = data[:exc.start].count(b"\n") + 1
        if encoding == "utf-8":
            hint = ("save it as UTF-8, or set the source's encoding (e.g. encoding: latin-1 or cp1252 for "
                    "files saved by older spreadsheet programs)")
        else:
            hint = f"check the source's encoding ('{source.encoding}')"
        raise InputError(f"is not {'UTF-8' if encoding == 'utf-8' else source.encoding} text (byte "
                         f"0x{data[exc.start]:02x} at offset {exc.start}); {hint}", file=label, row=row) from None
    if encoding != "utf-8":
        data = text.encode("utf-8")  # what the CSV parser reads
    if not text.strip():
        raise InputError("the file is empty (no header row)", file=label)
    if data.count(b'"') % 2:
        # every quoted field adds two quote characters (an escaped quote is doubled): an odd count means the
        # file ends inside a quoted field
        raise InputError("ends inside a quoted field (a truncated file, or a stray '\"'); nothing of this "
                         "file was stored", file=label)
    try:
        header = next(_csv.reader(io.StringIO(text), delimiter=source.delimiter, strict=True))
    except _csv.Error as exc:
        raise InputError(f"the header row cannot be parsed: {exc}", file=label, row=1) from None
    names = [h.strip() for h in header]
    # a header cell left empty (often a trailing delimiter) still gets a column: named by its position
    unnamed = {i: f"(column {i + 1})" for i, h in enumerate(names) if not h}
    names = [unnamed.get(i, h) for i, h in enumerate(names)]
    seen: set[str] = set()
    for h in names:
        if h in seen:
            raise InputError(f"column '{h}' appears twice in the header; every column needs its own name",
                             file=label, row=1, column=h)
        seen.add(h)
    if not data.endswith((b"\n", b"\r")):
        data += b"\n"  # a last line without its line break (e.g. a header-only file) is still a line
    invalid: list[tuple[int | None, int, int]] = []

    def on_invalid(row: pacsv.InvalidRow) -> str:
        invalid.append((row.number, row.expected_columns, row.actual_columns))
        return "skip"

    try:
        table = pacsv.read_csv(
            io.BytesIO(data),
            read_options=pacsv.ReadOptions(column_names=names, skip_rows=1, use_threads=False,
                                           block_size=1 << 24),
            parse_options=pacsv.ParseOptions(delimiter=source.delimiter, ignore_empty_lines=False,
                                              newlines_in_values=True, invalid_row_handler=on_invalid),
            convert_options=pacsv.ConvertOptions(column_types={n: pa.string() for n in names},
                                                 strings_can_be_null=False, quoted_strings_can_be_null=False),
        )
    except pa.ArrowInvalid as exc:
        msg = str(exc)
        if "Empty CSV file" in msg:
            table = pa.table({n: pa.array([], pa.string()) for n in names})
        else:
            raise InputError(f"cannot be parsed as CSV: {msg}", file=label) from None
    if invalid:
        # pyarrow numbers records from 1 counting the skipped header, as our rows do
        bad_row, expected, actual = invalid[0]
        more = f" ({len(invalid) - 1} more such rows)" if len(invalid) > 1 else ""
        raise InputError(f"has {actual} fields where the header has {expected} (a truncated or ragged "
                         f"file){more}; nothing of this file was stored", file=label, row=bad_row)
    # one 2-D block of Python strings, filled column by column: a wide file of thousands of series
    # converts in milliseconds (pandas' per-column string-to-object conversion took 25x longer)
    cells = np.empty((table.num_rows, table.num_columns), dtype=object)
    for i in range(table.num_columns):
        cells[:, i] = table.column(i).to_numpy(zero_copy_only=False)
    frame = pd.DataFrame(cells, columns=list(table.column_names), dtype=object, copy=False)
    log.debug("read %s: %d rows, %d columns", label, len(frame), len(names))
    return RawTable(label=label, content_hash=digest, frame=frame, first_row=2,
                    unnamed=frozenset(unnamed.values()))
