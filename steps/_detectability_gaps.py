"""Gap polygons of the detectability stage: where the target class is not detectable inside the area of interest.

Each tile of the ``class_detectable`` map (0 = not detectable, NaN =
outside the area) is turned into polygons of its 0 cells with
``rasterio.features.shapes`` (GDAL's polygoniser), in whole-cell
coordinates so that pieces of one gap in neighbouring tiles share their
edges exactly; the pieces are joined with ``shapely.unary_union`` and then
moved to the survey CRS. The part of the area of interest that lies off the
grid altogether (nothing was surveyed there) is a gap too. Polygons are
simplified (Douglas & Peucker 1973, ``shapely.simplify`` with the topology
kept) to ``simplify_m``; each polygon keeps the area of its cells before
simplifying (``area_m2``). Gaps smaller than ``min_gap_area_m2`` are counted
but not written (they are too small to plan an infill line over).

For each gap: its area, centroid, and the length, width and azimuth of its
minimum rotated rectangle (the direction an infill line would follow).

References
----------
Douglas, D. H. & Peucker, T. K. (1973). Algorithms for the reduction of the
    number of points required to represent a digitized line or its
    caricature. Cartographica 10(2), 112-122. [Douglas1973]_
"""

from __future__ import annotations

import math

import dask
import numpy as np
import pandas as pd

__all__ = ["gap_polygons", "gap_table", "GAP_COLUMNS"]

GAP_COLUMNS = ["gap_id", "class_name", "area_m2", "centroid_easting_m", "centroid_northing_m", "length_m", "width_m",
               "azimuth_deg", "off_grid_area_m2"]


def _tile_polygons(block: np.ndarray, row0: int, col0: int):
    """Polygons (shapely, whole-cell coordinates: column, row of cell corners) of the 0 cells of one tile."""
    import shapely
    from rasterio import features
    from rasterio.transform import Affine

    gap = block == 0
    if not gap.any():
        return []
    # Rows of the grid run south to north; the polygoniser walks rows as given,
    # so a unit transform keeps (column, row) of cell corners as coordinates.
    # They are offset by one (removed in gap_polygons) so that the transform is
    # never the identity, which the polygoniser takes for "not georeferenced".
    transform = Affine(1.0, 0.0, float(col0) + 1.0, 0.0, 1.0, float(row0) + 1.0)
    return [shapely.geometry.shape(geom)
            for geom, _ in features.shapes(gap.astype(np.uint8), mask=gap, transform=transform, connectivity=4)]


def gap_polygons(detectable, node_e, node_n, cell: float, area_polygon=None):
    """Polygons of the not-detectable cells inside the area, in the survey CRS.

    Parameters
    ----------
    detectable : dask.array.Array (ny, nx)
        The ``class_detectable`` map (1, 0, NaN outside the area).
    node_e, node_n : ndarray
        Cell-centre coordinates, m.
    cell : float
        Cell size, m.
    area_polygon : shapely geometry, optional
        The area of interest; its part off the grid is added as a gap.

    Returns
    -------
    list of (shapely Polygon, float)
        Each gap and the part of its area that lies off the grid, m^2.
    """
    import shapely

    starts = [np.cumsum((0,) + tuple(c[:-1])) for c in detectable.chunks]
    blocks = detectable.to_delayed()
    tasks = [dask.delayed(_tile_polygons)(blocks[i, j], int(starts[0][i]), int(starts[1][j]))
             for i, j in np.ndindex(blocks.shape)]
    pieces = [p for part in dask.compute(*tasks) for p in part]
    x0, y0 = float(node_e[0]) - cell / 2.0, float(node_n[0]) - cell / 2.0

    def to_metres(coords):  # whole-cell coordinates, offset by one (see _tile_polygons)
        return np.column_stack([x0 + (coords[:, 0] - 1.0) * cell, y0 + (coords[:, 1] - 1.0) * cell])

    merged = shapely.transform(shapely.unary_union(pieces), to_metres) if pieces else None
    off = None
    if area_polygon is not None:
        extent = shapely.box(x0, y0, x0 + node_e.size * cell, y0 + node_n.size * cell)
        off = shapely.difference(area_polygon, extent)
        if off.is_empty:
            off = None
    geoms = [g for g in (merged, off) if g is not None]
    if not geoms:
        return []
    union = shapely.unary_union(geoms)
    polys = [g for g in shapely.get_parts(union) if g.geom_type == "Polygon" and not g.is_empty]
    out = []
    for g in polys:
        off_area = float(shapely.intersection(g, off).area) if off is not None else 0.0
        out.append((g, off_area))
    return out


def gap_table(gaps, class_name: str, min_area_m2: float, simplify_m: float):
    """Simplified gap polygons and their table, largest first; and the count and area of the small gaps left out.

    Returns
    -------
    geometries : list of shapely Polygon
    table : pandas.DataFrame
        Columns :data:`GAP_COLUMNS`.
    small : (int, float)
        Gaps below ``min_area_m2``: number and total area, m^2.
    """
    import shapely

    rows, geoms, small_n, small_area = [], [], 0, 0.0
    for g, off_area in sorted(gaps, key=lambda t: -t[0].area):
        area = float(g.area)
        if area < min_area_m2:
            small_n += 1
            small_area += area
            continue
        simple = shapely.simplify(g, simplify_m, preserve_topology=True) if simplify_m > 0 else g
        rect = shapely.minimum_rotated_rectangle(g)
        corners = np.asarray(rect.exterior.coords)[:4] if rect.geom_type == "Polygon" else np.zeros((4, 2))
        sides = [corners[1] - corners[0], corners[2] - corners[1]]
        lengths = [math.hypot(*s) for s in sides]
        k = int(np.argmax(lengths))
        azimuth = math.degrees(math.atan2(sides[k][0], sides[k][1])) % 180.0
        c = g.centroid
        rows.append({
            "gap_id": len(rows) + 1, "class_name": class_name, "area_m2": area,
            "centroid_easting_m": c.x, "centroid_northing_m": c.y,
            "length_m": max(lengths), "width_m": min(lengths), "azimuth_deg": azimuth,
            "off_grid_area_m2": off_area,
        })
        geoms.append(simple)
    return geoms, pd.DataFrame(rows, columns=GAP_COLUMNS), (small_n, small_area)
