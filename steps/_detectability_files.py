"""Files of the detectability stage: gap and flag vectors, GeoTIFFs, and quick-look PNGs (matplotlib, Agg).

Vectors through ``steps/_vector_files.py`` (GeoJSON RFC 7946, GeoPackage);
GeoTIFFs through the gridding stage's writer (``steps/_gridding_files.py``).

The quick looks are like the gridding stage's but with colour scales that suit
these maps: distances on a sequential scale from 0, moments and masses on a
logarithmic scale (they span decades), and the 0/1 class map in two colours
with the gap polygons outlined. Decimated to at most ``max_pixels`` a side;
colour limits at the 2nd and 98th percentiles of the filled cells (common
practice, no published source).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from . import _gridding_files as tiffs
from . import _vector_files as vectors

__all__ = ["write_map_png", "write_files", "TIFF_VARIABLES", "PNG_VARIABLES"]

TIFF_VARIABLES = ("horizontal_distance_m", "slant_distance_m", "least_moment_worst_Am2", "least_moment_typical_Am2",
                  "least_mass_high_kg", "least_mass_low_kg", "class_detectable")
PNG_VARIABLES = {  # name -> (colour scale, title)
    "horizontal_distance_m": ("linear", "distance to the nearest accepted reading"),
    "least_mass_high_kg": ("log", "least detectable mass, conservative end"),
    "least_mass_low_kg": ("log", "least detectable mass, optimistic end"),
    "class_detectable": ("binary", "where the class is detectable, gaps outlined"),
}
CAUTION = "Supports, never replaces, qualified specialists; no clearance certificate."


def write_map_png(grid: xr.Dataset, name: str, path: Path, title: str, scale: str = "linear",
                  outlines=(), max_pixels: int = 2000) -> Path:
    """Write a PNG of grid variable ``name``.

    Parameters
    ----------
    scale : str
        ``"linear"`` (from 0), ``"log"`` or ``"binary"`` (0 red, 1 green).
    outlines : sequence of shapely Polygons
        Drawn in black (survey CRS), for the gap polygons.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.colors import ListedColormap, LogNorm

    var = grid[name]
    stride = max(1, int(np.ceil(max(var.shape) / max_pixels)))
    sub = var[::stride, ::stride]
    values = np.asarray(sub.values, dtype=np.float64)
    e = sub["easting"].values
    n = sub["northing"].values
    cell = float(grid["easting"].values[1] - grid["easting"].values[0]) if grid.sizes["easting"] > 1 else 1.0
    half = stride * cell / 2.0
    finite = values[np.isfinite(values) & ((values > 0) if scale == "log" else True)]
    kw = {}
    if scale == "binary":
        kw = dict(cmap=ListedColormap(["#d7301f", "#1a9850"]), vmin=-0.5, vmax=1.5)
    elif scale == "log":
        lo, hi = (np.percentile(finite, [2, 98]) if finite.size else (1.0, 10.0))
        hi = hi if hi > lo else lo * 10.0
        kw = dict(cmap="viridis_r", norm=LogNorm(vmin=lo, vmax=hi))
    else:
        hi = float(np.percentile(finite, 98)) if finite.size else 1.0
        kw = dict(cmap="viridis", vmin=0.0, vmax=hi if hi > 0 else 1.0)
    width = 10.0
    aspect = (n[-1] - n[0]) / max(e[-1] - e[0], 1e-9) if e.size > 1 and n.size > 1 else 1.0
    fig, ax = plt.subplots(figsize=(width, max(3.0, min(20.0, width * aspect * 0.9))))
    im = ax.imshow(values, origin="lower", extent=(e[0] - half, e[-1] + half, n[0] - half, n[-1] + half),
                   interpolation="nearest", **kw)
    for poly in outlines:
        for ring in [poly.exterior, *poly.interiors]:
            xy = np.asarray(ring.coords)
            ax.plot(xy[:, 0], xy[:, 1], color="black", linewidth=0.6)
    ax.set_aspect("equal")
    ax.set_xlabel("easting (m)")
    ax.set_ylabel("northing (m)")
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.set_title(title)
    bar = fig.colorbar(im, ax=ax, shrink=0.8)
    if scale == "binary":
        bar.set_ticks([0, 1])
        bar.set_ticklabels(["not detectable", "detectable"])
    else:
        bar.set_label(f"{var.attrs.get('long_name', name)} ({var.attrs.get('units', '')})")
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def write_files(scratch: Path, grid: xr.Dataset, gap_geoms, gap_rows: pd.DataFrame, stretches: pd.DataFrame,
                settings: dict, burial: float, title: str) -> dict:
    """Write the stage's files into ``scratch``; returns name -> path.

    ``gaps.geojson`` (RFC 7946) and ``gaps.gpkg`` (when there are gaps),
    ``sampling_flags.geojson`` (flagged stretches as lines), and with the
    ``geotiff`` and ``quicklook`` settings the GeoTIFFs of
    :data:`TIFF_VARIABLES` and the PNGs of :data:`PNG_VARIABLES`.
    """
    import shapely

    crs_wkt = grid.attrs["crs_wkt"]
    files = {}
    files["gaps.geojson"] = vectors.write_geojson(
        scratch / "gaps.geojson", gap_geoms, gap_rows, crs_wkt,
        metadata={"class": {"name": settings["class_name"], "mass_kg": settings["class_mass_kg"],
                            "max_burial_m": settings["class_max_burial_m"], "basis": settings["class_basis"]},
                  "caution": CAUTION})
    if len(gap_geoms):
        files["gaps.gpkg"] = vectors.write_geopackage(scratch / "gaps.gpkg", gap_geoms, gap_rows, crs_wkt,
                                                      layer="gaps", geometry_type="Polygon")
    flagged = stretches[stretches["flags"] != ""]
    lines = [shapely.LineString([(r.start_easting_m, r.start_northing_m), (r.end_easting_m, r.end_northing_m)])
             for r in flagged.itertuples()]
    keep = ["line", "line_kind", "sensor", "stretch", "along_start_m", "length_m", "speed_m_s", "speed_limit_m_s",
            "readings_per_anomaly", "least_readings_per_anomaly", "spacing_left_m", "spacing_right_m", "flags"]
    files["sampling_flags.geojson"] = vectors.write_geojson(scratch / "sampling_flags.geojson", lines,
                                                            flagged[keep].reset_index(drop=True), crs_wkt)
    if settings["geotiff"]:
        for name in TIFF_VARIABLES:
            files[f"{name}.tif"] = tiffs.write_geotiff(grid, name, scratch / f"{name}.tif")
    if settings["quicklook"]:
        for name, (scale, words) in PNG_VARIABLES.items():
            text = f"{title}: {words}" + (f" at {burial:g} m burial" if name.startswith("least_") else "")
            files[f"{name}.png"] = write_map_png(grid, name, scratch / f"{name}.png", text, scale,
                                                 outlines=gap_geoms if name == "class_detectable" else ())
    return files
