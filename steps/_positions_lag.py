"""Time-lag estimate from survey lines run in opposite directions.

Used by the positions stage (``steps/positions.py``) when no lag is
given. A reading stamped ``T`` was measured at ``T - lag``; placed at the
position of time ``T`` it lands ``lag * v`` ahead of where it was measured,
in the direction of travel. Two lines over the same track run in opposite
directions therefore show the same anomaly ``2 * lag * v`` apart: the
zig-zag pattern of a lag on a map of alternating lines, and the usual lag
test of a survey (common practice, no published source cited here).

Method
------
1. *Tracks.* The sensor track of every survey-line segment (tie lines
   cross the survey lines and seldom repeat a track) whose lag is wanted is taken
   with the stage's offsets and layback and no lag, decimated to one point
   per ``_STEP_M`` metres along the track (one dask block at a time).
2. *Pairs.* Segments of two different lines whose tracks run in opposite
   directions (courses more than 135 degrees apart) and lie within
   ``max_separation_m`` of each other (median cross-track distance, and
   over at least ``min_overlap_m`` of track) form a pair. Within a pair of
   lines, pairs are taken closest first and each segment once, so an
   array's neighbouring sensor tracks are not paired twice. A k-d tree
   finds neighbours (Bentley 1975, via :class:`scipy.spatial.cKDTree`).
3. *Profiles.* For each pair, loaded one pair at a time, the readings of
   both segments are placed on a common along-track axis ``u``: the
   along-track distance of the first segment's sensor track, onto which
   the second segment's readings are projected (nearest track point, then
   along its course). Readings of the second segment farther than
   ``max_separation_m`` from that track, and readings whose flags exclude
   them, are left out. The field is high-passed by removing its running
   mean over ``highpass_m`` of track, which takes out the regional field,
   the slow external variation and level differences (heading error).
4. *Misfit.* A trial lag ``tau`` moves each reading back along ``u`` by
   ``tau * du/dt`` (its own along-track velocity, signed, so the two
   directions move apart); both profiles are linearly interpolated onto a
   grid of half the reading spacing and the variance of their difference
   is the misfit. It is evaluated on a 0.02 s grid over
   ``[-search_s, search_s]`` and its minimum refined by Brent's method
   (Brent 1973, via :func:`scipy.optimize.minimize_scalar`). A pair is used
   when the minimum lies inside the search range, the misfit is curved
   there and the correlation of the two profiles at the minimum is at
   least ``min_correlation``.
5. *Uncertainty of a pair.* ``se = sqrt(M / (N * M'' / 2))`` with ``M`` the
   misfit at the minimum, ``M''`` its second derivative in ``tau`` and
   ``N`` the number of readings of the shorter profile: the Gauss-Newton
   standard error of one parameter (Press et al. 2007, ch. 15.5,
   from memory), which assumes independent residuals between readings and
   so is optimistic where the two profiles differ by more than noise.
6. *Combination.* The lag is the median of the pairs' lags. Its
   uncertainty is the larger of two standard errors of the median: from
   the scatter of the pairs, ``sqrt(pi / 2) * 1.4826 * MAD / sqrt(n)``
   (the MAD scaled to a Gaussian sigma, Rousseeuw & Croux 1993; the
   sample median's variance ``pi sigma**2 / (2 n)`` for Gaussian data,
   Stuart & Ord 1994, from memory; at least three pairs), and from the
   pairs' own errors, ``sqrt(pi / 2) * median(se) / sqrt(n)``.

The shift of opposite lines also holds any along-track position error:
a layback wrong by ``dL`` adds ``dL / v`` to the estimated lag, so the lag
is only as good as the layback given. Lines of different speeds separate
the two only weakly.

References
----------
Bentley, J. L. (1975). Multidimensional binary search trees used for
    associative searching. Communications of the ACM 18(9), 509-517.
Brent, R. P. (1973). Algorithms for Minimization without Derivatives.
    Prentice-Hall, ch. 5.
Press, W. H., Teukolsky, S. A., Vetterling, W. T. & Flannery, B. P. (2007).
    Numerical Recipes, 3rd ed. Cambridge University Press, ch. 15.
Rousseeuw, P. J. & Croux, C. (1993). Alternatives to the median absolute
    deviation. Journal of the American Statistical Association 88(424),
    1273-1283.
Stuart, A. & Ord, J. K. (1994). Kendall's Advanced Theory of Statistics,
    vol. 1, 6th ed. Arnold (variance of the sample median).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.optimize import minimize_scalar
from scipy.spatial import cKDTree

from ._positions_track import segment_positions

__all__ = [
    "PAIR_COLUMNS",
    "block_tracks",
    "find_pairs",
    "highpass",
    "pair_lag",
    "combine",
]

#: Along-track spacing of the decimated tracks used to find pairs, m.
_STEP_M = 1.0

#: Courses more than this far apart are "opposite", degrees.
_OPPOSITE_DEG = 135.0

#: Step of the coarse lag grid, s.
_COARSE_S = 0.02

#: Step of the finite difference for the misfit curvature, s.
_CURVE_S = 0.01

#: Gaussian consistency factor of the MAD (Rousseeuw & Croux 1993).
_MAD_TO_SIGMA = 1.4826

#: Columns of the per-pair table.
PAIR_COLUMNS = (
    "group", "line_a", "sensor_a", "line_b", "sensor_b", "overlap_m", "separation_m",
    "speed_a_m_s", "speed_b_m_s", "readings", "lag_s", "se_s", "correlation", "used", "note",
)


# --------------------------------------------------------------------------
# Decimated tracks and pairs
# --------------------------------------------------------------------------


def block_tracks(
    time, easting, northing, starts, seg_ids, across, along, layback, *, window_m: float
) -> np.ndarray:
    """Decimated sensor tracks (no lag) of the wanted segments of one block.

    Parameters
    ----------
    time : ndarray of datetime64[ns]
        Time stamps of the block's readings.
    easting, northing : ndarray of float
        Antenna position, m.
    starts : ndarray of int
        Segment starts relative to the block.
    seg_ids : ndarray of int
        Global index of each segment of the block; negative for segments
        not wanted.
    across, along, layback : ndarray of float
        Per segment: offsets and layback, m.
    window_m : float
        Track smoothing window, m.

    Returns
    -------
    ndarray, shape (points, 5)
        Segment index, easting (m), northing (m) and unit course (east,
        north) of one point per ``_STEP_M`` of track.
    """
    ns = np.asarray(time).astype("datetime64[ns]").astype(np.int64)
    size = ns.size
    starts = np.asarray(starts, dtype=np.int64)
    stops = np.append(starts[1:], size)
    rows = []
    for i, (a, b) in enumerate(zip(starts, stops)):
        if seg_ids[i] < 0 or b - a < 2:
            continue
        p = segment_positions(
            (ns[a:b] - ns[a]) / 1e9, np.asarray(easting[a:b], float), np.asarray(northing[a:b], float),
            across_m=float(across[i]), along_m=float(along[i]), layback_m=float(layback[i]),
            lag_s=0.0, window_m=window_m,
        )
        ok = np.flatnonzero(np.isfinite(p["e"]) & np.isfinite(p["ue"]) & np.isfinite(p["s"]))
        if ok.size == 0:
            continue
        bins = np.floor(p["s"][ok] / _STEP_M)
        first = ok[np.concatenate([[True], bins[1:] != bins[:-1]])]
        rows.append(np.column_stack([np.full(first.size, seg_ids[i], float), p["e"][first], p["n"][first],
                                     p["ue"][first], p["un"][first]]))
    return np.concatenate(rows) if rows else np.zeros((0, 5))


def find_pairs(
    tracks: np.ndarray,
    seg_line: np.ndarray,
    seg_group: np.ndarray,
    *,
    max_separation_m: float,
    min_overlap_m: float,
    max_pairs: int,
) -> pd.DataFrame:
    """Pairs of segments of different lines over the same track in opposite directions.

    Parameters
    ----------
    tracks : ndarray, shape (points, 5)
        From :func:`block_tracks` (all blocks), sorted by segment.
    seg_line, seg_group : ndarray of int
        Line index and estimation group of every segment (global index).
    max_separation_m, min_overlap_m : float
        Largest median cross-track distance of a pair, and least length of
        track closer than that, m.
    max_pairs : int
        Most pairs returned (the longest overlaps).

    Returns
    -------
    pandas.DataFrame
        Columns ``a``, ``b`` (segment indices, a < b), ``overlap_m``,
        ``separation_m`` (median cross-track distance, m).
    """
    columns = ["a", "b", "overlap_m", "separation_m"]
    if tracks.shape[0] == 0:
        return pd.DataFrame({c: [] for c in columns})
    seg = tracks[:, 0].astype(np.int64)
    xy = tracks[:, 1:3]
    tan = tracks[:, 3:5]
    tree = cKDTree(xy)
    radius = 2.0 * max_separation_m + _STEP_M
    cos_opposite = np.cos(np.radians(_OPPOSITE_DEG))
    bounds = np.flatnonzero(np.diff(seg)) + 1
    found = []
    for ia in np.split(np.arange(seg.size), bounds):
        a = seg[ia[0]]
        near = cKDTree(xy[ia]).sparse_distance_matrix(tree, radius, output_type="ndarray")
        if near.size == 0:
            continue
        i, j = ia[near["i"]], near["j"]
        b = seg[j]
        keep = (b > a) & (seg_line[b] != seg_line[a]) & (seg_group[b] == seg_group[a])
        d = xy[i] - xy[j]
        along = np.abs(d[:, 0] * tan[j, 0] + d[:, 1] * tan[j, 1])
        perp = np.abs(d[:, 0] * tan[j, 1] - d[:, 1] * tan[j, 0])
        opposite = tan[i, 0] * tan[j, 0] + tan[i, 1] * tan[j, 1] < cos_opposite
        keep &= opposite & (along <= 0.75 * _STEP_M)
        if not keep.any():
            continue
        # Cross-track distance from each point of a to each segment b: the
        # nearest of b's points (sort by point, segment, distance; keep firsts).
        ii, bb, pp = i[keep], b[keep], perp[keep]
        order = np.lexsort((pp, bb, ii))
        ii, bb, pp = ii[order], bb[order], pp[order]
        first = np.concatenate([[True], (ii[1:] != ii[:-1]) | (bb[1:] != bb[:-1])])
        bb, pp = bb[first], pp[first]
        order = np.argsort(bb, kind="stable")
        bb, pp = bb[order], pp[order]
        partners, at = np.unique(bb, return_index=True)
        for partner, dist in zip(partners, np.split(pp, at[1:])):
            overlap = float(np.count_nonzero(dist <= max_separation_m)) * _STEP_M
            separation = float(np.median(dist))
            if overlap >= min_overlap_m and separation <= max_separation_m:
                found.append((int(a), int(partner), overlap, separation))
    if not found:
        return pd.DataFrame({c: [] for c in columns})
    cand = pd.DataFrame(found, columns=columns)
    cand["line_a"] = seg_line[cand["a"]]
    cand["line_b"] = seg_line[cand["b"]]
    chosen = []
    for _, group in cand.sort_values(["separation_m", "a", "b"]).groupby(["line_a", "line_b"], sort=False):
        used: set[int] = set()
        for row in group.itertuples(index=False):
            if row.a in used or row.b in used:
                continue
            used.update((row.a, row.b))
            chosen.append(row)
    out = pd.DataFrame(chosen, columns=cand.columns)[columns]
    out = out.sort_values(["overlap_m", "a"], ascending=[False, True]).head(max_pairs)
    return out.sort_values(["a", "b"]).reset_index(drop=True)


# --------------------------------------------------------------------------
# Lag of one pair
# --------------------------------------------------------------------------


def highpass(s: np.ndarray, f: np.ndarray, window_m: float) -> np.ndarray:
    """Field less its running mean over ``window_m`` of along-track distance ``s``.

    Parameters
    ----------
    s : ndarray of float
        Along-track distance of the readings, m (any order).
    f : ndarray of float
        Field, nT (finite).
    window_m : float
        Window length, m (centred, truncated at the ends).
    """
    order = np.argsort(s, kind="stable")
    ss, ff = s[order], f[order] - np.mean(f)
    c = np.concatenate([[0.0], np.cumsum(ff)])
    lo = np.searchsorted(ss, ss - 0.5 * window_m, side="left")
    hi = np.searchsorted(ss, ss + 0.5 * window_m, side="right")
    out = np.empty_like(ff)
    out[order] = ff - (c[hi] - c[lo]) / (hi - lo)
    return out


def _nearest_gap(grid: np.ndarray, points: np.ndarray) -> np.ndarray:
    """Distance from each grid value to the nearest of the sorted ``points``."""
    k = np.clip(np.searchsorted(points, grid), 1, points.size - 1)
    return np.minimum(np.abs(grid - points[k - 1]), np.abs(points[k] - grid))


def pair_lag(
    seg_a: dict,
    seg_b: dict,
    *,
    offsets_a: dict,
    offsets_b: dict,
    window_m: float,
    max_separation_m: float,
    min_overlap_m: float,
    highpass_m: float,
    search_s: float,
    min_correlation: float,
) -> dict:
    """Lag that best aligns the profiles of two opposite-direction segments.

    Parameters
    ----------
    seg_a, seg_b : dict
        ``t`` (s), ``e``, ``n`` (antenna, m), ``field`` (nT) and ``valid``
        (bool: finite field, not excluded by its flags) of each segment.
    offsets_a, offsets_b : dict
        ``across_m``, ``along_m``, ``layback_m`` of each segment's sensor.
    window_m : float
        Track smoothing window, m.
    max_separation_m, min_overlap_m, highpass_m : float
        See the module docstring, m.
    search_s : float
        Largest absolute lag tried, s.
    min_correlation : float
        Least correlation of the aligned profiles for the pair to be used.

    Returns
    -------
    dict
        ``lag_s``, ``se_s``, ``correlation``, ``overlap_m``, ``readings``,
        ``speed_a_m_s``, ``speed_b_m_s``, ``separation_m`` (median
        cross-track distance of the readings used, m), ``used`` and
        ``note`` (why not used).
    """
    out = {"lag_s": np.nan, "se_s": np.nan, "correlation": np.nan, "overlap_m": 0.0, "readings": 0,
           "speed_a_m_s": np.nan, "speed_b_m_s": np.nan, "separation_m": np.nan, "used": False, "note": ""}
    pa = segment_positions(seg_a["t"], seg_a["e"], seg_a["n"], window_m=window_m, **offsets_a)
    pb = segment_positions(seg_b["t"], seg_b["e"], seg_b["n"], window_m=window_m, **offsets_b)
    ref = np.flatnonzero(np.isfinite(pa["e"]) & np.isfinite(pa["ue"]))
    if ref.size < 3:
        out["note"] = "no track on the first line"
        return out
    ref_xy = np.column_stack([pa["e"][ref], pa["n"][ref]])
    ref_s, ref_te, ref_tn = pa["s"][ref], pa["ue"][ref], pa["un"][ref]

    ok_a = seg_a["valid"] & np.isfinite(pa["e"]) & np.isfinite(pa["s"])
    ok_b = seg_b["valid"] & np.isfinite(pb["e"]) & np.isfinite(pb["ue"])
    if ok_a.sum() < 3 or ok_b.sum() < 3:
        out["note"] = "too few valid readings"
        return out
    ua, wa = pa["s"][ok_a], pa["speed"][ok_a]
    fa = highpass(ua, seg_a["field"][ok_a], highpass_m)

    xy_b = np.column_stack([pb["e"][ok_b], pb["n"][ok_b]])
    _, k = cKDTree(ref_xy).query(xy_b)
    d = xy_b - ref_xy[k]
    ub_all = ref_s[k] + d[:, 0] * ref_te[k] + d[:, 1] * ref_tn[k]
    sep = np.abs(d[:, 0] * ref_tn[k] - d[:, 1] * ref_te[k])
    wb_all = pb["speed"][ok_b] * (pb["ue"][ok_b] * ref_te[k] + pb["un"][ok_b] * ref_tn[k])
    fb_all = highpass(pb["s"][ok_b], seg_b["field"][ok_b], highpass_m)
    close = (sep <= max_separation_m) & (ub_all >= ref_s.min()) & (ub_all <= ref_s.max())
    if close.sum() < 3:
        out["note"] = "tracks do not overlap"
        return out
    ub, wb, fb = ub_all[close], wb_all[close], fb_all[close]
    out["separation_m"] = float(np.median(sep[close]))

    spacing_a = float(np.median(np.abs(np.diff(np.sort(ua))))) or 0.1
    spacing_b = float(np.median(np.abs(np.diff(np.sort(ub))))) or 0.1
    lo, hi = max(ua.min(), ub.min()), min(ua.max(), ub.max())
    du = 0.5 * min(spacing_a, spacing_b)
    if hi - lo < min_overlap_m:
        out["note"] = f"overlap {max(hi - lo, 0.0):.1f} m is shorter than the minimum"
        return out
    grid = np.arange(lo, hi, du)
    mask = (_nearest_gap(grid, np.sort(ua)) <= 1.5 * spacing_a) & (_nearest_gap(grid, np.sort(ub)) <= 1.5 * spacing_b)
    out["overlap_m"] = float(mask.sum() * du)
    if out["overlap_m"] < min_overlap_m:
        out["note"] = f"overlap {out['overlap_m']:.1f} m is shorter than the minimum"
        return out
    in_a = (ua >= lo) & (ua <= hi)
    in_b = (ub >= lo) & (ub <= hi)
    out["readings"] = int(min(in_a.sum(), in_b.sum()))
    out["speed_a_m_s"] = float(np.median(np.abs(wa[in_a])))
    out["speed_b_m_s"] = float(np.median(np.abs(wb[in_b])))
    g = grid[mask]

    def profiles(tau: float):
        xa = ua - tau * wa
        xb = ub - tau * wb
        oa, ob = np.argsort(xa), np.argsort(xb)
        return np.interp(g, xa[oa], fa[oa]), np.interp(g, xb[ob], fb[ob])

    def misfit(tau: float) -> float:
        pa_, pb_ = profiles(tau)
        r = pa_ - pb_
        return float(np.mean((r - r.mean()) ** 2))

    taus = np.arange(-search_s, search_s + 0.5 * _COARSE_S, _COARSE_S)
    values = np.array([misfit(t) for t in taus])
    i0 = int(np.argmin(values))
    if i0 == 0 or i0 == taus.size - 1:
        out["note"] = "best lag at the edge of the search range"
        return out
    best = minimize_scalar(misfit, bounds=(taus[i0 - 1], taus[i0 + 1]), method="bounded",
                           options={"xatol": 1e-4})
    tau, m0 = float(best.x), float(best.fun)
    curve = (misfit(tau + _CURVE_S) - 2.0 * m0 + misfit(tau - _CURVE_S)) / _CURVE_S**2
    pa_, pb_ = profiles(tau)
    corr = float(np.corrcoef(pa_, pb_)[0, 1]) if np.std(pa_) > 0 and np.std(pb_) > 0 else np.nan
    out.update(lag_s=tau, correlation=corr)
    if not curve > 0:
        out["note"] = "misfit not curved at its minimum"
        return out
    out["se_s"] = float(np.sqrt(m0 / (out["readings"] * 0.5 * curve)))
    if not corr >= min_correlation:
        out["note"] = f"correlation {corr:.2f} below the minimum"
        return out
    out["used"] = True
    return out


def combine(lags, ses) -> dict:
    """Median lag of the pairs and its standard error.

    Parameters
    ----------
    lags, ses : array of float
        Lag and standard error of each pair used, s.

    Returns
    -------
    dict
        ``lag_s`` (median), ``uncertainty_s`` (the larger of ``se_scatter_s``
        and ``se_pairs_s``), ``se_scatter_s`` (from the MAD, NaN below three
        pairs), ``se_pairs_s`` (from the pairs' own errors) and ``pairs``.
    """
    lags = np.asarray(lags, dtype=float)
    ses = np.asarray(ses, dtype=float)
    n = lags.size
    if n == 0:
        return {"lag_s": np.nan, "uncertainty_s": np.nan, "se_scatter_s": np.nan, "se_pairs_s": np.nan, "pairs": 0}
    median = float(np.median(lags))
    factor = np.sqrt(np.pi / 2.0) / np.sqrt(n)
    mad = float(np.median(np.abs(lags - median)))
    scatter = factor * _MAD_TO_SIGMA * mad if n >= 3 else np.nan
    own = factor * float(np.median(ses))
    return {"lag_s": median, "uncertainty_s": float(np.nanmax([scatter, own])), "se_scatter_s": scatter,
            "se_pairs_s": own, "pairs": int(n)}
