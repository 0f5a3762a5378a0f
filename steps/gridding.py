"""Gridding: the levelled residual onto a regular grid in the survey CRS.

Readings flagged with any of ``exclude_flags`` are left out (nothing is
deleted: the readings pass through untouched; only the grid leaves them
out). The accepted readings of the chosen ``variables`` are gridded on
cell centres at whole multiples of ``cell_size_m`` in the survey CRS, in
square tiles of ``tile_cells`` nodes a side, one dask task per tile.

Methods (``method``)
    ``"lines"`` (default): two-pass line gridding, along each track and
    then across the tracks with a piecewise cubic Hermite (Bessel's
    derivative, de Boor 1978, *A Practical Guide to Splines*; or the
    monotone one of Fritsch & Carlson 1980, *Monotone piecewise cubic
    interpolation*), see :mod:`lodeline.steps._gridding_lines`. Local: a
    node depends only on readings within the reach, so tiles with a halo
    that wide give the same grid as gridding the whole area at once.
    ``"linear"`` and ``"cubic"``: Delaunay triangulation of all accepted
    readings with linear or Clough-Tocher cubic interpolation
    (``scipy.interpolate.griddata``; Alfeld 1984), the general scattered-data
    reference. They hold every accepted reading in memory; a warning is
    logged above ``DELAUNAY_WARN`` readings.

Blanking
    A cell farther than ``blank_distance_m`` from every accepted reading is
    NaN: values are never invented away from the data.

Defaults from the data
    The across-track spacing of the tracks is the median gap between the
    sorted across-track positions of the survey segments' mid-points (from
    each segment's first and last reading). ``cell_size_m`` defaults to a
    quarter of it, rounded to two significant figures (common practice is 1/4 to 1/5 of the line spacing, no
    published source) and ``blank_distance_m`` to 1.5 times it (one and a
    half track spacings, so that cells between tracks are filled and cells
    more than a track spacing and a half beyond the outer tracks are not;
    our choice, no published source). The across-track reach of the line
    gridder is twice the blanking distance (so that two tracks on each side
    are found) and the longest along-track gap bridged is the blanking
    distance.

Outputs
    ``grid`` dataset on ("northing", "easting") (CF attributes, ``crs_wkt``,
    a ``crs`` grid-mapping variable, the ``main_field_*`` attributes of the
    readings), a GeoTIFF ``grid_<variable>.tif`` and a quick-look
    ``grid_<variable>.png`` per variable, and a one-row table
    ``gridding_summary``.
"""

from __future__ import annotations

import time

import numpy as np
import pandas as pd
import xarray as xr

from lodeline.model import DEFAULT_EXCLUDE, FLAGS, DataError, Stage, StageResult, flag_mask, validate_grid
from lodeline.params import Param, ParameterError

from . import _gridding_files as files
from . import _gridding_tiles as tiles

DELAUNAY_WARN = 2_000_000
COPIED_ATTRS = (
    "main_field_nT",
    "main_field_inclination_deg",
    "main_field_declination_deg",
    "main_field_grid_declination_deg",
    "grid_convergence_deg",
    "main_field_model",
    "main_field_time",
    "crs",
)

PARAMS = (
    Param("method", "lines", "Gridding method: two-pass line gridding, or Delaunay linear/cubic (reference).",
          kind=str, choices=("lines", "linear", "cubic")),
    Param("across", "bessel", "Derivative rule of the across-track cubic of the line gridder.",
          kind=str, choices=("bessel", "pchip")),
    Param("cell_size_m", None, "Grid cell size, m; default a quarter of the across-track spacing of the tracks.",
          minimum=0, exclusive_minimum=True, optional=True),
    Param("blank_distance_m", None, "Cells farther than this from every accepted reading are blank, m; "
          "default 1.5 times the across-track spacing.", minimum=0, exclusive_minimum=True, optional=True),
    Param("tile_cells", 512, "Grid nodes per tile side (one dask task per tile).", kind=int, minimum=8),
    Param("variables", ["residual"], "Reading variables to grid.", kind=list, item_kind=str, minimum=1),
    Param("exclude_flags", list(dict.fromkeys(DEFAULT_EXCLUDE + ("base_station_gap",))),
          "Readings with any of these flags are left out.", kind=list, choices=tuple(FLAGS)),
    Param("include_tie_lines", True, "Grid the tie lines too (they fill where the survey lines leave gaps).",
          kind=bool),
    Param("geotiff", True, "Write one GeoTIFF per variable.", kind=bool),
    Param("quicklook", True, "Write one quick-look PNG per variable.", kind=bool),
)


def _two_figures(x: float) -> float:
    """``x`` rounded to two significant figures (a round default, e.g. 0.2499 -> 0.25)."""
    return float(f"{x:.2g}")


def _keep_lines(readings: xr.Dataset, include_ties: bool) -> np.ndarray:
    kinds = list(readings.attrs.get("line_kinds", []))
    keep = np.array([include_ties or k == "survey" for k in kinds], dtype=bool)
    return keep if keep.size else np.ones(1, dtype=bool)


def grid_readings(readings: xr.Dataset, segments: xr.Dataset, params: dict, log=None) -> tuple[xr.Dataset, dict]:
    """Grid the accepted readings (see the module docstring).

    Returns
    -------
    grid : xarray.Dataset
        Lazy (dask) grid on ("northing", "easting").
    info : dict
        Cell size, blanking distance, reach, line direction and spacing,
        readings used and left out.
    """
    for name in params["variables"]:
        if name not in readings.variables:
            raise ParameterError(
                f"gridding.variables: {name!r} is not a reading variable (have: {', '.join(map(str, readings.data_vars))})"
            )
    keep = _keep_lines(readings, params["include_tie_lines"])
    exclude = flag_mask(*params["exclude_flags"])
    angle, spacing = tiles.survey_geometry(readings, segments, keep)
    cell = params["cell_size_m"]
    blank = params["blank_distance_m"]
    if (cell is None or blank is None) and not np.isfinite(spacing):
        raise DataError("gridding: cannot find the across-track spacing of the tracks; set cell_size_m and blank_distance_m")
    cell = float(cell) if cell is not None else _two_figures(spacing / 4.0)
    blank = float(blank) if blank is not None else _two_figures(1.5 * spacing)
    reach = 2.0 * blank
    max_gap = blank
    halo = reach + max_gap + 2.0 * cell
    tc = int(params["tile_cells"])
    lines_method = params["method"] == "lines"
    # Blocks a quarter of a tile wide index the readings of each chunk (see _gridding_tiles).
    block_m = max(tc * cell / 4.0, halo) if lines_method else None
    chunks = tiles.prepared_chunks(readings, params["variables"], exclude, keep, block_m=block_m)
    if lines_method:
        boxes, keys = tiles.chunk_index(chunks)
    else:
        boxes = tiles.chunk_boxes(chunks)
    used = int(boxes[:, 4].sum())
    if used == 0:
        raise DataError("gridding: no accepted readings (check exclude_flags and the flags of earlier stages)")
    node_e, node_n = tiles.node_axes(boxes, cell, blank)
    k = len(params["variables"])
    if lines_method:
        grid_kw = dict(k=k, angle_deg=angle, reach_m=reach, max_gap_m=max_gap, min_sep_m=cell / 2,
                       across=params["across"])
        stack, reached = tiles.grid_lines(chunks, boxes, keys, node_e, node_n, tc, halo, blank, block_m, grid_kw)
    else:
        if used > DELAUNAY_WARN and log is not None:
            log.warning("gridding: method %r holds all %d accepted readings in memory; use 'lines' for large surveys",
                        params["method"], used)
        stack = tiles.grid_delaunay(chunks, node_e, node_n, tc, blank, params["method"], k)
        reached = None
    attrs = {key: readings.attrs[key] for key in COPIED_ATTRS if key in readings.attrs}
    accepted = (readings["flags"] & np.uint32(exclude)) == 0
    # The grid is treated as a level surface at the mean sensor elevation (m, up);
    # later stages (Euler deconvolution) measure depths from it.
    grid_elevation = float(readings["elevation"].where(accepted).mean().compute())
    attrs.update(crs_wkt=readings.attrs["crs_wkt"], Conventions="CF-1.11",
                 gridding_method=params["method"], cell_size_m=cell, blank_distance_m=blank,
                 grid_elevation_m=grid_elevation)
    data_vars = {}
    for i, name in enumerate(params["variables"]):
        src = readings[name].attrs
        data_vars[name] = (("northing", "easting"), stack[i], {
            "units": src.get("units", "1"),
            "long_name": src.get("long_name", name),
            "grid_mapping": "crs",
            "gridding_method": params["method"],
            "cell_size_m": cell,
            "blank_distance_m": blank,
            "exclude_flags": " ".join(params["exclude_flags"]),
        })
    grid = xr.Dataset(
        data_vars,
        coords={
            "easting": ("easting", node_e, {"units": "m", "standard_name": "projection_x_coordinate", "long_name": "easting (cell centre)"}),
            "northing": ("northing", node_n, {"units": "m", "standard_name": "projection_y_coordinate", "long_name": "northing (cell centre)"}),
            "crs": ((), np.int8(0), {"crs_wkt": readings.attrs["crs_wkt"], "spatial_ref": readings.attrs["crs_wkt"]}),
        },
        attrs=attrs,
    )
    validate_grid(grid, where="gridding")
    total = int(readings.sizes["reading"])
    info = {
        "method": params["method"],
        "cell_size_m": cell,
        "blank_distance_m": blank,
        "reach_m": reach,
        "line_direction_deg": angle,
        "track_spacing_m": spacing,
        "readings_used": used,
        "readings_left_out": total - used,
        "cells": int(node_e.size * node_n.size),
        "shape": [int(node_n.size), int(node_e.size)],
        "_tiles": reached,  # tiles that readings reach (lines method), for the stage's store
    }
    return grid, info


def run(data: dict, params: dict, context) -> StageResult:
    """Grid the levelled residual; write GeoTIFFs and quick looks (see the module docstring)."""
    upstream = data["levelling"]
    readings, segments = upstream["readings"], upstream["segments"]
    t0 = time.perf_counter()
    grid, info = grid_readings(readings, segments, params, context.log)
    # Computed once into the scratch folder; the counts, files and the stage output read from there.
    grid = tiles.store_grid(grid, context.scratch, info.pop("_tiles"))
    seconds = time.perf_counter() - t0
    first = grid[params["variables"][0]]
    filled = int(np.isfinite(first.data).sum().compute())
    if filled == 0:
        raise DataError(
            f"gridding: no grid cell could be filled from the {info['readings_used']} accepted reading(s) "
            f"(cell {info['cell_size_m']:g} m, blank_distance_m {info['blank_distance_m']:g} m): a grid needs tracks "
            "of several readings; check the readings kept by the earlier stages or raise gridding.blank_distance_m"
        )
    out_files = {}
    for name in params["variables"]:
        if params["geotiff"]:
            out_files[f"grid_{name}.tif"] = files.write_geotiff(grid, name, context.scratch / f"grid_{name}.tif")
        if params["quicklook"]:
            title = f"{context.survey.get('name', '')}\n{name}, {params['method']}, cell {info['cell_size_m']:.3g} m"
            out_files[f"grid_{name}.png"] = files.write_quicklook(grid, name, context.scratch / f"grid_{name}.png", title)
    summary = {
        **info,
        "filled_cells": filled,
        "coverage_fraction": filled / info["cells"] if info["cells"] else 0.0,
        "filled_area_m2": filled * info["cell_size_m"] ** 2,
        "grid_seconds": seconds,
        "readings_per_second": info["readings_used"] / seconds if seconds > 0 else None,
    }
    summary.pop("shape")
    context.log.info(
        "gridding: %s, cell %.3g m, blank %.3g m, %d x %d cells, %.1f %% filled, %d readings used (%d left out), %.1f s",
        params["method"], info["cell_size_m"], info["blank_distance_m"], info["shape"][0], info["shape"][1],
        100 * summary["coverage_fraction"], info["readings_used"], info["readings_left_out"], seconds,
    )
    return StageResult(
        datasets={"grid": grid},
        tables={"gridding_summary": pd.DataFrame([summary])},
        files=out_files,
        summary=summary,
    )


STAGE = Stage(
    name="gridding",
    run=run,
    params=PARAMS,
    after=("levelling",),
    order=70,
    summary="Grid the levelled residual onto a regular grid (GeoTIFF and quick looks too).",
)
