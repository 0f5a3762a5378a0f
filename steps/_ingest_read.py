"""Streaming readers of survey tables for the ingest stage.

Methods
-------
CSV (plain or gzip-compressed)
    :func:`pyarrow.csv.open_csv` reads blocks of ``block_size`` bytes; every
    mapped column is read as text so that a bad value rejects one row, not
    the file. Reading is single-threaded so that pyarrow reports the row
    number of each malformed row (wrong number of columns) to an
    ``invalid_row_handler``; such rows are skipped by pyarrow and handed back
    to the caller as rejects. Gzip is recognised by its magic bytes, whatever
    the suffix. A file that does not start as UTF-8 text is refused
    before it is parsed. A gzip stream that ends early or is damaged stops the run
    with a one-line error naming the file; the stage stores nothing.
Parquet
    :meth:`pyarrow.parquet.ParquetFile.iter_batches` on the mapped columns,
    keeping their types.

Every batch carries the data-row number of each of its rows (1 = first data
row after the header; blank lines are not data rows), so that every reject
can be named by file and row.
"""

from __future__ import annotations

import difflib
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from lodeline.model import DataError

__all__ = ["Batch", "TableReader", "detect_format", "file_stem"]

#: File name endings and the format they imply (longest first).
SUFFIX_FORMATS = (
    (".csv.gz", "csv"),
    (".txt.gz", "csv"),
    (".csv", "csv"),
    (".txt", "csv"),
    (".parquet", "parquet"),
    (".pq", "parquet"),
)
_GZIP_MAGIC = b"\x1f\x8b"
_DELIMITER_CANDIDATES = (",", ";", "\t", "|")
_LOOKS_LIKE_DATA = re.compile(r"^\s*([+-]?\d+([.,]\d*)?([eE][+-]?\d+)?|\d{4}-\d{2}-\d{2}.*|\d{1,2}:\d{2}.*)\s*$")


def detect_format(path: Path, fmt: str, where: str) -> str:
    """Return "csv" or "parquet" for ``path``.

    Parameters
    ----------
    path : pathlib.Path
        The input file.
    fmt : {"auto", "csv", "parquet"}
        The configured format; "auto" means from the file name ending.
    where : str
        Configuration table for the message (``inputs.readings``).
    """
    if fmt != "auto":
        return fmt
    name = path.name.lower()
    for suffix, found in SUFFIX_FORMATS:
        if name.endswith(suffix):
            return found
    endings = ", ".join(s for s, _ in SUFFIX_FORMATS)
    raise DataError(
        f"{path}: cannot tell the format from the file name (known endings: {endings}): "
        f'set {where}.format = "csv" or "parquet"'
    )


def file_stem(path: Path) -> str:
    """File name without its format ending (``L0012.csv.gz`` -> ``L0012``)."""
    name = path.name
    for suffix, _ in SUFFIX_FORMATS + ((".gz", "csv"),):
        if name.lower().endswith(suffix):
            return name[: -len(suffix)]
    return path.stem


def _closest_header(name: str, header: list[str]) -> str | None:
    """Header name most like ``name`` (case-insensitive), or None."""
    lowered = {h.lower(): h for h in header}
    if name.lower() in lowered:
        return lowered[name.lower()]
    match = difflib.get_close_matches(name.lower(), list(lowered), n=1, cutoff=0.5)
    return lowered[match[0]] if match else None


def _shown(text: str) -> str:
    return text.replace("\t", "\\t")


@dataclass
class Batch:
    """One block of rows of one file.

    Attributes
    ----------
    columns : dict of str to pyarrow.Array
        Raw column of each mapped field (our field names as keys).
    rows : numpy.ndarray of int64
        Data-row number of each row.
    malformed : list of (int, str)
        Rows skipped by the CSV parser in this block: data-row number and raw text.
    """

    columns: dict[str, pa.Array]
    rows: np.ndarray
    malformed: list[tuple[int, str]] = field(default_factory=list)

    @property
    def size(self) -> int:
        return int(self.rows.size)


class TableReader:
    """Read the mapped columns of one CSV or Parquet file block by block.

    Parameters
    ----------
    path : pathlib.Path
        The file.
    fmt : {"csv", "parquet"}
        Its format (already resolved by :func:`detect_format`).
    mapping : dict of str to str
        Our field name -> the file's column name.
    delimiter : str
        CSV field delimiter (one character).
    block_bytes : int
        CSV block size, bytes; also sets the Parquet batch length.
    where : str
        Configuration table for messages (``inputs.readings``).

    Attributes
    ----------
    rows_read : int
        Data rows read so far (kept, rejected and malformed).
    """

    def __init__(self, path: Path, fmt: str, mapping: dict[str, str], delimiter: str, block_bytes: int, where: str):
        self.path = Path(path)
        self.fmt = fmt
        self.mapping = dict(mapping)
        self.delimiter = delimiter
        self.block_bytes = int(block_bytes)
        self.where = where
        self.rows_read = 0
        self._check_exists()
        self.header = self._read_header()
        self._check_mapping()

    # ----------------------------------------------------------------- checks
    def _fail(self, what: str) -> DataError:
        return DataError(f"{self.path}: {what}")

    def _damaged(self, after_row: int | None, text: str) -> DataError:
        """The error for a compressed stream that cannot be read to its end (truncated or damaged)."""
        where = f" after data row {after_row}" if after_row else ""
        return self._fail(f"the gzip data are truncated or damaged{where} ({text}): copy the file again from its source")

    def _check_exists(self) -> None:
        if not self.path.is_file():
            raise self._fail(f"file not found: check {self.where}.files")
        if os.path.getsize(self.path) == 0:
            raise self._fail(f"the file is empty: remove it from {self.where}.files or replace it")

    def _is_gzip(self) -> bool:
        with open(self.path, "rb") as fh:
            return fh.read(2) == _GZIP_MAGIC

    def _csv_source(self):
        compression = "gzip" if self._is_gzip() else None
        return pa.input_stream(str(self.path), compression=compression)

    def _check_text(self) -> None:
        """Refuse a CSV file whose first 64 KiB are not UTF-8 (binary data, another encoding)."""
        with self._csv_source() as stream:
            head = stream.read(1 << 16)
        try:
            head.decode("utf-8")
        except UnicodeDecodeError as err:
            if err.start < len(head) - 3:  # not merely a character cut at the end of the sample
                raise self._fail(
                    f"not UTF-8 text (byte 0x{head[err.start]:02x} at byte {err.start}): save the file as UTF-8 CSV text, "
                    f'or set {self.where}.format = "parquet" if it is Parquet'
                ) from None

    def _read_header(self) -> list[str]:
        if self.fmt == "parquet":
            try:
                self._parquet = pq.ParquetFile(str(self.path))
            except (pa.ArrowInvalid, OSError) as err:
                raise self._fail(f"not a Parquet file ({_first_line(err)}): set {self.where}.format or check the file") from None
            if self._parquet.metadata.num_rows == 0:
                raise self._fail(f"the file has no data rows: remove it from {self.where}.files or replace it")
            return list(self._parquet.schema_arrow.names)
        try:
            self._check_text()
            reader = pacsv.open_csv(
                self._csv_source(),
                read_options=pacsv.ReadOptions(block_size=max(self.block_bytes, 1 << 16), use_threads=False),
                parse_options=pacsv.ParseOptions(delimiter=self.delimiter, invalid_row_handler=lambda row: "skip"),
            )
        except (pa.ArrowInvalid, OSError, EOFError) as err:
            text = _first_line(err)
            if "Empty CSV file" in text:
                raise self._fail(f"the file is empty: remove it from {self.where}.files or replace it") from None
            if self._is_gzip() and not isinstance(err, pa.ArrowInvalid):
                raise self._damaged(None, text) from None
            raise self._fail(f"cannot read the header ({text}): check that the file is UTF-8 CSV text") from None
        names = list(reader.schema.names)
        reader.close()
        return names

    def _check_mapping(self) -> None:
        header = self.header
        if self.fmt == "csv" and len(header) == 1:
            for cand in _DELIMITER_CANDIDATES:
                if cand != self.delimiter and cand in header[0]:
                    raise self._fail(
                        f"the header has a single column '{_shown(header[0])}': the delimiter looks like "
                        f"'{_shown(cand)}', not '{_shown(self.delimiter)}': set {self.where}.delimiter = \"{_shown(cand)}\""
                    )
        for fld, col in self.mapping.items():
            if col in header:
                if header.count(col) > 1:
                    raise self._fail(
                        f"the column {col!r} (for {self.where}.columns.{fld}) appears {header.count(col)} times in the header: rename the duplicates"
                    )
                continue
            looks_data = sum(bool(_LOOKS_LIKE_DATA.match(h)) for h in header)
            if header and looks_data * 2 >= len(header):
                raise self._fail(
                    f"the first line ({', '.join(_shown(h) for h in header[:6])}) looks like data, not a header: "
                    "add a header row naming the columns"
                )
            hint = _closest_header(col, header)
            shown = ", ".join(repr(h) for h in header[:20]) + (", ..." if len(header) > 20 else "")
            did = f" (closest header name: {hint!r})" if hint else ""
            raise self._fail(
                f"no column {col!r} for {self.where}.columns.{fld}{did}: set {self.where}.columns.{fld} "
                f"to one of the header names: {shown}"
            )

    # ---------------------------------------------------------------- reading
    def __iter__(self) -> Iterator[Batch]:
        if self.fmt == "parquet":
            yield from self._parquet_batches()
        else:
            yield from self._csv_batches()

    def _parquet_batches(self) -> Iterator[Batch]:
        fields = list(self.mapping)
        columns = list(dict.fromkeys(self.mapping.values()))
        length = max(1024, self.block_bytes // (16 * max(1, len(columns))))
        try:
            for rb in self._parquet.iter_batches(batch_size=length, columns=columns):
                n = rb.num_rows
                rows = np.arange(self.rows_read + 1, self.rows_read + n + 1, dtype=np.int64)
                self.rows_read += n
                yield Batch({f: rb.column(self.mapping[f]) for f in fields}, rows)
        except (pa.ArrowInvalid, OSError) as err:
            raise self._fail(f"cannot read the rows after data row {self.rows_read} ({_first_line(err)}): check the file") from None

    def _csv_batches(self) -> Iterator[Batch]:
        columns = list(dict.fromkeys(self.mapping.values()))
        skipped: list[tuple[int, str]] = []

        def on_invalid(row) -> str:
            number = row.number
            if number is None:  # pyarrow gives numbers when reading single-threaded
                raise self._fail("a row has the wrong number of columns and no row number: check the delimiter")
            skipped.append((int(number) - 1, row.text))
            return "skip"

        reader = pacsv.open_csv(
            self._csv_source(),
            read_options=pacsv.ReadOptions(block_size=self.block_bytes, use_threads=False),
            parse_options=pacsv.ParseOptions(delimiter=self.delimiter, invalid_row_handler=on_invalid),
            convert_options=pacsv.ConvertOptions(
                include_columns=columns,
                column_types={c: pa.string() for c in columns},
                strings_can_be_null=False,
                quoted_strings_can_be_null=False,
            ),
        )
        pending: list[tuple[int, str]] = []  # malformed rows not yet placed in a batch
        next_row = 1
        try:
            while True:
                try:
                    rb = reader.read_next_batch()
                except StopIteration:
                    break
                n = rb.num_rows
                pending.extend(skipped)
                skipped.clear()
                pending.sort()
                rows, next_row, placed = _number_rows(next_row, n, pending)
                batch_malformed, pending = pending[:placed], pending[placed:]
                self.rows_read = next_row - 1
                yield Batch({f: rb.column(c) for f, c in self.mapping.items()}, rows, batch_malformed)
        except pa.ArrowInvalid as err:
            raise self._fail(
                f"cannot read the rows after data row {next_row - 1} ({_first_line(err)}): "
                "check that the file is UTF-8 text with the set delimiter"
            ) from None
        except (OSError, EOFError) as err:
            # A gzip stream cut short (an interrupted copy) or damaged.
            raise self._damaged(next_row - 1, _first_line(err)) from None
        finally:
            reader.close()
        pending.extend(skipped)
        pending.sort()
        if pending:
            self.rows_read = max(self.rows_read, pending[-1][0])
            yield Batch({f: pa.array([], pa.string()) for f in self.mapping}, np.zeros(0, np.int64), pending)
        if self.rows_read == 0:
            raise self._fail(f"the file has a header but no data rows: remove it from {self.where}.files or replace it")


def _number_rows(first: int, n: int, malformed: list[tuple[int, str]]) -> tuple[np.ndarray, int, int]:
    """Data-row numbers of ``n`` parsed rows starting at ``first``, skipping malformed rows.

    Parameters
    ----------
    first : int
        Number of the first row not yet given out.
    n : int
        Rows in the batch.
    malformed : list of (int, str)
        Sorted malformed rows not yet placed (their numbers are taken out).

    Returns
    -------
    rows : numpy.ndarray of int64
        The numbers of the parsed rows.
    next_first : int
        First number after this batch.
    placed : int
        How many leading entries of ``malformed`` fall within this batch.
    """
    numbers = np.array([m[0] for m in malformed], dtype=np.int64)
    k = 0
    while True:
        stop = first + n + k
        k_new = int(np.count_nonzero((numbers >= first) & (numbers < stop)))
        if k_new == k:
            break
        k = k_new
    span = np.arange(first, stop, dtype=np.int64)
    rows = span[~np.isin(span, numbers)] if k else span
    placed = int(np.count_nonzero(numbers < stop))
    return rows, stop, placed


def _first_line(err: Exception) -> str:
    return str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
