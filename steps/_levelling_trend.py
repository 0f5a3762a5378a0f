"""Along-line robust trend: a penalised B-spline fitted with biweight weights.

Each segment's residual, on its accepted readings and as a function of the
distance along its track, is fitted by a cubic B-spline with knots every
``knot_spacing_m`` metres and a second-difference penalty on its
coefficients (P-splines; Eilers & Marx 1996, Flexible smoothing with
B-splines and penalties). The fit is iteratively reweighted with Tukey's
biweight (Beaton & Tukey 1974, The fitting of power series, meaning
polynomials, illustrated on band-spectroscopic data; weights
``(1 - (r / (c s))^2)^2`` for ``|r| < c s``, else 0, ``s`` the scaled median
absolute deviation of the residuals, ``c = robust_multiple``), starting
from a running median (``_levelling_median``) of twice the knot spacing.
Readings on an anomaly get zero weight, so the spline passes under it; the
penalty carries it straight across any stretch without weight (a wreck, a
gap), so geology, residual line levels and slow drift go into the trend and
compact anomalies stay in the residual.

Compared with the running median alone, the trend is not pulled by the
readings of an anomaly on a regional gradient (the median's ``g w / 2``
shift, see ``_levelling_median``): those readings carry no weight. What the
trend cannot separate is an anomaly wider than about the knot spacing:
choose ``knot_spacing_m`` at least twice the widest anomaly of interest
(common practice, no published source).
"""

from __future__ import annotations

import numpy as np
from scipy import sparse
from scipy.interpolate import BSpline
from scipy.sparse.linalg import spsolve

from ._levelling_blocks import accepted_mask, along_track
from ._levelling_median import running_median, window_samples

__all__ = ["robust_trend", "block_trend"]

MAD_TO_SIGMA = 1.4826


def _design(s: np.ndarray, spacing: float) -> tuple[np.ndarray, int]:
    lo, hi = float(s.min()), float(s.max())
    n_int = max(1, int(np.ceil((hi - lo) / spacing)))
    inner = np.linspace(lo, hi, n_int + 1)
    knots = np.concatenate([[lo] * 3, inner, [hi] * 3])
    # Sparse: four non-zero basis values per reading, so the normal equations
    # are banded and cost O(readings), not O(readings x knots^2).
    basis = BSpline.design_matrix(np.clip(s, lo, hi), knots, 3).tocsr()
    return basis, basis.shape[1]


def robust_trend(s: np.ndarray, v: np.ndarray, knot_spacing_m: float, robust_multiple: float = 4.685,
                 iterations: int = 10, penalty: float = 1.0) -> np.ndarray:
    """Robust P-spline trend of ``v`` (nT) along ``s`` (m, increasing), evaluated at ``s``.

    ``penalty`` multiplies the second-difference penalty relative to the
    number of readings per knot interval (1: the penalty weighs like one
    interval of readings).
    """
    n = v.size
    if n < 8:
        return np.full(n, np.median(v)) if n else v.copy()
    size = window_samples(2 * knot_spacing_m, float(np.median(np.diff(s))) if n > 1 else np.nan, n)
    start = running_median(v, size)
    basis, m = _design(s, knot_spacing_m)
    if m < 4:
        return start
    d2 = sparse.diags([1.0, -2.0, 1.0], [0, 1, 2], shape=(m - 2, m))
    per_interval = n / max(1, m - 3)
    pen = (penalty * per_interval * (d2.T @ d2)).tocsc()
    fit = start
    for _ in range(iterations):
        r = v - fit
        scale = MAD_TO_SIGMA * np.median(np.abs(r - np.median(r)))
        if not scale > 0:
            break
        u = r / (robust_multiple * scale)
        w = np.where(np.abs(u) < 1.0, (1.0 - u * u) ** 2, 0.0)
        bw = basis.multiply(w[:, None]).tocsr()
        try:
            coef = spsolve((basis.T @ bw + pen).tocsc(), bw.T @ v)
        except (np.linalg.LinAlgError, RuntimeError):
            break
        if not np.all(np.isfinite(coef)):  # singular system (spsolve warns and returns NaN)
            break
        new = basis @ coef
        done = np.max(np.abs(new - fit)) < 1e-4 * max(scale, 1e-12)
        fit = new
        if done:
            break
    return fit


def block_trend(easting, northing, time, values, flags, starts, *, exclude: int, knot_spacing_m: float,
                robust_multiple: float) -> np.ndarray:
    """Robust trend of one block of whole segments (same layout as ``block_median``).

    Returns
    -------
    ndarray of float, shape (readings, 2)
        Column 0: the trend to subtract, nT (NaN for a segment without any
        accepted reading; readings left out take it interpolated by reading
        number). Column 1: 0 (the trend has no end effect to flag).
    """
    e = np.asarray(easting, dtype=np.float64)
    n = np.asarray(northing, dtype=np.float64)
    v = np.asarray(values, dtype=np.float64)
    t = np.asarray(time).astype("datetime64[ns]").astype(np.int64)
    starts = np.asarray(starts, dtype=np.int64)
    bounds = np.append(starts, e.size)
    ok = accepted_mask(e, n, t, v, flags, exclude)
    out = np.zeros((e.size, 2))
    for k in range(starts.size):
        lo, hi = bounds[k], bounds[k + 1]
        keep = np.flatnonzero(ok[lo:hi])
        if keep.size == 0:
            out[lo:hi, 0] = np.nan
            continue
        s, piece = along_track(e[lo:hi][keep], n[lo:hi][keep], max_gap_m=knot_spacing_m)
        trend = np.empty(keep.size)
        for p in np.unique(piece):
            sel = np.flatnonzero(piece == p)
            trend[sel] = robust_trend(s[sel], v[lo:hi][keep[sel]], knot_spacing_m, robust_multiple)
        out[lo:hi, 0] = np.interp(np.arange(hi - lo), keep, trend)
    return out
