"""Dask plumbing shared by the reading stages: chunks on segment boundaries, block-relative segment starts.

Readings are dask arrays along ``reading`` whose chunks fall on segment
boundaries (a segment is one line of one sensor, contiguous), so that every
dask block holds whole segments. The helpers here find those chunks, bring a
variable to them, and describe which segments each block holds. They hold no
method of their own (plain bookkeeping, no published source needed).
"""

from __future__ import annotations

import dask.array as da
import numpy as np
import xarray as xr

from lodeline.model import segment_chunks

__all__ = ["reading_chunks", "as_dask", "block_of_segment", "block_starts", "segment_ids"]


def reading_chunks(
    readings: xr.Dataset, segments: xr.Dataset, target: int, field: xr.DataArray | None = None
) -> tuple:
    """Chunks of the readings along ``reading``.

    Parameters
    ----------
    readings : xarray.Dataset
        Readings following :mod:`lodeline.model`'s conventions.
    segments : xarray.Dataset
        The segments dataset (``start``, ``stop`` reading indices).
    target : int
        Wanted number of readings per chunk, used only when the readings are
        in memory (whole segments are never split).
    field : xarray.DataArray, optional
        The variable whose chunks are taken; ``readings["total_field"]`` when
        not given.

    Returns
    -------
    tuple
        The dask chunks of ``field`` when it is a dask array, else chunks of
        whole segments of about ``target`` readings
        (:func:`lodeline.model.segment_chunks`), as a one-element tuple.
    """
    if field is None:
        field = readings["total_field"]
    chunks = field.chunks
    if chunks is not None:
        return chunks
    lengths = np.asarray(segments["stop"].values) - np.asarray(segments["start"].values)
    return (segment_chunks(lengths, target),)


def as_dask(var, chunks: tuple) -> da.Array:
    """The dask array of ``var`` with the given chunks.

    Parameters
    ----------
    var : xarray.DataArray or array-like
        A variable along ``reading`` (a DataArray, a dask array or an
        in-memory array).
    chunks : tuple
        Chunks along ``reading`` (from :func:`reading_chunks`).

    Returns
    -------
    dask.array.Array
        The data of ``var``: wrapped when in memory, rechunked when its
        chunks differ, else as it is (same units as ``var``).
    """
    data = var.data if isinstance(var, xr.DataArray) else var
    if not isinstance(data, da.Array):
        return da.from_array(np.asarray(data), chunks=chunks)
    if data.chunks != chunks:
        return data.rechunk(chunks)
    return data


def block_of_segment(segments: xr.Dataset, chunks: tuple) -> np.ndarray:
    """Index of the dask block holding each segment.

    Parameters
    ----------
    segments : xarray.Dataset
        The segments dataset (``start`` reading index of each segment).
    chunks : tuple
        Chunks along ``reading`` on segment boundaries.

    Returns
    -------
    numpy.ndarray of int
        One block index per segment.
    """
    bounds = np.cumsum((0,) + tuple(chunks[0]))
    starts = np.asarray(segments["start"].values, dtype=np.int64)
    return np.searchsorted(bounds, starts, side="right") - 1


def block_starts(segments: xr.Dataset, chunks: tuple) -> da.Array:
    """Segment starts relative to their block, one dask block per reading block.

    Parameters
    ----------
    segments : xarray.Dataset
        The segments dataset (``start`` reading index of each segment).
    chunks : tuple
        Chunks along ``reading`` on segment boundaries.

    Returns
    -------
    dask.array.Array of int64
        The reading index of each segment's start counted from the start of
        its block; block ``b`` holds the segments of reading block ``b``, so
        it can be passed to :func:`dask.array.map_blocks` beside the readings.
    """
    bounds = np.cumsum((0,) + tuple(chunks[0]))
    starts = np.asarray(segments["start"].values, dtype=np.int64)
    block = block_of_segment(segments, chunks)
    relative = starts - bounds[block] if starts.size else starts
    counts = np.bincount(block, minlength=len(chunks[0])) if starts.size else np.zeros(len(chunks[0]), int)
    return da.from_array(relative, chunks=(tuple(int(c) for c in counts),))


def segment_ids(starts: np.ndarray, n: int, *, stage: str) -> np.ndarray:
    """Segment number (within the block) of every reading of a block.

    Parameters
    ----------
    starts : array-like of int
        Start of each segment of the block, relative to the block (the first
        must be 0), increasing.
    n : int
        Number of readings in the block.
    stage : str
        Name of the calling stage, for the error message.

    Returns
    -------
    numpy.ndarray of int
        ``n`` segment numbers 0, 0, ..., 1, 1, ...

    Raises
    ------
    ValueError
        When the block holds no segment or does not start on a segment start
        (the chunks are not on segment boundaries: a bug, not bad input).
    """
    starts = np.asarray(starts, dtype=np.int64)
    if starts.size == 0 or starts[0] != 0:
        raise ValueError(f"{stage}: a dask block does not start on a segment start")
    return np.repeat(np.arange(starts.size), np.diff(np.append(starts, n)))
