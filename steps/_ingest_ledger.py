"""Row ledger of the ingest stage: reject reasons, per-file counts and the
rejected-rows CSV.

Methods
-------
Every data row read is either kept or rejected with exactly one reason, the
first that applies in the order of :data:`REASONS`. Rejected rows are
streamed, batch by batch, to one CSV file (:class:`pyarrow.csv.CSVWriter`)
with the input, file, data-row number, reason, an explanation and the raw
text of every mapped column, so that each one can be found and corrected.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv

from ._ingest_parse import as_text

__all__ = ["REASONS", "RAW_FIELDS", "RejectLog", "FileLedger", "files_table"]

#: Reject reasons, in the order in which they are tested: code -> explanation.
REASONS: dict[str, str] = {
    "malformed_row": "the row has the wrong number of columns",
    "bad_time": "time missing or not in the configured time_format",
    "ambiguous_local_time": "local time falls in a daylight-saving change of the timezone (missing or repeated hour)",
    "bad_position": "x or y missing or not a number",
    "position_out_of_range": "position outside the valid range of position_crs, or not projectable",
    "bad_field": "total field text is not a number",
    "field_out_of_range": "total field outside [field_min_nT, field_max_nT] (after field_unit conversion)",
    "bad_elevation": "elevation or depth missing or not a number",
    "bad_altitude": "altitude text is not a number",
    "missing_line": "line name empty",
    "missing_sensor": "sensor name empty",
}

#: Raw columns written for each rejected row (empty when not mapped).
RAW_FIELDS = ("time", "date", "x", "y", "field", "line", "sensor", "elevation", "depth", "altitude")

_SCHEMA = pa.schema(
    [("input", pa.string()), ("file", pa.string()), ("row", pa.int64()), ("reason", pa.string()), ("detail", pa.string())]
    + [(f"raw_{f}", pa.string()) for f in RAW_FIELDS]
    + [("raw_text", pa.string())]
)


class RejectLog:
    """Stream rejected rows to a CSV file, batch by batch, in row order within a batch.

    Parameters
    ----------
    path : pathlib.Path
        The CSV file to write (created with its header at once).
    details : dict of str to str, optional
        Explanation of each reason (defaults to :data:`REASONS`).
    """

    def __init__(self, path: Path, details: dict[str, str] | None = None):
        self.path = Path(path)
        self.details = dict(REASONS, **(details or {}))
        self._writer = pacsv.CSVWriter(str(self.path), _SCHEMA)
        self._pending: list[pa.Table] = []

    def write(self, input_name: str, file: Path, rows: np.ndarray, reasons: np.ndarray, raw: dict[str, pa.Array]) -> None:
        """Append rejected rows.

        Parameters
        ----------
        input_name : str
            "readings" or "base_station".
        file : pathlib.Path
            Source file.
        rows : numpy.ndarray of int64
            Data-row numbers.
        reasons : numpy.ndarray of str
            Reason code of each row (keys of :data:`REASONS`).
        raw : dict of str to pyarrow.Array
            Raw values of the mapped fields, for these rows only; key "text"
            holds the whole raw line of a malformed row.
        """
        n = int(rows.size)
        if n == 0:
            return
        cols = {
            "input": pa.array([input_name] * n, pa.string()),
            "file": pa.array([str(file)] * n, pa.string()),
            "row": pa.array(np.asarray(rows, dtype=np.int64)),
            "reason": pa.array(np.asarray(reasons, dtype=object), pa.string()),
            "detail": pa.array(pd.Series(np.asarray(reasons, dtype=object)).map(self.details).to_numpy(object), pa.string()),
        }
        empty = pa.array([""] * n, pa.string())
        for f in RAW_FIELDS + ("text",):
            cols[f"raw_{f}"] = as_text(raw[f]) if f in raw else empty
        self._pending.append(pa.table(cols, schema=_SCHEMA))

    def flush(self) -> None:
        """Write the rows given since the last flush, in row order (call once per batch)."""
        if self._pending:
            table = pa.concat_tables(self._pending).sort_by([("row", "ascending")])
            self._pending = []
            self._writer.write_table(table)

    def close(self) -> None:
        self.flush()
        self._writer.close()


@dataclass
class FileLedger:
    """Counts of one input file.

    Attributes
    ----------
    input : str
        "readings" or "base_station".
    file : pathlib.Path
        The file.
    rows_read, rows_kept : int
        Data rows read and kept.
    by_reason : dict of str to int
        Rejected rows by reason.
    examples : dict of str to (int, dict)
        First rejected row of each reason: its number and raw values.
    """

    input: str
    file: Path
    rows_read: int = 0
    rows_kept: int = 0
    by_reason: dict[str, int] = field(default_factory=lambda: dict.fromkeys(REASONS, 0))
    examples: dict[str, tuple[int, dict]] = field(default_factory=dict)

    @property
    def rows_rejected(self) -> int:
        return int(sum(self.by_reason.values()))

    def add(self, rows: np.ndarray, reasons: np.ndarray, raw: dict[str, pa.Array]) -> None:
        """Count rejected rows and remember the first example of each reason."""
        if rows.size == 0:
            return
        codes, first, counts = np.unique(reasons, return_index=True, return_counts=True)
        for code, i, count in zip(codes, first, counts):
            self.by_reason[str(code)] += int(count)
            if str(code) not in self.examples:
                self.examples[str(code)] = (int(rows[i]), {k: v[int(i)].as_py() for k, v in raw.items()})

    def row(self) -> dict:
        """One row of the files table."""
        out = {
            "input": self.input,
            "file": str(self.file),
            "rows_read": self.rows_read,
            "rows_kept": self.rows_kept,
            "rows_rejected": self.rows_rejected,
        }
        out.update(self.by_reason)
        return out

    def check(self) -> None:
        """Raise AssertionError when the counts of this file do not add up (a programming error)."""
        if self.rows_read != self.rows_kept + self.rows_rejected:
            raise AssertionError(
                f"{self.file}: ledger does not add up: {self.rows_read} read, {self.rows_kept} kept, {self.rows_rejected} rejected"
            )


def files_table(ledgers: list[FileLedger]) -> pd.DataFrame:
    """The per-file table: input, file, rows_read, rows_kept, rows_rejected and one column per reason."""
    columns = ["input", "file", "rows_read", "rows_kept", "rows_rejected", *REASONS]
    return pd.DataFrame([led.row() for led in ledgers], columns=columns)
