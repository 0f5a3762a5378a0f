"""Crossover search between survey-line and tie-line tracks.

A crossover is a point where the track of a survey-line segment (one line of
one sensor) crosses the track of a tie-line segment. Tracks are the
decimated polylines of :func:`lodeline.steps._levelling_blocks.block_tracks`
(one vertex about every metre, pieces split at gaps). Every chord (pair of
consecutive vertices of one piece) of a survey track is tested against the
tie-track chords near it, found with a k-d tree of chord midpoints
(:class:`scipy.spatial.cKDTree`): two chords can only cross when their
midpoints are closer than half the sum of their lengths. Two chords
``p + t r`` and ``q + u w`` (``0 <= t, u < 1``) cross where

    t = ((q - p) x w) / (r x w),   u = ((q - p) x r) / (r x w)

with ``x`` the 2-D cross product (the standard parametric line-segment
intersection, e.g. O'Rourke 1998, Computational Geometry in C, 2nd ed.,
Cambridge University Press; from memory, section not checked). The along-track distance of the crossing on each
track is interpolated linearly along the chord.

Crossings at an angle below ``min_angle_deg`` are left out: there a small
position error moves the crossing a long way along both tracks (the along-
track error grows as 1 / sin(angle)). Crossings of the same pair of
segments closer than ``merge_m`` along the survey track (a wandering track
crossing the same line twice within a metre or two) count once.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

__all__ = ["chords", "find_crossovers", "CROSSING_COLUMNS"]

#: Columns of the table returned by :func:`find_crossovers`.
CROSSING_COLUMNS = ("seg_line", "seg_tie", "easting", "northing", "s_line", "s_tie", "angle_deg")


def chords(vertices: np.ndarray) -> dict:
    """Chords of decimated tracks.

    Parameters
    ----------
    vertices : ndarray, shape (vertices, 5)
        Segment number, piece, easting, northing and along-track distance
        of each vertex, grouped by segment and in track order.

    Returns
    -------
    dict of ndarray
        ``seg``, ``x0``, ``y0``, ``x1``, ``y1``, ``s0``, ``s1`` of every chord
        joining two consecutive vertices of one piece of one segment.
    """
    v = np.asarray(vertices, dtype=np.float64)
    if v.shape[0] < 2:
        empty = np.zeros(0)
        return {k: empty for k in ("seg", "x0", "y0", "x1", "y1", "s0", "s1")}
    same = (v[1:, 0] == v[:-1, 0]) & (v[1:, 1] == v[:-1, 1])
    a, b = v[:-1][same], v[1:][same]
    return {
        "seg": a[:, 0].astype(np.int64),
        "x0": a[:, 2],
        "y0": a[:, 3],
        "x1": b[:, 2],
        "y1": b[:, 3],
        "s0": a[:, 4],
        "s1": b[:, 4],
    }


def find_crossovers(
    vertices: np.ndarray, is_tie_segment: np.ndarray, *, min_angle_deg: float, merge_m: float
) -> pd.DataFrame:
    """Every crossing of a survey-line track with a tie-line track.

    Parameters
    ----------
    vertices : ndarray, shape (vertices, 5)
        Decimated tracks (global segment number, piece, easting, northing,
        along-track distance in m), grouped by segment in track order.
    is_tie_segment : ndarray of bool
        Per global segment, true for a tie-line segment.
    min_angle_deg : float
        Smallest crossing angle kept, degrees (0-90).
    merge_m : float
        Crossings of the same two segments closer than this along the
        survey track count once, m.

    Returns
    -------
    pandas.DataFrame
        One row per crossing, columns :data:`CROSSING_COLUMNS`: the survey
        and tie segment numbers, the crossing point (m), the along-track
        distance of the crossing on each track (m) and the crossing angle
        (degrees, 0-90), sorted by survey segment, tie segment and distance.
    """
    c = chords(vertices)
    empty = pd.DataFrame({k: np.zeros(0) for k in CROSSING_COLUMNS}).astype({"seg_line": np.int64, "seg_tie": np.int64})
    if c["seg"].size == 0:
        return empty
    is_tie_segment = np.asarray(is_tie_segment, dtype=bool)
    tie = is_tie_segment[c["seg"]]
    line_idx, tie_idx = np.flatnonzero(~tie), np.flatnonzero(tie)
    if line_idx.size == 0 or tie_idx.size == 0:
        return empty
    mid = np.column_stack([(c["x0"] + c["x1"]) / 2, (c["y0"] + c["y1"]) / 2])
    length = np.hypot(c["x1"] - c["x0"], c["y1"] - c["y0"])
    radius = 0.5 * (length[line_idx].max() + length[tie_idx].max()) * (1 + 1e-9) + 1e-9
    tree = cKDTree(mid[tie_idx])
    near = tree.query_ball_point(mid[line_idx], r=radius)
    counts = np.fromiter((len(x) for x in near), dtype=np.int64, count=len(near))
    if counts.sum() == 0:
        return empty
    i = np.repeat(line_idx, counts)
    j = tie_idx[np.concatenate([np.asarray(x, dtype=np.int64) for x in near if len(x)])]

    px, py = c["x0"][i], c["y0"][i]
    rx, ry = c["x1"][i] - px, c["y1"][i] - py
    qx, qy = c["x0"][j], c["y0"][j]
    wx, wy = c["x1"][j] - qx, c["y1"][j] - qy
    denom = rx * wy - ry * wx
    dx, dy = qx - px, qy - py
    with np.errstate(divide="ignore", invalid="ignore"):
        t = (dx * wy - dy * wx) / denom
        u = (dx * ry - dy * rx) / denom
    hit = (denom != 0) & (t >= 0) & (t < 1) & (u >= 0) & (u < 1)
    cosang = np.abs(rx * wx + ry * wy) / (np.hypot(rx, ry) * np.hypot(wx, wy))
    angle = np.degrees(np.arccos(np.clip(cosang, 0.0, 1.0)))
    hit &= angle >= min_angle_deg
    i, j, t, u, angle = i[hit], j[hit], t[hit], u[hit], angle[hit]
    table = pd.DataFrame(
        {
            "seg_line": c["seg"][i],
            "seg_tie": c["seg"][j],
            "easting": c["x0"][i] + t * (c["x1"][i] - c["x0"][i]),
            "northing": c["y0"][i] + t * (c["y1"][i] - c["y0"][i]),
            "s_line": c["s0"][i] + t * (c["s1"][i] - c["s0"][i]),
            "s_tie": c["s0"][j] + u * (c["s1"][j] - c["s0"][j]),
            "angle_deg": angle,
        }
    )
    table = table.sort_values(["seg_line", "seg_tie", "s_line"], kind="stable").reset_index(drop=True)
    if len(table) > 1 and merge_m > 0:
        same_pair = (table["seg_line"].diff() == 0) & (table["seg_tie"].diff() == 0)
        close = same_pair & (table["s_line"].diff() < merge_m)
        table = table[~close.to_numpy()].reset_index(drop=True)
    return table
