"""Kinds of picks: linear features, extended sources, clusters and points.

Picks are grouped by the connected region of above-threshold cells they
lie in (``steps/_picking_regions.py``). A group's picks are described by
their principal axes (the eigenvectors of the 2 x 2 covariance of their
positions, principal component analysis; Jolliffe 2002, Principal
Component Analysis): ``length_m`` is the full extent of the picks along
the major axis, ``width_m`` the extent of the central 80 % of them across
it (10th to 90th percentile, so that a few picks wandering off a cable's
ridge do not widen it). A group is

``linear``    at least ``linear_min_picks`` picks, at least
              ``linear_min_length_m`` long, no wider than
              ``linear_max_width_m``, at least ``linear_min_aspect`` times as
              long as wide, and joined by a ridge: on the median link
              between consecutive picks along the axis the searched grid
              stays above ``linear_min_ridge_fraction`` of the smaller pick
              (a cable or pipeline; discrete objects in a row show deep
              saddles between them; the median lets a few links that cut a
              corner of a wandering ridge pass): one row, its ends and the
              polyline of its picks;
``extended``  otherwise, at least ``extended_min_picks`` picks in a region
              of at least ``extended_min_area_m2``, their median distance to
              the nearest other pick at most ``extended_max_spacing_m`` (a
              wreck or debris field, where a row of separate objects shows
              wider spacing): one row, the picks' centre, extents and convex
              hull as outline;
``cluster``   otherwise, two picks or more in one region: each pick stays a
              row (each may be an object of its own) with the region's
              ``feature_id``;
``point``     a region holding one pick.

The rules and their default values are common practice, no published
source. A curved feature wider than ``linear_max_width_m`` about its
straight axis is reported as extended or as a cluster, not as linear.
"""

from __future__ import annotations

import numpy as np
from scipy.spatial import ConvexHull, QhullError, cKDTree

__all__ = ["describe_picks", "could_be_linear", "classify", "ridge_samples", "hull", "linestring", "polygon"]


def describe_picks(xy: np.ndarray) -> dict:
    """Centre, length, width, azimuth (grid, 0-180 degrees), order along the axis and ends of a group of picks (m)."""
    centre = xy.mean(axis=0)
    if len(xy) < 2:
        return {"centre": centre, "length_m": 0.0, "width_m": 0.0, "azimuth_deg": np.nan, "order": np.zeros(len(xy), int),
                "ends": (centre, centre), "spacing_m": np.nan}
    gap, _ = cKDTree(xy).query(xy, k=2)
    d = xy - centre
    _, v = np.linalg.eigh(d.T @ d / len(xy))
    major, minor = v[:, 1], v[:, 0]
    along, across = d @ major, d @ minor
    order = np.argsort(along, kind="stable")
    return {
        "centre": centre,
        "length_m": float(np.ptp(along)),
        "width_m": float(np.percentile(across, 90) - np.percentile(across, 10)),
        "azimuth_deg": float(np.degrees(np.arctan2(major[0], major[1])) % 180.0),
        "order": order,
        "ends": (xy[order[0]], xy[order[-1]]),
        "spacing_m": float(np.median(gap[:, 1])),
    }


def could_be_linear(desc: dict, n_picks: int, rules: dict) -> bool:
    """Whether a group's shape passes the linear rules (the ridge test comes after)."""
    return (
        n_picks >= rules["linear_min_picks"]
        and desc["length_m"] >= rules["linear_min_length_m"]
        and desc["width_m"] <= rules["linear_max_width_m"]
        and desc["length_m"] >= rules["linear_min_aspect"] * max(desc["width_m"], 1e-9)
    )


def classify(desc: dict, region: dict | None, n_picks: int, ridge_ok: bool, rules: dict) -> str:
    """Kind of a group of ``n_picks`` picks."""
    if ridge_ok and could_be_linear(desc, n_picks, rules):
        return "linear"
    area = region["area_m2"] if region is not None else 0.0
    if (
        n_picks >= rules["extended_min_picks"]
        and area >= rules["extended_min_area_m2"]
        and desc["spacing_m"] <= rules["extended_max_spacing_m"]
    ):
        return "extended"
    return "cluster" if n_picks >= 2 else "point"


def ridge_samples(cells: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Cells (row, column) on the straight links between consecutive cells, and the link of each sample."""
    rows, cols, link = [], [], []
    for k in range(len(cells) - 1):
        (r0, c0), (r1, c1) = cells[k], cells[k + 1]
        n = int(max(abs(r1 - r0), abs(c1 - c0))) + 1
        t = np.linspace(0.0, 1.0, n)
        rows.append(np.rint(r0 + t * (r1 - r0)).astype(int))
        cols.append(np.rint(c0 + t * (c1 - c0)).astype(int))
        link.append(np.full(n, k))
    if not rows:
        return np.zeros((0, 2), int), np.zeros(0, int)
    return np.column_stack([np.concatenate(rows), np.concatenate(cols)]), np.concatenate(link)


def hull(xy: np.ndarray) -> np.ndarray | None:
    """Convex hull vertices of the points (None for fewer than 3 or collinear points)."""
    if len(xy) < 3:
        return None
    try:
        return xy[ConvexHull(xy).vertices]
    except QhullError:
        return None


def linestring(points: np.ndarray) -> str:
    """WKT LINESTRING of the points, m."""
    return "LINESTRING (" + ", ".join(f"{e:.2f} {n:.2f}" for e, n in points) + ")"


def polygon(points: np.ndarray) -> str:
    """WKT POLYGON of a closed ring of the points, m."""
    ring = np.vstack([points, points[:1]])
    return "POLYGON ((" + ", ".join(f"{e:.2f} {n:.2f}" for e, n in ring) + "))"
