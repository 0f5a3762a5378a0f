"""Block functions of the diurnal correction (one dask block = whole segments).

Each block gets the reading times of its chunk and the small base-station
arrays (:class:`steps._diurnal_base.BaseSeries`, passed whole to every
block). Nothing here depends on the chunking: every reading is handled on
its own, so the results are the same for any chunks.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from ._blocks import block_of_segment
from ._diurnal_base import bracket

__all__ = [
    "GAP_CODE",
    "RATE_CODE",
    "SEGMENT_STATS",
    "reading_seconds",
    "block_correction",
    "block_codes",
    "block_segment_stats",
    "block_gap_counts",
    "segments_per_block",
]

#: Bits of the per-reading code returned by :func:`block_codes`.
GAP_CODE = np.uint8(1)
RATE_CODE = np.uint8(2)

#: Rows of the per-segment statistics of :func:`block_segment_stats`.
SEGMENT_STATS = (
    "readings",
    "base_station_gap",
    "diurnal_rate",
    "corrected",
    "correction_sum",
    "correction_sumsq",
    "correction_min",
    "correction_max",
    "time_first_s",
    "time_last_s",
)


def reading_seconds(time: np.ndarray, t0_ns: int) -> np.ndarray:
    """Reading times as seconds after ``t0_ns`` (NaN for NaT)."""
    t = np.asarray(time).astype("datetime64[ns]").view(np.int64)
    x = (t - np.int64(t0_ns)).astype(np.float64) / 1e9
    x[t == np.iinfo(np.int64).min] = np.nan
    return x


def block_correction(time: np.ndarray, *, t0_ns: int, t_s: np.ndarray, value: np.ndarray, run: np.ndarray, datum_nT: float) -> np.ndarray:
    """Diurnal correction of each reading, nT: base field at its time minus the datum.

    NaN where the base series does not bridge the reading's time (a gap
    longer than ``max_gap_s``, outside the record, or no time): never
    extrapolated.
    """
    x = reading_seconds(time, t0_ns)
    ok, _, _ = bracket(x, t_s, run)
    out = np.full(x.size, np.nan)
    out[ok] = np.interp(x[ok], t_s, value) - datum_nT
    return out


def block_codes(time: np.ndarray, *, t0_ns: int, t_s: np.ndarray, run: np.ndarray, rate: np.ndarray, rate_limit: float) -> np.ndarray:
    """Per-reading code: :data:`GAP_CODE` where not bridged, :data:`RATE_CODE` where too fast.

    A bridged reading is too fast when the rate of change (nT/min) at either
    of its two neighbouring base samples exceeds ``rate_limit`` in size.
    """
    x = reading_seconds(time, t0_ns)
    ok, left, right = bracket(x, t_s, run)
    code = np.where(ok, np.uint8(0), GAP_CODE).astype(np.uint8)
    if rate.size:
        with np.errstate(invalid="ignore"):
            fast = np.fmax(np.abs(rate[left]), np.abs(rate[right])) > rate_limit
        code[ok & fast] |= RATE_CODE
    return code


def block_segment_stats(time: np.ndarray, code: np.ndarray, corr: np.ndarray, starts: np.ndarray, *, t0_ns: int) -> np.ndarray:
    """Per-segment counts and correction statistics of one block, flattened (see :data:`SEGMENT_STATS`)."""
    n, nseg = corr.size, len(starts)
    if nseg == 0:
        return np.zeros(0)
    starts = np.asarray(starts, dtype=np.int64)
    if starts[0] != 0:
        raise ValueError("diurnal: a dask block does not start on a segment start")
    x = reading_seconds(time, t0_ns)
    good = np.isfinite(corr)
    has_time = np.isfinite(x)

    def total(values):
        return np.add.reduceat(np.asarray(values, dtype=np.float64), starts)

    def extreme(values, mask, ufunc, fill):
        out = ufunc.reduceat(np.where(mask, values, fill), starts)
        return np.where(np.isinf(out), np.nan, out)

    table = np.zeros((nseg, len(SEGMENT_STATS)))
    table[:, 0] = np.diff(np.append(starts, n))
    table[:, 1] = total((code & GAP_CODE) != 0)
    table[:, 2] = total((code & RATE_CODE) != 0)
    table[:, 3] = total(good)
    table[:, 4] = total(np.where(good, corr, 0.0))
    table[:, 5] = total(np.where(good, corr * corr, 0.0))
    table[:, 6] = extreme(corr, good, np.minimum, np.inf)
    table[:, 7] = extreme(corr, good, np.maximum, -np.inf)
    table[:, 8] = extreme(x, has_time, np.minimum, np.inf)
    table[:, 9] = extreme(x, has_time, np.maximum, -np.inf)
    return table.ravel()


def block_gap_counts(time: np.ndarray, code: np.ndarray, *, t0_ns: int, t_s: np.ndarray, run: np.ndarray) -> np.ndarray:
    """Readings of one block flagged ``base_station_gap``, by where they fall.

    Returns
    -------
    ndarray of float64
        ``[no time, before the record, after the record, in gap 0, gap 1...]``
        (gap ``k`` lies between runs ``k`` and ``k + 1``).
    """
    n_runs = int(run[-1]) + 1 if run.size else 0
    out = np.zeros(3 + max(n_runs - 1, 0))
    x = reading_seconds(time, t0_ns)[(code & GAP_CODE) != 0]
    if x.size == 0:
        return out
    no_time = ~np.isfinite(x)
    out[0] = no_time.sum()
    if t_s.size == 0:
        out[1] = x.size - out[0]
        return out
    x = x[~no_time]
    out[1] = np.sum(x < t_s[0])
    out[2] = np.sum(x > t_s[-1])
    inside = x[(x >= t_s[0]) & (x <= t_s[-1])]
    left = np.searchsorted(t_s, inside, side="right") - 1
    out[3:] += np.bincount(run[left], minlength=max(n_runs - 1, 0))[: max(n_runs - 1, 0)]
    return out


# --------------------------------------------------------------------------
# Dask plumbing
# --------------------------------------------------------------------------


def segments_per_block(segments: xr.Dataset, chunks: tuple) -> tuple[np.ndarray, np.ndarray]:
    """Block index of every segment, and segments per block."""
    block = block_of_segment(segments, chunks)
    counts = np.bincount(block, minlength=len(chunks[0])) if block.size else np.zeros(len(chunks[0]), int)
    return block, counts
