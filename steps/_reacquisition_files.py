"""Files of the reacquisition plan: GeoJSON features and GPX 1.1 waypoints with a route.

The GeoJSON (RFC 7946, Butler et al. 2016) is written by
:func:`lodeline.steps._vector_files.write_geojson`: one ``waypoint``
(Point) and one ``search_area`` (Polygon, the search circle) feature per
target and one ``route`` (LineString) feature in visiting order.

The GPX file follows the GPX 1.1 schema (TopoGrafix 2004, GPX: the GPS
Exchange Format, version 1.1): ``metadata``, then one ``wpt`` per target
in visiting order, then one ``rte`` whose ``rtept`` elements are the same
points in the same order (elements in the order the schema's sequences
require). Coordinates are WGS 84 degrees; every text is XML-escaped.
"""

from __future__ import annotations

import math
from pathlib import Path
from xml.sax.saxutils import escape, quoteattr

import numpy as np
import pandas as pd
import shapely

from ._vector_files import DEGREE_DECIMALS, _atomic_text, write_geojson

__all__ = ["write_plan_geojson", "write_plan_gpx"]

#: Vertices of a search circle's polygon per quarter circle (shapely's quad_segs).
CIRCLE_QUAD_SEGMENTS = 16


def write_plan_geojson(path: Path, plan: pd.DataFrame, route_xy: np.ndarray, crs_wkt: str, metadata: dict) -> Path:
    """Waypoints, search circles and the route as one GeoJSON FeatureCollection.

    Parameters
    ----------
    plan : pandas.DataFrame
        The plan table in visiting order (``easting_m``, ``northing_m``,
        ``search_radius_m`` in m and the other columns as properties).
    route_xy : ndarray (k, 2)
        Route vertices in the survey CRS, m (the start, when it is not the
        first target, then every target in visiting order).
    crs_wkt : str
        Survey CRS.
    metadata : dict
        Top-level members (name, lineage, caution).
    """
    xy = plan[["easting_m", "northing_m"]].to_numpy(float)
    points = [shapely.Point(x, y) for x, y in xy]
    circles = [p.buffer(float(r), quad_segs=CIRCLE_QUAD_SEGMENTS) for p, r in zip(points, plan["search_radius_m"])]
    props = plan.copy()
    rows = [props.assign(feature="waypoint"), props.assign(feature="search_area")]
    geoms = points + circles
    if len(route_xy) >= 2:
        total = float(np.hypot(*np.diff(np.asarray(route_xy, float), axis=0).T).sum())
        rows.append(pd.DataFrame({"feature": ["route"], "cumulative_m": [total]}))
        geoms.append(shapely.LineString(np.asarray(route_xy, float)))
    table = pd.concat(rows, ignore_index=True)
    table = table[["feature"] + [c for c in table.columns if c != "feature"]]
    return write_geojson(path, geoms, table, crs_wkt, metadata=metadata)


def write_plan_gpx(path: Path, lon, lat, names, descriptions, route_lonlat, route_names, *,
                   title: str, description: str, creator: str = "lodeline") -> Path:
    """GPX 1.1: metadata, one waypoint per target, and one route through them.

    Parameters
    ----------
    lon, lat : sequence of float
        Waypoints, WGS 84 degrees, in visiting order.
    names, descriptions : sequence of str
        Waypoint name (the target id) and description.
    route_lonlat : sequence of (lon, lat)
        Route points in order (the start first when it is no target).
    route_names : sequence of str
        Name of each route point.
    title, description : str
        Metadata name and description (the caution and the lineage).
    """
    def pos(x, y, what):
        if not (math.isfinite(float(x)) and math.isfinite(float(y))):
            raise ValueError(f"{what} has no position")
        return f'lat="{float(y):.{DEGREE_DECIMALS}f}" lon="{float(x):.{DEGREE_DECIMALS}f}"'

    lines = [
        '<?xml version="1.0" encoding="UTF-8"?>',
        f'<gpx version="1.1" creator={quoteattr(creator)} xmlns="http://www.topografix.com/GPX/1/1">',
        "  <metadata>",
        f"    <name>{escape(title)}</name>",
        f"    <desc>{escape(description)}</desc>",
        "  </metadata>",
    ]
    for x, y, name, desc in zip(lon, lat, names, descriptions):
        lines.append(f"  <wpt {pos(x, y, f'waypoint {name!r}')}>")
        lines.append(f"    <name>{escape(str(name))}</name>")
        if desc:
            lines.append(f"    <desc>{escape(str(desc))}</desc>")
        lines.append("  </wpt>")
    if len(route_lonlat) >= 2:
        lines.append("  <rte>")
        lines.append(f"    <name>{escape(title)}</name>")
        for (x, y), name in zip(route_lonlat, route_names):
            lines.append(f"    <rtept {pos(x, y, f'route point {name!r}')}><name>{escape(str(name))}</name></rtept>")
        lines.append("  </rte>")
    lines.append("</gpx>")
    return _atomic_text(path, "\n".join(lines) + "\n")
