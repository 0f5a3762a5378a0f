"""Grid enhancement: derivatives, total gradient amplitude, tilt angle, reduction to the pole, upward continuation.

From the gridded residual (nT) the stage computes, with wavenumber-domain
operators (Blakely 1995, ch. 12; the operators, the fill, padding and
taper are set out in ``steps/_enhancement_fft.py``):

``derivative_upward``         vertical derivative, positive up, nT/m
``derivative_easting``        easting derivative, nT/m
``derivative_northing``       northing derivative, nT/m
``total_gradient_amplitude``  amplitude of the 3-D analytic signal
                              (Roest, Verhoef & Pilkington 1992), nT/m
``tilt_angle``                tilt angle (Miller & Singh 1994), rad, positive
                              over the source (vertical derivative positive down)
``reduced_to_pole``           reduction to the pole for induced magnetisation
                              along the main field (Baranov 1957; operator as in
                              Blakely 1995), nT, with the pseudo-inclination
                              stabilisation of MacLeod, Jones & Dai (1993) when
                              the inclination is below ``rtp_stabilise_below_deg``
``upward_continued``          upward continuation by ``upward_continuation_m``, nT

Every output carries ``units``, ``long_name`` and the parameters that made
it. The main-field direction comes from the grid's attributes
``main_field_inclination_deg`` and ``main_field_grid_declination_deg``
(declination from *grid* north, since the filters work on grid axes) unless
``rtp_inclination_deg`` / ``rtp_declination_deg`` override them.

Tiles
    The residual is worked tile by tile on its dask chunks, each tile with a
    halo of ``halo_cells`` cells of its neighbours (``dask.array.overlap``
    with no padding at the survey edge, then ``map_blocks``; the halo is cut
    off again inside the block function, so all products of a tile come
    from one forward FFT). FFT filters are global, so a tile's result
    differs from the whole-grid result by the part of the filter response
    reaching beyond the halo; the tests measure this (see
    ``tests/test_enhancement.py``). The products are written once to the
    stage's scratch folder (each tile computed once) and the returned grid
    reads from there.

Where harmonica (0.7) fits and where it does not
    harmonica's ``derivative_upward``, ``derivative_easting`` /
    ``derivative_northing`` (``method="fft"``), ``upward_continuation``,
    ``reduction_to_pole``, ``total_gradient_amplitude`` and ``tilt_angle``
    are used in the tests as the reference library. The stage does not call
    them because (1) they transform a whole in-memory grid through xrft and
    refuse NaN, while the stage works on dask tiles with blanks filled and
    restored; (2) each call makes its own forward FFT, where a tile needs one
    forward transform for all products (the later goal is a real FFT with
    precomputed kernels and temporaries under four tile sizes);
    (3) ``reduction_to_pole`` has no stabilisation for low inclination;
    (4) its easting/northing derivatives default to finite differences, and
    its tilt angle uses the upward derivative, so it is negative over the
    source where Miller & Singh's is positive (our tilt is minus
    harmonica's). The operators themselves are the same.

Defaults
    ``halo_cells = 64`` keeps the tiled products within the tolerances of
    the tests at 0.25 m cells (16 m of halo, four times the source depth of
    the test dipole); ``pad_fraction = 0.125`` and ``blank_taper_cells = 16``
    are common practice, no published source. Against 0.25, the padding of
    0.125 transforms 0.69 times the cells (800 against 960 squared for a
    512-cell tile with its halo) and moved the measured errors of the
    tests from 3.0e-4 to 4.0e-4 (upward derivative against the closed
    form; limit 2e-3) and, tiled against whole, from 5.3e-3 to 5.5e-3
    (limit 1.5e-2) and 1.40e-2 to 1.61e-2 for the reduction to the pole
    (limit 4e-2). ``rtp_stabilise_below_deg =
    20``: below about 20 degrees the exact operator amplifies noise along the
    magnetic east-west direction by ``1 / sin(I)**2`` (8.5 at 20 degrees,
    33 at 10 degrees); the value is common practice, no published source.

References
----------
Baranov, V. (1957). A new method for interpretation of aeromagnetic maps:
    pseudo-gravimetric anomalies. Geophysics 22(2), 359-383. (From memory.)
Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic Applications,
    ch. 12. Cambridge University Press. (From memory.)
MacLeod, I. N., Jones, K. & Dai, T. F. (1993). 3-D analytic signal in the
    interpretation of total magnetic field data at low magnetic latitudes.
    Exploration Geophysics 24, 679-688. (From memory.)
Miller, H. G. & Singh, V. (1994). Potential field tilt - a new concept for
    location of potential field sources. Journal of Applied Geophysics 32,
    213-217.
Roest, W. R., Verhoef, J. & Pilkington, M. (1992). Magnetic interpretation
    using the 3-D analytic signal. Geophysics 57(1), 116-125.
"""

from __future__ import annotations

import warnings

import dask
import dask.array as da
import numpy as np
import xarray as xr

from lodeline.model import DataError, Stage, StageContext, StageResult, validate_grid
from lodeline.params import Param, validate_table

from ._enhancement_fft import LONG_NAMES, PRODUCTS, UNITS, filter_tile
from ._enhancement_files import write_geotiff, write_quicklook

__all__ = ["PARAMS", "STAGE", "run", "enhance"]

#: Tile size used when the input grid is not chunked, cells.
DEFAULT_TILE = 512

#: Largest side of a quick-look image, cells (the grid is decimated to it).
QUICKLOOK_PIXELS = 2000

PARAMS = (
    Param("products", list(PRODUCTS), "Grids to compute.", kind=list, item_kind=str, choices=PRODUCTS, minimum=1),
    Param("upward_continuation_m", 1.0, "Rise of the upward continuation, m.", minimum=0.0, exclusive_minimum=True, maximum=1.0e4),
    Param("halo_cells", 64, "Overlap of each tile with its neighbours, cells.", kind=int, minimum=0, maximum=4096),
    Param("pad_fraction", 0.125, "Tapered padding on each side of a tile before the FFT, fraction of the tile size.", minimum=0.0, maximum=2.0),
    Param("blank_taper_cells", 16, "Distance over which filled blank cells fall to the tile mean, cells.", kind=int, minimum=1, maximum=4096),
    Param(
        "rtp_stabilise_below_deg",
        20.0,
        "Below this magnitude of inclination the reduction to the pole uses this pseudo-inclination for its amplitude, degrees.",
        minimum=0.0,
        maximum=89.0,
    ),
    Param("rtp_inclination_deg", None, "Inclination for the reduction to the pole (default: the grid's main field), degrees.", optional=True, minimum=-90.0, maximum=90.0),
    Param("rtp_declination_deg", None, "Declination from grid north for the reduction to the pole (default: the grid's main field), degrees.", optional=True, minimum=-360.0, maximum=360.0),
    Param("geotiff", True, "Write a GeoTIFF of each product.", kind=bool),
    Param("quicklook", True, "Write a quick-look PNG of each product.", kind=bool),
)


def _spacing(grid: xr.Dataset, name: str) -> float:
    values = np.asarray(grid[name].values, dtype=float)
    if values.size < 4:
        raise DataError(f"enhancement: the grid has {values.size} cells along {name}; at least 4 are needed")
    step = np.diff(values)
    if not np.all(np.isfinite(step)) or step[0] == 0 or not np.allclose(step, step[0], rtol=1e-6, atol=0.0):
        raise DataError(f"enhancement: grid coordinate {name!r} is not regularly spaced; regrid on a regular lattice")
    return float(step[0])


def _direction(grid: xr.Dataset, settings: dict) -> tuple[float, float]:
    inc = settings["rtp_inclination_deg"]
    dec = settings["rtp_declination_deg"]
    if inc is None:
        inc = grid.attrs.get("main_field_inclination_deg")
    if dec is None:
        dec = grid.attrs.get("main_field_grid_declination_deg")
    if inc is None or dec is None:
        raise DataError(
            "enhancement: the grid lacks main_field_inclination_deg / main_field_grid_declination_deg; "
            "run the main_field stage or set enhancement.rtp_inclination_deg and rtp_declination_deg"
        )
    return float(inc), float(dec)


def _tile_products(values, cut, products, spacing, pad_fraction, upward_m, field_dir, stabilise_below_deg,
                   blank_taper_cells):
    """Products of one tile with its halo, the halo cut off again."""
    out = filter_tile(values, products, spacing, pad_fraction, upward_m, field_dir, None, stabilise_below_deg,
                      blank_taper_cells)
    return out[:, cut[0], cut[1]]


def _finite_count(block):
    return np.array([[np.isfinite(block).sum()]], dtype=np.int64)


def enhance(
    residual: da.Array,
    spacing: tuple[float, float],
    products: tuple[str, ...],
    halo_cells: int,
    pad_fraction: float,
    upward_m: float,
    field_dir: tuple[float, float],
    stabilise_below_deg: float,
    blank_taper_cells: int,
    details: bool = False,
):
    """Products of a chunked residual grid, tile by tile with a halo.

    Each tile with data is cut from the residual with a halo of
    ``halo_cells`` of its neighbours (none beyond the grid edge), filtered
    and cut back; tiles without a valid cell give NaN without a task (a
    survey along a diagonal corridor leaves most tiles of its grid empty).

    Parameters
    ----------
    residual : dask.array.Array (ny, nx)
        Residual, nT, NaN where blank, chunked in tiles.
    spacing : (float, float)
        Signed cell steps along (northing, easting), m.
    products, halo_cells, pad_fraction, upward_m, field_dir, stabilise_below_deg, blank_taper_cells
        As the stage parameters (see :data:`PARAMS`).
    details : bool
        Also return a dict: ``tiles`` (list of (row slice, column slice,
        dask array of the tile's products) for the tiles with data) and
        ``valid_cells`` (finite residual cells).

    Returns
    -------
    dask.array.Array (len(products), ny, nx)
        Chunked ``(1, tile rows, tile columns)`` like the input tiles.
    """
    chunks = residual.chunks
    work = residual
    # every tile at least as large as the halo (short edge tiles are merged into their neighbour)
    if any(min(c) < halo_cells and len(c) > 1 for c in chunks):
        # tiles a whole number of store chunks, so no two tiles write one chunk
        work = residual.rechunk(tuple(_tiles(n, c[0] * -(-max(c[0], halo_cells) // c[0]), halo_cells) for c, n in zip(chunks, residual.shape)))
    depth = {0: min(halo_cells, work.shape[0]), 1: min(halo_cells, work.shape[1])}
    depth = {a: (d if len(work.chunks[a]) > 1 else 0) for a, d in depth.items()}
    counts = da.map_blocks(_finite_count, work, chunks=tuple((1,) * len(c) for c in work.chunks), dtype=np.int64).compute()
    ybounds = np.cumsum((0,) + tuple(work.chunks[0]))
    xbounds = np.cumsum((0,) + tuple(work.chunks[1]))
    ny, nx = work.shape
    p = len(products)
    rows, tiles = [], []
    for bj in range(len(work.chunks[0])):
        y0, y1 = int(ybounds[bj]), int(ybounds[bj + 1])
        row = []
        for bi in range(len(work.chunks[1])):
            x0, x1 = int(xbounds[bi]), int(xbounds[bi + 1])
            if counts[bj, bi] == 0:
                row.append(da.full((p, y1 - y0, x1 - x0), np.nan, dtype=np.float64, chunks=(p, y1 - y0, x1 - x0)))
                continue
            ys0, ys1 = max(0, y0 - depth[0]), min(ny, y1 + depth[0])
            xs0, xs1 = max(0, x0 - depth[1]), min(nx, x1 + depth[1])
            cut = (slice(y0 - ys0, y0 - ys0 + (y1 - y0)), slice(x0 - xs0, x0 - xs0 + (x1 - x0)))
            task = dask.delayed(_tile_products, pure=True)(
                work[ys0:ys1, xs0:xs1], cut, products, spacing, pad_fraction, upward_m, field_dir,
                stabilise_below_deg, blank_taper_cells,
            )
            block = da.from_delayed(task, shape=(p, y1 - y0, x1 - x0), dtype=np.float64)
            row.append(block)
            tiles.append((slice(y0, y1), slice(x0, x1), block))
        rows.append(row)
    stack = da.block([[r for r in row] for row in rows]).rechunk(((1,) * p,) + chunks)
    if details:
        return stack, {"tiles": tiles, "valid_cells": int(counts.sum())}
    return stack


def _decimated(tiles, shape, stride):
    """Every ``stride``-th cell of the products (for the quick looks), assembled from the tiles with data."""
    parts = []
    for rows, cols, block in tiles:
        first_y, first_x = (-rows.start) % stride, (-cols.start) % stride
        parts.append(((rows.start + first_y) // stride, (cols.start + first_x) // stride,
                      block[:, first_y::stride, first_x::stride]))
    return parts


def _assemble(parts, p, shape, stride):
    out = np.full((p, -(-shape[0] // stride), -(-shape[1] // stride)), np.nan)
    for j, i, values in parts:
        out[:, j : j + values.shape[1], i : i + values.shape[2]] = values
    return out


def _tiles(n: int, size: int, minimum: int) -> tuple[int, ...]:
    """Tile sizes of ``size`` covering ``n`` cells, a short last tile folded into its neighbour."""
    sizes = [size] * (n // size) + ([n % size] if n % size else [])
    if len(sizes) > 1 and sizes[-1] < minimum:
        last = sizes.pop()
        sizes[-1] += last
    return tuple(sizes) or (n,)


def run(data: dict, params: dict, context: StageContext) -> StageResult:
    """Compute the enhanced grids of the gridded residual.

    Parameters
    ----------
    data : dict
        ``data["gridding"]["grid"]``: grid dataset with ``residual`` (nT) on
        (northing, easting) and the main-field attributes.
    params : dict
        The ``[enhancement]`` table (see :data:`PARAMS`).
    context : lodeline.model.StageContext
        ``context.scratch`` receives the product store, GeoTIFFs and PNGs.

    Returns
    -------
    lodeline.model.StageResult
        ``datasets["grid"]``: the input variables and one variable per
        product; ``files``: GeoTIFF and PNG per product; ``summary``.
    """
    settings = validate_table(PARAMS, params, "enhancement")
    grid = data["gridding"]["grid"]
    validate_grid(grid, where="enhancement")
    if "residual" not in grid.data_vars:
        raise DataError("enhancement: the gridding output has no 'residual' variable; rerun the gridding stage")
    if grid["residual"].dims != ("northing", "easting"):
        raise DataError(f"enhancement: 'residual' must be on ('northing', 'easting'), got {grid['residual'].dims}")
    spacing = (_spacing(grid, "northing"), _spacing(grid, "easting"))
    products = tuple(p for p in PRODUCTS if p in settings["products"])
    field_dir = _direction(grid, settings) if "reduced_to_pole" in products else (
        float(grid.attrs.get("main_field_inclination_deg", np.nan)),
        float(grid.attrs.get("main_field_grid_declination_deg", np.nan)),
    )
    limit = settings["rtp_stabilise_below_deg"]
    stabilised = "reduced_to_pole" in products and abs(field_dir[0]) < limit
    if stabilised:
        context.log.warning(
            "enhancement: inclination %.1f deg is below rtp_stabilise_below_deg = %.1f deg: the exact reduction to "
            "the pole is unstable here, so the stabilised operator (pseudo-inclination %.1f deg for its amplitude) "
            "was used; its result damps magnetic east-west wavenumbers and is only a guide",
            field_dir[0], limit, limit,
        )

    residual = grid["residual"].data
    if not isinstance(residual, da.Array):
        residual = da.from_array(np.asarray(residual, dtype=float), chunks=(DEFAULT_TILE, DEFAULT_TILE))
    stack, found = enhance(
        residual.astype(np.float64),
        spacing,
        products,
        settings["halo_cells"],
        settings["pad_fraction"],
        settings["upward_continuation_m"],
        field_dir,
        limit,
        settings["blank_taper_cells"],
        details=True,
    )
    # One pass over the tiles with data: the product store (NaN fill value, so
    # empty tiles are not written), the range of each product and the
    # decimated copies for the quick looks.
    import zarr

    store = context.scratch / "enhancement_products.zarr"
    target = zarr.create_array(store=str(store), shape=stack.shape, chunks=tuple(c[0] for c in stack.chunks),
                               dtype="f8", fill_value=np.nan, overwrite=True)
    stride = max(1, int(np.ceil(max(residual.shape) / QUICKLOOK_PIXELS)))
    with warnings.catch_warnings():
        # Tiles whose own cells are all blank give an all-NaN warning; the range ignores them.
        warnings.simplefilter("ignore", RuntimeWarning)
        # Only the tiles with data are written (the others stay at the NaN fill value).
        sources = [b[i : i + 1] for _, _, b in found["tiles"] for i in range(len(products))]
        regions = [(slice(i, i + 1), ys, xs) for ys, xs, _ in found["tiles"] for i in range(len(products))]
        _, tile_ranges, small = dask.compute(
            da.store(sources, [target] * len(sources), regions=regions, lock=False, compute=False) if sources else [],
            [(da.nanmin(b, axis=(1, 2)), da.nanmax(b, axis=(1, 2))) for _, _, b in found["tiles"]],
            _decimated(found["tiles"], residual.shape, stride) if settings["quicklook"] else [],
        )
    stored = da.from_zarr(target)
    if tile_ranges:
        lows = np.nanmin(np.array([lo for lo, _ in tile_ranges]), axis=0)
        highs = np.nanmax(np.array([hi for _, hi in tile_ranges]), axis=0)
    else:
        lows = highs = np.full(len(products), np.nan)
    ranges = list(zip(lows, highs))

    common = {
        "halo_cells": settings["halo_cells"],
        "pad_fraction": settings["pad_fraction"],
        "blank_taper_cells": settings["blank_taper_cells"],
        "method": "wavenumber-domain operator on tiles (real FFT)",
        "grid_mapping": "crs",
    }
    out = grid.copy()
    for i, name in enumerate(products):
        attrs = {"units": UNITS[name], "long_name": LONG_NAMES[name], **common}
        if name == "upward_continued":
            attrs["upward_continuation_m"] = settings["upward_continuation_m"]
        if name == "reduced_to_pole":
            attrs.update(
                inclination_deg=field_dir[0],
                grid_declination_deg=field_dir[1],
                magnetisation="induced, along the main field",
                stabilised=bool(stabilised),
                rtp_stabilise_below_deg=limit,
            )
        out[name] = (("northing", "easting"), stored[i], attrs)
    out.attrs = {**grid.attrs, "enhancement_products": list(products)}

    files = {}
    quick = _assemble(small, len(products), residual.shape, stride) if settings["quicklook"] else None
    for name in products:
        if settings["geotiff"]:
            path = write_geotiff(out[name], grid.attrs["crs_wkt"], context.scratch / f"{name}.tif")
            files[path.name] = path
        if settings["quicklook"]:
            # At most QUICKLOOK_PIXELS a side, like the gridding quick looks: a picture, not the data.
            look = xr.DataArray(
                quick[products.index(name)],
                dims=("northing", "easting"),
                coords={"northing": grid["northing"].values[::stride], "easting": grid["easting"].values[::stride]},
                attrs=out[name].attrs,
                name=name,
            )
            path = write_quicklook(look, context.scratch / f"{name}.png")
            files[path.name] = path

    n_valid = found["valid_cells"]
    summary = {
        "products": list(products),
        "inclination_deg": field_dir[0],
        "grid_declination_deg": field_dir[1],
        "rtp_stabilised": bool(stabilised),
        "tile_cells": [int(residual.chunks[0][0]), int(residual.chunks[1][0])],
        "halo_cells": settings["halo_cells"],
        "cells": int(residual.size),
        "valid_cells": n_valid,
        "ranges": {name: [float(lo), float(hi)] for name, (lo, hi) in zip(products, ranges)},
        "files": sorted(files),
    }
    context.log.info(
        "enhancement: %d products on %d x %d cells (%d valid), tiles %s + halo %d; inclination %.1f deg%s",
        len(products), residual.shape[0], residual.shape[1], n_valid, summary["tile_cells"], settings["halo_cells"],
        field_dir[0], " (stabilised RTP)" if stabilised else "",
    )
    return StageResult(datasets={"grid": out}, files=files, summary=summary)


STAGE = Stage(
    name="enhancement",
    run=run,
    params=PARAMS,
    after=("gridding",),
    order=80,
    summary="Vertical and horizontal derivatives, total gradient amplitude, tilt angle, reduction to the pole and upward continuation of the residual grid.",
)
