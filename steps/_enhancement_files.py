"""GeoTIFF and quick-look PNG of one grid variable.

GeoTIFF (one band, float32) written with rasterio: the CRS from the grid's
WKT, the affine geotransform from the cell-centre coordinates (upper-left
corner = west edge, north edge; rows run north to south, so a grid stored
south to north is flipped), NaN as the nodata value (stated in the tags),
and the variable's attributes as tags. The quick look is a matplotlib image
(Agg back end) in map coordinates, equal aspect, limits at the 2nd and 98th
percentiles of the valid cells (robust against a few extreme cells; common
practice, no published source), with a colour bar labelled in the units.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import xarray as xr

__all__ = ["write_geotiff", "write_quicklook", "grid_transform"]


def grid_transform(grid: xr.DataArray):
    """Affine transform and whether rows must be flipped (north up).

    Raises
    ------
    ValueError
        When the coordinates are not regular.
    """
    from rasterio.transform import from_origin

    e = np.asarray(grid["easting"].values, dtype=float)
    n = np.asarray(grid["northing"].values, dtype=float)
    de, dn = e[1] - e[0], n[1] - n[0]
    if not (np.allclose(np.diff(e), de) and np.allclose(np.diff(n), dn)):
        raise ValueError("grid coordinates are not regularly spaced")
    west = min(e[0], e[-1]) - abs(de) / 2
    north = max(n[0], n[-1]) + abs(dn) / 2
    return from_origin(west, north, abs(de), abs(dn)), dn > 0, de < 0


def _north_up(grid: xr.DataArray) -> np.ndarray:
    _, flip_rows, flip_cols = grid_transform(grid)
    values = np.asarray(grid.transpose("northing", "easting").values, dtype=np.float32)
    if flip_rows:
        values = values[::-1]
    if flip_cols:
        values = values[:, ::-1]
    return values


def write_geotiff(grid: xr.DataArray, crs_wkt: str, path: Path) -> Path:
    """Write one grid variable as a single-band float32 GeoTIFF (NaN = nodata).

    Written strip by strip of the grid's row chunks, so memory stays at one
    strip whatever the grid size; strips without a valid cell are not
    written (GDAL leaves those blocks empty, read back as nodata).
    """
    import rasterio
    from rasterio.crs import CRS
    from rasterio.windows import Window

    transform, flip_rows, flip_cols = grid_transform(grid)
    g = grid.transpose("northing", "easting")
    data = g.data
    ny, nx = g.shape
    step = data.chunks[0][0] if getattr(data, "chunks", None) else ny
    profile = {
        "driver": "GTiff",
        "height": ny,
        "width": nx,
        "count": 1,
        "dtype": "float32",
        "crs": CRS.from_wkt(crs_wkt),
        "transform": transform,
        "nodata": np.float32(np.nan),
        "compress": "deflate",
        "tiled": True,
        "blockxsize": 256,
        "blockysize": 256,
        "sparse_ok": True,
    }
    tags = {k: (v if isinstance(v, str) else json.dumps(v)) for k, v in grid.attrs.items()}
    tags["nodata_meaning"] = "NaN: blank cell (no data)"
    with rasterio.open(path, "w", **profile) as dst:
        for j0 in range(0, ny, step):
            j1 = min(ny, j0 + step)
            block = np.asarray(data[j0:j1], dtype=np.float32)
            if not np.isfinite(block).any():
                continue
            if flip_cols:
                block = block[:, ::-1]
            row0 = ny - j1 if flip_rows else j0
            dst.write(block[::-1] if flip_rows else block, 1, window=Window(0, row0, nx, j1 - j0))
        dst.update_tags(**tags)
        dst.set_band_description(1, str(grid.name))
    return path


def write_quicklook(grid: xr.DataArray, path: Path, title: str | None = None) -> Path:
    """Write a PNG image of one grid variable with a colour bar in its units."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    values = _north_up(grid)
    transform, _, _ = grid_transform(grid)
    west, north = transform.c, transform.f
    east = west + transform.a * values.shape[1]
    south = north + transform.e * values.shape[0]
    finite = values[np.isfinite(values)]
    vmin, vmax = (np.percentile(finite, [2, 98]) if finite.size else (0.0, 1.0))
    if vmin == vmax:
        vmin, vmax = vmin - 1.0, vmax + 1.0
    fig, ax = plt.subplots(figsize=(7, 6), dpi=110)
    image = ax.imshow(values, extent=(west, east, south, north), origin="upper", vmin=vmin, vmax=vmax, cmap="viridis")
    ax.set_aspect("equal")
    ax.set_xlabel("easting (m)")
    ax.set_ylabel("northing (m)")
    ax.set_title(title or str(grid.attrs.get("long_name", grid.name)), fontsize=9)
    ax.ticklabel_format(useOffset=False, style="plain")
    fig.colorbar(image, ax=ax, label=str(grid.attrs.get("units", "")))
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
    return path
