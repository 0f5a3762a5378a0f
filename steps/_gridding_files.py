"""GeoTIFF and quick-look PNG files of a grid.

GeoTIFF (OGC GeoTIFF standard 1.1, 2019) through rasterio: one file per
variable, one float32 band, CRS from the grid's ``crs_wkt``, an affine
geotransform whose origin is the north-west corner of the north-west cell
(rows run north to south, so the grid's south-to-north rows are flipped),
nodata -99999 (blanked cells). Written strip by strip of tiles, so memory
stays bounded on any grid size.

Quick look: a PNG per variable (matplotlib, Agg), decimated to at most
``max_pixels`` a side, equal aspect, survey-CRS axes in metres, colour
limits at the 2nd and 98th percentiles of the filled cells (robust to a
few extreme cells; common practice, no published source).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import xarray as xr

NODATA = -99999.0


def write_geotiff(grid: xr.Dataset, name: str, path: Path) -> Path:
    """Write grid variable ``name`` to a single-band GeoTIFF at ``path``, strip by strip of its row chunks.

    Strips without a valid cell are not written: GDAL leaves their blocks
    empty (``SPARSE_OK``) and they read back as nodata.
    """
    import rasterio
    from rasterio.crs import CRS
    from rasterio.transform import Affine
    from rasterio.windows import Window

    var = grid[name]
    e = grid["easting"].values
    n = grid["northing"].values
    cell = float(e[1] - e[0]) if e.size > 1 else float(n[1] - n[0])
    transform = Affine(cell, 0.0, e[0] - cell / 2, 0.0, -cell, n[-1] + cell / 2)
    ny, nx = var.shape
    data = var.data
    step = data.chunks[0][0] if hasattr(data, "chunks") and data.chunks else ny
    profile = dict(
        driver="GTiff", width=nx, height=ny, count=1, dtype="float32",
        crs=CRS.from_wkt(grid.attrs["crs_wkt"]), transform=transform, nodata=NODATA,
        tiled=True, blockxsize=256, blockysize=256, compress="deflate", sparse_ok=True,
    )
    with rasterio.open(path, "w", **profile) as dst:
        dst.update_tags(1, units=var.attrs.get("units", ""), long_name=var.attrs.get("long_name", name))
        dst.set_band_description(1, name)
        for j0 in range(0, ny, step):
            j1 = min(ny, j0 + step)
            block = np.asarray(data[j0:j1], dtype=np.float64)
            if not np.isfinite(block).any():
                continue  # a blank strip: its blocks stay unwritten and read back as nodata (sparse_ok)
            block = np.where(np.isfinite(block), block, NODATA).astype(np.float32)[::-1]
            dst.write(block, 1, window=Window(0, ny - j1, nx, j1 - j0))
    return path


def write_quicklook(grid: xr.Dataset, name: str, path: Path, title: str, max_pixels: int = 2000) -> Path:
    """Write a PNG quick look of grid variable ``name``."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    var = grid[name]
    stride = max(1, int(np.ceil(max(var.shape) / max_pixels)))
    sub = var[::stride, ::stride]
    values = np.asarray(sub.values, dtype=np.float64)
    e = sub["easting"].values
    n = sub["northing"].values
    finite = values[np.isfinite(values)]
    lo, hi = (np.percentile(finite, [2, 98]) if finite.size else (0.0, 1.0))
    if hi <= lo:
        hi = lo + 1.0
    width = 10.0
    aspect = (n[-1] - n[0]) / max(e[-1] - e[0], 1e-9) if e.size > 1 and n.size > 1 else 1.0
    fig, ax = plt.subplots(figsize=(width, max(3.0, min(20.0, width * aspect * 0.9))))
    half = stride * float(grid["easting"].values[1] - grid["easting"].values[0]) / 2 if grid.sizes["easting"] > 1 else 0.5
    im = ax.imshow(
        values, origin="lower", extent=(e[0] - half, e[-1] + half, n[0] - half, n[-1] + half),
        vmin=lo, vmax=hi, cmap="RdBu_r", interpolation="nearest",
    )
    ax.set_aspect("equal")
    ax.set_xlabel("easting (m)")
    ax.set_ylabel("northing (m)")
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.set_title(title)
    bar = fig.colorbar(im, ax=ax, shrink=0.8)
    bar.set_label(f"{var.attrs.get('long_name', name)} ({var.attrs.get('units', '')})")
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path
