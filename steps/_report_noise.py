"""Noise of the levelled readings from their fourth differences, chunk by chunk.

For white noise of standard deviation ``sigma`` the k-th difference
``d_k[i] = sum_j (-1)^j C(k, j) x[i + j]`` has variance ``C(2k, k) sigma^2``
(the variate difference method; Tintner 1940), 70 sigma^2 for k = 4, while
any polynomial of degree below 4 along the track disappears (Hildebrand
1974, finite differences). ``d_4 / sqrt(70)`` is therefore an estimate of
the noise reading by reading; the short anomalies of targets survive the
difference and fill the tails, so the noise level is taken robustly:
``1.4826 x median |d_4 / sqrt(70)|`` (the normal-consistent median absolute
deviation about zero; Hampel 1974).

Differences never cross a segment end (one line of one sensor), and a
difference that touches a reading flagged with an excluded flag or a NaN is
left out. Each dask block (whole segments) gives a histogram per sensor on
fixed bins; the histograms are summed, so memory does not grow with the
survey. The median of ``|d|`` is read from the summed, folded histogram,
interpolated linearly within its bin (:data:`BIN_NT`).

References
----------
Hampel, F. R. (1974). The influence curve and its role in robust
    estimation. JASA 69(346), 383-393. [Hampel1974]_
Hildebrand, F. B. (1974). Introduction to Numerical Analysis, 2nd ed.
    McGraw-Hill. [Hildebrand1974]_
Tintner, G. (1940). The Variate Difference Method. Principia Press.
    [Tintner1940]_ (cited from memory)
"""

from __future__ import annotations

import dask
import numpy as np
import xarray as xr

__all__ = ["BIN_NT", "FOURTH_DIFFERENCE", "difference_noise", "robust_sigma_from_histogram"]

#: Weights of the fourth difference, and the variance ratio C(8, 4) = 70.
FOURTH_DIFFERENCE = np.array([1.0, -4.0, 6.0, -4.0, 1.0])
_SCALE = 1.0 / np.sqrt(70.0)
#: Histogram bin width, nT, and half range (values beyond go to the end bins).
BIN_NT = 0.002
HALF_RANGE_NT = 2.0
EDGES = np.arange(-HALF_RANGE_NT, HALF_RANGE_NT + BIN_NT / 2, BIN_NT)


def _block_histogram(values, flags, line, sensor, exclude, n_sensors):
    values, flags, line, sensor = (np.asarray(a) for a in (values, flags, line, sensor))
    counts = np.zeros((n_sensors, len(EDGES) - 1), dtype=np.int64)
    n = values.size
    if n < 5:
        return counts
    good = np.isfinite(values) & ((flags & exclude) == 0)
    same = (line[1:] == line[:-1]) & (sensor[1:] == sensor[:-1])
    x = np.where(good, values, 0.0)
    d = sum(w * x[j : n - 4 + j] for j, w in enumerate(FOURTH_DIFFERENCE)) * _SCALE
    ok = np.ones(n - 4, bool)
    for j in range(5):
        ok &= good[j : n - 4 + j]
    for j in range(4):
        ok &= same[j : n - 4 + j]
    d = np.clip(d[ok], EDGES[0], EDGES[-1])
    s = sensor[:-4][ok].astype(np.int64)
    for k in np.unique(s):
        counts[k] += np.histogram(d[s == k], bins=EDGES)[0]
    return counts


def robust_sigma_from_histogram(counts: np.ndarray) -> float:
    """``1.4826 x median |x|`` from a histogram on :data:`EDGES`, nT (NaN when empty)."""
    counts = np.asarray(counts, dtype=np.int64)
    total = counts.sum()
    if total == 0:
        return float("nan")
    half = counts.size // 2
    folded = counts[half:] + counts[:half][::-1]      # |x| in [0, b), [b, 2b)...: EDGES is symmetric about 0
    cum = np.cumsum(folded)
    k = int(np.searchsorted(cum, 0.5 * total))
    below = cum[k - 1] if k else 0
    median = BIN_NT * (k + (0.5 * total - below) / folded[k])   # linear within the bin
    return float(1.4826 * median)


def difference_noise(readings: xr.Dataset, variable: str, exclude: int) -> dict:
    """Histogram and robust level of the fourth-difference noise, per sensor.

    Parameters
    ----------
    readings : xarray.Dataset
        Readings along ``reading`` in segment-aligned chunks, with
        ``variable`` (nT), ``flags``, ``line_index`` and ``sensor_index``.
    variable : str
        The field variable (``"residual"``).
    exclude : int
        Bit mask of flags whose readings are left out.

    Returns
    -------
    dict
        ``edges`` (nT), ``counts`` (n_sensors x bins), ``sigma_nT`` (per
        sensor, nT), ``sigma_all_nT`` (all sensors) and ``differences``
        (counted).
    """
    n_sensors = len(readings.attrs.get("sensor_names", [])) or int(readings["sensor_index"].max()) + 1
    import dask.array as da

    data = [readings[name].data for name in (variable, "flags", "line_index", "sensor_index")]
    chunks = data[0].chunks if isinstance(data[0], da.Array) else ((len(data[0]),),)
    blocks = [(a if isinstance(a, da.Array) else da.from_array(np.asarray(a), chunks=chunks)).rechunk(chunks)
              .to_delayed().ravel() for a in data]
    parts = [dask.delayed(_block_histogram)(v, f, li, si, np.uint32(exclude), n_sensors) for v, f, li, si in zip(*blocks)]
    counts = np.sum(dask.compute(*parts), axis=0)
    return {
        "edges": EDGES.copy(),
        "counts": counts,
        "sigma_nT": [robust_sigma_from_histogram(c) for c in counts],
        "sigma_all_nT": robust_sigma_from_histogram(counts.sum(axis=0)),
        "differences": int(counts.sum()),
    }
