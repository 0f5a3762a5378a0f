"""Out-of-core storage of the kept readings for the ingest stage.

Methods
-------
Pass 1, :class:`Spool`
    The kept columns of every batch are appended as raw binary to one file
    per column (:meth:`numpy.ndarray.tofile`), in file order, and readings
    are counted per (line, sensor) group. Memory holds one batch.
Layout, :func:`plan_layout`
    Groups are ordered as the data model asks (lines by first appearance,
    sensors by name within a line); each group's first index is the
    cumulative sum of the counts before it.
Pass 2, :func:`scatter`
    The spool files are read back in blocks; each block's rows are stably
    sorted by group (:func:`numpy.argsort`, kind "stable") and written to
    their destination in output :class:`numpy.memmap` files (mapped afresh
    for each block, so written pages do not accumulate in the process), using
    running per-group fill counters, so that file order is kept within every
    group.
    The ``time_duplicate`` and ``time_backwards`` flags are set against the
    previous reading of the same group, carried from block to block.
Lazy columns, :func:`lazy_column`
    Output files are wrapped as dask arrays chunked on segment boundaries
    (:func:`lodeline.model.segment_chunks`) through a small picklable
    array-like that reads slices from the file, so the graph stays small for
    any scheduler.
"""

from __future__ import annotations

import uuid
from dataclasses import dataclass
from pathlib import Path

import dask.array as da
import numpy as np

from lodeline.model import flag_mask

__all__ = ["SPOOL_DTYPES", "OUTPUT_DTYPES", "Spool", "Layout", "plan_layout", "scatter", "lazy_column", "time_order_flags"]

#: Columns spooled in pass 1 and their dtypes ("sensor" holds provisional codes).
SPOOL_DTYPES = {
    "time": np.dtype("i8"),
    "easting": np.dtype("f8"),
    "northing": np.dtype("f8"),
    "elevation": np.dtype("f8"),
    "altitude": np.dtype("f8"),
    "total_field": np.dtype("f8"),
    "line": np.dtype("i4"),
    "sensor": np.dtype("i2"),
    "source_file": np.dtype("i2"),
    "source_row": np.dtype("i8"),
}

#: Output columns of pass 2 and their dtypes.
OUTPUT_DTYPES = {
    "time": np.dtype("M8[ns]"),
    "easting": np.dtype("f8"),
    "northing": np.dtype("f8"),
    "elevation": np.dtype("f8"),
    "altitude": np.dtype("f8"),
    "total_field": np.dtype("f8"),
    "line_index": np.dtype("i4"),
    "sensor_index": np.dtype("i2"),
    "source_file": np.dtype("i2"),
    "source_row": np.dtype("i8"),
    "flags": np.dtype("u4"),
}

_SENSOR_SPAN = 1 << 15  # provisional sensor codes are int16


class Spool:
    """Append-only raw column files of the kept readings (pass 1).

    Parameters
    ----------
    folder : pathlib.Path
        Where the files are written (the stage's scratch folder).

    Attributes
    ----------
    n : int
        Readings spooled.
    counts : dict of (int, int) to int
        Readings per (line code, provisional sensor code).
    """

    def __init__(self, folder: Path):
        self.folder = Path(folder)
        self.paths = {name: self.folder / f"spool_{name}.bin" for name in SPOOL_DTYPES}
        self._files = {name: open(path, "wb") for name, path in self.paths.items()}
        self.n = 0
        self.counts: dict[tuple[int, int], int] = {}

    def append(self, columns: dict[str, np.ndarray]) -> None:
        """Append one batch of kept readings (every column of :data:`SPOOL_DTYPES`)."""
        n = int(columns["time"].size)
        if n == 0:
            return
        for name, dtype in SPOOL_DTYPES.items():
            values = np.ascontiguousarray(columns[name], dtype=dtype)
            if values.size != n:
                raise ValueError(f"spool column {name!r} has {values.size} values, expected {n}")
            values.tofile(self._files[name])
        key = columns["line"].astype(np.int64) * _SENSOR_SPAN + columns["sensor"].astype(np.int64)
        keys, counts = np.unique(key, return_counts=True)
        for k, c in zip(keys.tolist(), counts.tolist()):
            group = (k // _SENSOR_SPAN, k % _SENSOR_SPAN)
            self.counts[group] = self.counts.get(group, 0) + c
        self.n += n

    def close(self) -> None:
        for fh in self._files.values():
            fh.close()


@dataclass
class Layout:
    """Storage order of the (line, sensor) groups.

    Attributes
    ----------
    line_index, sensor_index : numpy.ndarray
        int32 line and int16 final sensor index of each segment, in storage order.
    start, stop : numpy.ndarray of int64
        First reading and reading after the last of each segment.
    lookup : numpy.ndarray of int64
        Segment of each (line code * n_sensor_codes + provisional sensor code), -1 if none.
    n_sensor_codes : int
        Number of provisional sensor codes.
    """

    line_index: np.ndarray
    sensor_index: np.ndarray
    start: np.ndarray
    stop: np.ndarray
    lookup: np.ndarray
    n_sensor_codes: int

    @property
    def lengths(self) -> np.ndarray:
        return self.stop - self.start


def plan_layout(counts: dict[tuple[int, int], int], n_lines: int, sensor_rank: np.ndarray) -> Layout:
    """Order the groups: lines by code (first appearance), sensors by rank (name order).

    Parameters
    ----------
    counts : dict of (int, int) to int
        Readings per (line code, provisional sensor code).
    n_lines : int
        Number of line codes.
    sensor_rank : numpy.ndarray of int
        Final sensor index of each provisional sensor code.
    """
    sensor_rank = np.asarray(sensor_rank, dtype=np.int64)
    groups = sorted(counts, key=lambda g: (g[0], sensor_rank[g[1]]))
    lengths = np.array([counts[g] for g in groups], dtype=np.int64)
    stop = np.cumsum(lengths)
    start = stop - lengths
    n_codes = max(1, sensor_rank.size)
    lookup = np.full(max(1, n_lines) * n_codes, -1, dtype=np.int64)
    for i, (line, sensor) in enumerate(groups):
        lookup[line * n_codes + sensor] = i
    return Layout(
        line_index=np.array([g[0] for g in groups], dtype=np.int32),
        sensor_index=np.array([sensor_rank[g[1]] for g in groups], dtype=np.int16),
        start=start,
        stop=stop,
        lookup=lookup,
        n_sensor_codes=n_codes,
    )


def time_order_flags(times: np.ndarray, groups: np.ndarray, last_time: np.ndarray, has_last: np.ndarray) -> np.ndarray:
    """Flag duplicate and backwards times against the previous reading of the same group.

    Parameters
    ----------
    times : numpy.ndarray of int64
        Times (ns) of a block, already stably sorted by group.
    groups : numpy.ndarray of int64
        Group of each reading (sorted).
    last_time : numpy.ndarray of int64
        Time of the last reading already placed in each group (updated in place).
    has_last : numpy.ndarray of bool
        Whether each group has a reading already placed (updated in place).

    Returns
    -------
    numpy.ndarray of uint32
        ``time_duplicate`` / ``time_backwards`` bits of each reading.
    """
    n = times.size
    flags = np.zeros(n, dtype=np.uint32)
    if n == 0:
        return flags
    first = np.ones(n, dtype=bool)
    first[1:] = groups[1:] != groups[:-1]
    previous = np.empty(n, dtype=np.int64)
    previous[1:] = times[:-1]
    previous[first] = last_time[groups[first]]
    known = ~first | has_last[groups]
    flags[known & (times == previous)] |= np.uint32(flag_mask("time_duplicate"))
    flags[known & (times < previous)] |= np.uint32(flag_mask("time_backwards"))
    last = np.ones(n, dtype=bool)
    last[:-1] = groups[1:] != groups[:-1]
    last_time[groups[last]] = times[last]
    has_last[groups[last]] = True
    return flags


def scatter(spool: Spool, layout: Layout, folder: Path, block_rows: int, progress=None) -> dict[str, Path]:
    """Pass 2: write the spooled readings in storage order into output files.

    Parameters
    ----------
    spool : Spool
        The closed pass-1 spool.
    layout : Layout
        From :func:`plan_layout`.
    folder : pathlib.Path
        Where the output files are written.
    block_rows : int
        Readings read back per block (bounds memory).
    progress : object, optional
        With ``update(n)``.

    Returns
    -------
    dict of str to pathlib.Path
        Output file of each column of :data:`OUTPUT_DTYPES`.
    """
    n = spool.n
    paths = {name: Path(folder) / f"readings_{name}.bin" for name in OUTPUT_DTYPES}
    for name, path in paths.items():
        with open(path, "wb") as fh:
            fh.truncate(n * OUTPUT_DTYPES[name].itemsize)
    n_groups = layout.start.size
    filled = np.zeros(n_groups, dtype=np.int64)
    last_time = np.zeros(n_groups, dtype=np.int64)
    has_last = np.zeros(n_groups, dtype=bool)
    files = {name: open(path, "rb") for name, path in spool.paths.items()}
    try:
        done = 0
        while done < n:
            count = min(block_rows, n - done)
            # mapped afresh for each block, so that written pages leave this process's memory
            out = {name: np.memmap(paths[name], dtype=OUTPUT_DTYPES[name], mode="r+", shape=(n,)) for name in OUTPUT_DTYPES}
            block = {name: np.fromfile(files[name], dtype=SPOOL_DTYPES[name], count=count) for name in SPOOL_DTYPES}
            group = layout.lookup[block["line"].astype(np.int64) * layout.n_sensor_codes + block["sensor"]]
            order = np.argsort(group, kind="stable")
            g = group[order]
            run_start = np.flatnonzero(np.r_[True, g[1:] != g[:-1]])
            run_id = np.cumsum(np.r_[True, g[1:] != g[:-1]]) - 1
            rank = np.arange(count, dtype=np.int64) - run_start[run_id]
            dest = layout.start[g] + filled[g] + rank
            times = block["time"][order]
            out["flags"][dest] = time_order_flags(times, g, last_time, has_last)
            out["time"][dest] = times.view("M8[ns]")
            for name in ("easting", "northing", "elevation", "altitude", "total_field", "source_file", "source_row"):
                out[name][dest] = block[name][order]
            out["line_index"][dest] = layout.line_index[g]
            out["sensor_index"][dest] = layout.sensor_index[g]
            np.add.at(filled, g[run_start], np.diff(np.r_[run_start, count]))
            for mm in out.values():
                mm.flush()
            del out
            done += count
            if progress is not None:
                progress.update(count)
    finally:
        for fh in files.values():
            fh.close()
    if not np.array_equal(filled, layout.lengths):
        raise AssertionError("ingest pass 2 placed a different number of readings than pass 1 counted")
    return paths


class FileColumn:
    """A 1-D array-like backed by a raw binary file, read on demand (picklable).

    Parameters
    ----------
    path : pathlib.Path
        Raw file of ``n`` values of ``dtype``.
    dtype : numpy.dtype
        Value type.
    n : int
        Number of values.
    """

    def __init__(self, path: Path, dtype, n: int):
        self.path = str(path)
        self.dtype = np.dtype(dtype)
        self.shape = (int(n),)
        self.ndim = 1

    def __getitem__(self, key):
        mm = np.memmap(self.path, dtype=self.dtype, mode="r", shape=self.shape)
        return np.array(mm[key])

    def __len__(self) -> int:
        return self.shape[0]


def lazy_column(path: Path, dtype, n: int, chunks: tuple[int, ...], name: str) -> da.Array:
    """Dask array of a raw output file with the given chunk lengths."""
    column = FileColumn(path, dtype, n)
    return da.from_array(
        column,
        chunks=(tuple(chunks),),
        name=f"ingest-{name}-{uuid.uuid4().hex}",
        lock=False,
        asarray=True,
        meta=np.empty((0,), dtype=np.dtype(dtype)),
    )
