"""Vector deliverables: GeoJSON (RFC 7946), GeoPackage (OGC 12-128r18) and GPX 1.1 waypoints.

* GeoJSON follows RFC 7946 (Butler et al. 2016, The GeoJSON Format):
  coordinates are WGS 84 longitude, latitude (the survey's projected
  coordinates are transformed with pyproj), no ``crs`` member, properties
  that are not finite numbers written as ``null``. Coordinates are rounded
  to 1e-8 degree (about 1 mm), far below any positioning error.
* GeoPackage (Open Geospatial Consortium 2021, OGC GeoPackage Encoding
  Standard 1.3.1, 12-128r18) keeps the survey's own coordinate reference
  system; it is written through GDAL by pyogrio from well-known-binary
  geometries made with shapely.
* GPX 1.1 (TopoGrafix 2004, GPX: the GPS Exchange Format, version 1.1
  schema) waypoints, longitude and latitude in WGS 84, for navigation
  systems on the reacquisition vessel.

Every writer goes through a temporary name in the same folder, so a reader
never sees half a file.
"""

from __future__ import annotations

import json
import math
import os
from pathlib import Path
from xml.sax.saxutils import escape, quoteattr

import numpy as np
import pandas as pd
import shapely
from pyproj import CRS, Transformer

__all__ = ["to_lonlat", "write_geojson", "write_geopackage", "write_gpx"]

DEGREE_DECIMALS = 8


def to_lonlat(geometries, crs_wkt: str):
    """Shapely geometries in the survey CRS, transformed to WGS 84 longitude, latitude."""
    transformer = Transformer.from_crs(CRS.from_user_input(crs_wkt), CRS.from_epsg(4326), always_xy=True)

    def move(coords):
        lon, lat = transformer.transform(coords[:, 0], coords[:, 1])
        return np.column_stack([lon, lat])

    return [None if g is None else shapely.transform(g, move) for g in geometries]


def _plain(value):
    """A JSON-safe scalar: numpy types unwrapped, NaN and infinities as None."""
    if value is None:
        return None
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (float, np.floating)):
        v = float(value)
        return v if math.isfinite(v) else None
    if value is pd.NA or value is pd.NaT:
        return None
    return value if isinstance(value, (int, str)) else str(value)


def _round(obj):
    if isinstance(obj, (list, tuple)):
        return [_round(o) for o in obj]
    return round(float(obj), DEGREE_DECIMALS)


def _atomic_text(path: Path, text: str) -> Path:
    path = Path(path)
    tmp = path.with_name(f".{path.name}.part")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)
    return path


def write_geojson(path: Path, geometries, table: pd.DataFrame, crs_wkt: str, metadata: dict | None = None) -> Path:
    """Write a FeatureCollection, one feature per table row.

    Parameters
    ----------
    path : pathlib.Path
    geometries : sequence of shapely geometries or None
        In the survey CRS (metres), one per row of ``table``.
    table : pandas.DataFrame
        Properties of each feature.
    crs_wkt : str
        The survey CRS.
    metadata : dict, optional
        Extra top-level members (a foreign member under RFC 7946 section 6.1).
    """
    if len(geometries) != len(table):
        raise ValueError(f"{len(geometries)} geometries for {len(table)} rows")
    lonlat = to_lonlat(list(geometries), crs_wkt)
    features = []
    records = table.to_dict(orient="records")
    for geom, props in zip(lonlat, records):
        mapping = None
        if geom is not None and not geom.is_empty:
            mapping = shapely.geometry.mapping(geom)
            mapping = {"type": mapping["type"], "coordinates": _round(mapping["coordinates"])}
        features.append({"type": "Feature", "geometry": mapping, "properties": {k: _plain(v) for k, v in props.items()}})
    doc = {"type": "FeatureCollection", **({k: _plain(v) if not isinstance(v, dict) else v for k, v in metadata.items()} if metadata else {}), "features": features}
    return _atomic_text(path, json.dumps(doc, indent=1, allow_nan=False) + "\n")


def _field_array(series: pd.Series) -> np.ndarray:
    if pd.api.types.is_bool_dtype(series):
        return series.to_numpy(dtype=bool)
    if pd.api.types.is_integer_dtype(series):
        return series.to_numpy(dtype=np.int64)
    if pd.api.types.is_numeric_dtype(series):
        return series.to_numpy(dtype=float, na_value=np.nan)
    return np.array(["" if v is None or (isinstance(v, float) and math.isnan(v)) else str(v) for v in series], dtype=object)


def write_geopackage(path: Path, geometries, table: pd.DataFrame, crs_wkt: str, layer: str, geometry_type: str) -> Path:
    """Write one GeoPackage layer in the survey CRS.

    Parameters
    ----------
    geometries : sequence of shapely geometries
        In the survey CRS, one per row (None for no geometry).
    layer : str
        Layer (table) name.
    geometry_type : str
        "Point", "LineString", "Polygon", "MultiPolygon" or "Unknown" (mixed).
    """
    from pyogrio.raw import write

    if len(geometries) != len(table):
        raise ValueError(f"{len(geometries)} geometries for {len(table)} rows")
    path = Path(path)
    tmp = path.with_name(f".{path.stem}.part{path.suffix}")
    if tmp.exists():
        tmp.unlink()
    wkb = np.array([None if g is None else shapely.to_wkb(g) for g in geometries], dtype=object)
    fields = [str(c) for c in table.columns]
    data = [_field_array(table[c]) for c in table.columns]
    write(str(tmp), wkb, data, fields, driver="GPKG", layer=layer, crs=crs_wkt, geometry_type=geometry_type, encoding="UTF-8")
    os.replace(tmp, path)
    return path


def write_gpx(path: Path, lon, lat, names, descriptions, creator: str = "lodeline") -> Path:
    """Write GPX 1.1 waypoints (WGS 84 degrees); names and descriptions are XML-escaped."""
    lines = [
        '<?xml version="1.0" encoding="UTF-8"?>',
        f'<gpx version="1.1" creator={quoteattr(creator)} xmlns="http://www.topografix.com/GPX/1/1">',
    ]
    for x, y, name, desc in zip(lon, lat, names, descriptions):
        if not (math.isfinite(float(x)) and math.isfinite(float(y))):
            raise ValueError(f"waypoint {name!r} has no position")
        lines.append(f'  <wpt lat="{float(y):.{DEGREE_DECIMALS}f}" lon="{float(x):.{DEGREE_DECIMALS}f}">')
        lines.append(f"    <name>{escape(str(name))}</name>")
        if desc:
            lines.append(f"    <desc>{escape(str(desc))}</desc>")
        lines.append("  </wpt>")
    lines.append("</gpx>")
    return _atomic_text(path, "\n".join(lines) + "\n")
