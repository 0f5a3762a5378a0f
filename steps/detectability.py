"""Detection assurance: what the survey could not have missed, where the target class is not detectable, and sampling checks.

For every grid cell (``steps/_detectability_maps.py``): the horizontal
distance to the nearest accepted reading (a k-d tree per tile, Bentley
1975), the slant distance from a target at ``burial_m`` below the seabed to
that reading's sensor, and from those, the picking stage's threshold and the
point-dipole fall-off, the least moment the survey would have detected for
the worst and for the typical moment orientation
(``steps/_detectability_physics.py``; the dipole field of Blakely 1995,
ch. 4) and the equivalent mass band of the sizing stage
(``steps/_dipole_mass.py``; ``docs/size_bands.md``).

Detection criterion: the same as the picking stage's, read from its
``picking_metadata`` table (and, for its detector, its parameters in the
run manifest). With ``pick_on = "dipole_detector"`` (the picker's default)
the least moment is the one whose matched subspace detector value
(Scharf & Friedlander 1994) reaches the threshold in the picker's own
windows over the filled cells (``steps/_detectability_detector.py``). With
``"total_gradient_amplitude"`` a target is detected when the peak of the
total gradient amplitude (Roest, Verhoef & Pilkington 1992) along the
nearest track exceeds the picker's threshold (nT/m), a signal that falls as
``r^-4``; with ``"abs_residual"`` when the peak of the absolute total-field
anomaly exceeds it (nT, ``r^-3``). A cell where the picker cannot place a
pick (blank, or within its ``edge_margin_m`` of a blank cell or the grid
edge) detects nothing. So the map says what the picker, as configured,
would have reported from the data as levelled and gridded.

The target class (``class_mass_kg``, detected at every burial down to
``class_max_burial_m``, on the mass basis ``class_basis``) is detectable
where its mass is at least the least detectable mass; the percentage of the
area of interest where it is detectable is reported for the conservative,
typical and optimistic bases, and the gaps (``steps/_detectability_gaps.py``;
Douglas & Peucker 1973 simplification) are written as GeoJSON (RFC 7946) and
GeoPackage polygons for planning infill lines (``steps/_vector_files.py``).

Along-line sampling and line spacing (``steps/_detectability_sampling.py``):
readings per anomaly width per stretch of every line and sensor, with the
flags ``too_fast``, ``too_sparse`` and ``spacing_exceeded``.

Outputs: dataset ``grid`` (the maps, with units), GeoTIFFs and quick-look
PNGs (``steps/_gridding_files.py``, ``steps/_detectability_files.py``),
``gaps.geojson``, ``gaps.gpkg``, ``sampling_flags.geojson`` (flagged
stretches), tables ``coverage_summary``, ``gaps``, ``sampling_lines``,
``sampling_stretches`` and ``line_spacing``. The method is written out in
``docs/detectability.md``; survey planning with the same physics in
``docs/planning.md``.

These figures support, and never replace, the judgement of qualified
specialists. A coverage figure is no clearance certificate: items can be
missed (an item lighter than its band, deeper, or hidden by a neighbour's
anomaly). Local regulations and licensed practice govern any reacquisition
or disposal.

References
----------
Bentley, J. L. (1975). Multidimensional binary search trees used for
    associative searching. Communications of the ACM 18(9), 509-517.
    [Bentley1975]_
Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic
    Applications. Cambridge University Press. [Blakely1995]_
Butler, H. et al. (2016). The GeoJSON Format. RFC 7946. [RFC7946]_
Douglas, D. H. & Peucker, T. K. (1973). Algorithms for the reduction of the
    number of points required to represent a digitized line or its
    caricature. Cartographica 10(2), 112-122. [Douglas1973]_
Roest, W. R., Verhoef, J. & Pilkington, M. (1992). Magnetic interpretation
    using the 3-D analytic signal. Geophysics 57(1), 116-125. [Roest1992]_
Scharf, L. L. & Friedlander, B. (1994). Matched subspace detectors. IEEE
    Transactions on Signal Processing 42(8), 2146-2157. [Scharf1994]_
"""

from __future__ import annotations

import math

import dask
import dask.array as da
import numpy as np
import pandas as pd
import xarray as xr

from lodeline.model import FLAGS, DataError, Stage, StageContext, StageResult, flag_mask, validate_grid
from lodeline.params import Param, ParameterError, validate_table

from . import _detectability_detector as det
from . import _detectability_files as pngs
from . import _detectability_gaps as gaps_mod
from . import _detectability_maps as maps
from . import _detectability_physics as phys
from . import _detectability_sampling as sampling
from ._dipole_mass import elongation_factor, hollow_factor, sphere_moment_per_kg

__all__ = ["PARAMS", "STAGE", "run", "class_geometry"]

BASES = ("conservative", "typical", "optimistic")
PERSIST_BYTES = 600_000_000
DETECTOR_CELL_M = 0.5  # lattice of the detector model's sums (see steps/_detectability_detector.py)

PARAMS = (
    Param("class_name", "target class", "Name of the target class of interest, for the tables and files.", kind=str),
    Param("class_mass_kg", 50.0, "Mass of the target class (iron or steel), kg.", minimum=0, exclusive_minimum=True),
    Param("class_max_burial_m", 1.0, "The class must be detected at every burial from the seabed down to this depth, m.",
          minimum=0, maximum=100),
    Param("class_basis", "conservative", "Mass model that decides where the class is detectable: conservative "
          "(worst orientation, solid sphere), typical (induced orientation, solid sphere) or optimistic "
          "(induced orientation, elongated hollow remanent item).", kind=str, choices=BASES),
    Param("burial_m", None, "Burial depth below the seabed of the least-detectable maps, m; default class_max_burial_m.",
          minimum=0, maximum=100, optional=True),
    Param("area_wkt", None, "Area of interest (to be cleared): a polygon in the survey CRS as WKT; default the "
          "gridded (non-blank) cells.", kind=str, optional=True),
    Param("search_radius_m", 25.0, "Cells with no accepted reading within this distance get no distance (NaN), m.",
          minimum=0, exclusive_minimum=True, maximum=10000),
    Param("min_gap_area_m2", 1.0, "Gaps smaller than this are counted but not written as polygons, m2.", minimum=0),
    Param("simplify_m", None, "Tolerance of the gap polygons' simplification, m; default half a cell.", minimum=0,
          optional=True),
    Param("max_line_spacing_m", None, "Specified largest spacing between neighbouring survey lines, m; not checked "
          "when unset.", minimum=0, exclusive_minimum=True, optional=True),
    Param("max_speed_m_s", None, "Specified largest speed over the ground, m/s; when unset only the speed that keeps "
          "min_readings_per_anomaly is checked.", minimum=0, exclusive_minimum=True, optional=True),
    Param("min_readings_per_anomaly", 5, "Fewest readings along the track within the class's anomaly width.",
          kind=int, minimum=2, maximum=1000),
    Param("stretch_length_m", 25.0, "Length of the along-line stretches of the sampling checks, m.", minimum=1,
          maximum=100000),
    Param("include_tie_lines", True, "Tie-line readings count as readings that can detect a target.", kind=bool),
    Param("exclude_flags", None, "Readings with any of these flags are not accepted; default the gridding stage's.",
          kind=list, choices=tuple(FLAGS), optional=True),
    Param("fallback_altitude_m", None, "Sensor height above the seabed where a reading's altitude is unknown, m; "
          "default the mean of the known altitudes.", minimum=0, maximum=1000, optional=True),
    Param("density_kg_m3", 7850.0, "Density of the iron or steel, kg/m^3 (as sizing).", minimum=0,
          exclusive_minimum=True),
    Param("aspect_ratio", 5.0, "Long over short axis of the most elongated item of the optimistic end (as sizing).",
          minimum=1, maximum=100),
    Param("wall_fraction", 0.15, "Wall thickness over outer radius of the thinnest-walled item of the optimistic end "
          "(as sizing).", minimum=0.01, maximum=1),
    Param("remanence_factor", 2.0, "Largest total over induced moment of the optimistic end (as sizing).", minimum=1),
    Param("main_field_nT", None, "Main-field intensity, nT; default from the grid.", minimum=1000, maximum=100000,
          optional=True),
    Param("geotiff", True, "Write GeoTIFFs of the maps.", kind=bool),
    Param("quicklook", True, "Write quick-look PNGs of the maps.", kind=bool),
)


def _metadata(table: pd.DataFrame) -> dict:
    if table is None or not {"key", "value"} <= set(table.columns):
        raise DataError("detectability: the picking stage's picking_metadata table is missing or has no key/value "
                        "columns; rerun the picking stage")
    meta = dict(zip(table["key"].astype(str), table["value"]))
    for key in ("pick_on", "threshold", "edge_margin_m"):
        if key not in meta:
            raise DataError(f"detectability: picking_metadata lacks {key!r}; rerun the picking stage")
    return meta


def _spacing(values: np.ndarray, name: str) -> float:
    if values.size < 2:
        raise DataError(f"detectability: the grid has {values.size} cell(s) along {name}; at least 2 are needed")
    step = np.diff(values)
    if not np.allclose(step, step[0], rtol=1e-6) or step[0] <= 0:
        raise DataError(f"detectability: grid coordinate {name!r} is not regularly spaced and increasing")
    return float(step[0])


def _area_polygon(wkt: str | None):
    if wkt is None:
        return None
    import shapely

    try:
        geom = shapely.from_wkt(wkt)
    except Exception as err:  # noqa: BLE001 - shapely raises several kinds
        raise ParameterError(f"detectability.area_wkt is not valid WKT ({str(err).splitlines()[0]}): give a POLYGON "
                             "or MULTIPOLYGON in the survey CRS") from None
    if geom is None or geom.geom_type not in ("Polygon", "MultiPolygon") or geom.is_empty or not geom.is_valid:
        raise ParameterError("detectability.area_wkt must be a valid, non-empty POLYGON or MULTIPOLYGON in the survey CRS")
    return geom


def class_geometry(table, basis: str, moment_Am2: float, threshold: float, z: float) -> dict:
    """Detection offset, detection distance and anomaly width of a moment at height ``z`` above it.

    Returns a dict with ``offset_m`` (largest detecting track offset, NaN if
    none), ``distance_m`` (slant distance there), ``width_m`` (half-maximum
    width along the track there, or straight overhead when undetectable).
    """
    orient = phys.BASES[basis]
    d = phys.detection_offset(table, orient, moment_Am2, threshold, z)
    at = d if np.isfinite(d) else 0.0
    return {"offset_m": d, "distance_m": math.hypot(at, z) if np.isfinite(d) else float("nan"),
            "width_m": float(phys.anomaly_width(table, at, z))}


def _detector_settings(context, meta: dict, grid, inclination: float):
    """The picker's detector settings from its manifest record and metadata table."""
    record = (context.records or {}).get("picking", {})
    params = (record.get("components") or {}).get("params")
    if not params or "detector_depths_m" not in params:
        raise DataError("detectability: the picking stage's parameters are not in the run manifest; rerun picking "
                        "(pick_on = 'dipole_detector' needs its depths and windows)")
    if "main_field_grid_declination_deg" not in grid.attrs:
        raise DataError("detectability: the grid lacks main_field_grid_declination_deg; rerun main_field and gridding")
    try:
        return det.detector_settings(params, meta, inclination, float(grid.attrs["main_field_grid_declination_deg"]))
    except ValueError as err:
        raise DataError(f"detectability: {err}") from None


def _inside(polygon, e, n) -> np.ndarray:
    """True where (e, n) lies inside the polygon (everywhere when there is none)."""
    e = np.asarray(e, dtype=float)
    if polygon is None:
        return np.ones(e.shape, dtype=bool)
    import shapely

    return shapely.contains_xy(polygon, e, np.asarray(n, dtype=float))


def _stack_tile(near, pickable, area, *moments, model):
    return maps.cell_maps(near, pickable[0], area[0], model, moments[0] if moments else None)


def run(data: dict, params: dict, context: StageContext) -> StageResult:
    """Detection maps, coverage of the target class with its gaps, and sampling checks.

    Parameters
    ----------
    data : dict
        ``data["levelling"]`` (readings, segments), ``data["gridding"]["grid"]``
        and ``data["picking"]["picking_metadata"]``.
    params : dict
        The ``[detectability]`` table (see :data:`PARAMS`).
    context : lodeline.model.StageContext

    Returns
    -------
    lodeline.model.StageResult
        Dataset ``grid``; tables ``coverage_summary``, ``gaps``,
        ``sampling_lines``, ``sampling_stretches``, ``line_spacing``; the
        GeoTIFF, PNG, GeoJSON and GeoPackage files.
    """
    s = validate_table(PARAMS, params, "detectability")
    readings, segments = data["levelling"]["readings"], data["levelling"]["segments"]
    grid = data["gridding"]["grid"]
    validate_grid(grid, where="detectability")
    meta = _metadata(data["picking"].get("picking_metadata"))
    criterion = {"total_gradient_amplitude": "gradient", "abs_residual": "total_field"}.get(meta["pick_on"], "detector")
    threshold = float(meta["threshold"])
    margin = float(meta["edge_margin_m"])
    if not (np.isfinite(threshold) and threshold > 0):
        raise DataError(f"detectability: the picking threshold {meta['threshold']!r} is not a positive number")
    if "main_field_inclination_deg" not in grid.attrs:
        raise DataError("detectability: the grid lacks main_field_inclination_deg; rerun main_field and gridding")
    inclination = float(grid.attrs["main_field_inclination_deg"])
    field_nT = s["main_field_nT"] if s["main_field_nT"] is not None else grid.attrs.get("main_field_nT")
    if field_nT is None:
        raise DataError("detectability: the grid has no main_field_nT attribute: give detectability.main_field_nT")
    variable = list(grid.data_vars)[0]
    names = s["exclude_flags"]
    if names is None:
        names = str(grid[variable].attrs.get("exclude_flags", "")).split()
    exclude = flag_mask(*names)
    kinds = list(readings.attrs.get("line_kinds", []))
    keep_line = np.array([s["include_tie_lines"] or k == "survey" for k in kinds] or [True], dtype=bool)
    value = variable if variable in readings.variables else "residual"

    north = np.asarray(grid["northing"].values, dtype=float)
    east = np.asarray(grid["easting"].values, dtype=float)
    dy, dx = _spacing(north, "northing"), _spacing(east, "easting")
    if abs(dy - dx) > 1e-6 * dx:
        raise DataError(f"detectability: the grid cells are {dx:g} x {dy:g} m; square cells are needed (regrid)")
    cell = dx
    burial = s["burial_m"] if s["burial_m"] is not None else s["class_max_burial_m"]
    area_polygon = _area_polygon(s["area_wkt"])

    # sensor altitude where unknown
    on_line = da.map_blocks(lambda line: keep_line[line], da.asarray(readings["line_index"].data), dtype=bool)
    accepted = ((da.asarray(readings["flags"].data) & np.uint32(exclude)) == 0) & on_line
    alt = da.where(accepted, da.asarray(readings["altitude"].data), np.nan)
    n_known, alt_mean, alt_min, alt_max, n_acc = dask.compute(da.isfinite(alt).sum(), da.nanmean(alt), da.nanmin(alt),
                                                              da.nanmax(alt), accepted.sum())
    fallback = s["fallback_altitude_m"]
    if fallback is None:
        if int(n_known) == 0:
            raise DataError("detectability: no accepted reading has a sensor altitude; give "
                            "detectability.fallback_altitude_m")
        fallback = float(alt_mean)
    if not np.isfinite(alt_min):
        alt_min = alt_max = fallback
    alt_min, alt_max = min(float(alt_min), fallback), max(float(alt_max), fallback)
    unknown_alt = int(n_acc) - int(n_known)

    table = phys.factor_table(inclination, "total_field" if criterion == "detector" else criterion)
    per_kg = sphere_moment_per_kg(float(field_nT), s["density_kg_m3"])
    amp = elongation_factor(s["aspect_ratio"]) * hollow_factor(s["wall_fraction"]) * s["remanence_factor"]
    class_burials = tuple(np.linspace(0.0, s["class_max_burial_m"], 5))
    model = maps.DetectionModel(table, threshold, float(burial), s["class_mass_kg"], class_burials, per_kg, amp,
                                s["class_basis"])

    chunks = maps.accepted_chunks(readings, exclude, keep_line, fallback, value)
    boxes = maps.chunk_boxes(chunks)
    if boxes[:, 4].sum() == 0:
        raise DataError("detectability: no accepted readings (check exclude_flags and the flags of earlier stages)")
    base = grid[variable].data
    if not isinstance(base, da.Array):
        base = da.from_array(np.asarray(base), chunks=(512, 512))
    near = maps.nearest_maps(chunks, boxes, east, north, base.chunks[0], base.chunks[1], s["search_radius_m"])
    filled = da.isfinite(base)
    pickable = maps.pickable_mask(filled, (dy, dx), margin)
    area = maps.area_mask(filled, east, north, area_polygon) if area_polygon is not None else filled
    names_out = list(maps.MAP_VARIABLES) + list(maps.BASIS_LAYERS)
    extra, detector_note = [], {}
    if criterion == "detector":
        settings = _detector_settings(context, meta, grid, inclination)
        burials = (float(burial), float(s["class_max_burial_m"]))
        moments, stride = det.moments_grid(filled, near, settings, (dy, dx), burials, fallback,
                                           (float(alt_min), float(alt_max)), DETECTOR_CELL_M)
        extra = [moments]
        detector_note = {"detector_depths_m": list(settings.depths_m), "detector_scales_nT2": list(settings.scales_nT2),
                         "detector_lattice_m": stride * cell}
    stack = da.map_blocks(_stack_tile, near, pickable[None], area[None], *extra, model=model, dtype=np.float32,
                          chunks=((len(names_out),),) + base.chunks)
    if stack.size * 4 <= PERSIST_BYTES:
        stack = stack.persist()
    else:
        # too large to hold: computed once into the stage's scratch folder and read back by tile, so that
        # the coverage counts, the gap outlines and every written layer do not each recompute the detector sums
        path = context.scratch / "maps.zarr"
        stack.rechunk((len(names_out),) + tuple(max(c) for c in base.chunks)).to_zarr(str(path), overwrite=True)
        stack = da.from_zarr(str(path))

    attrs_common = {"grid_mapping": "crs"}
    data_vars = {}
    for i, name in enumerate(maps.MAP_VARIABLES):
        units, long_name = maps.MAP_VARIABLES[name]
        data_vars[name] = (("northing", "easting"), stack[i], {"units": units, "long_name": long_name, **attrs_common})
    out_grid = xr.Dataset(
        data_vars,
        coords={"easting": grid["easting"], "northing": grid["northing"],
                "crs": ((), np.int8(0), {"crs_wkt": grid.attrs["crs_wkt"], "spatial_ref": grid.attrs["crs_wkt"]})},
        attrs={
            "crs_wkt": grid.attrs["crs_wkt"], "Conventions": "CF-1.11", "criterion": criterion,
            "threshold": threshold, "threshold_units": {"gradient": "nT/m", "total_field": "nT"}.get(criterion, "1"),
            "edge_margin_m": margin, "burial_m": float(burial), "class_name": s["class_name"],
            "class_mass_kg": s["class_mass_kg"], "class_max_burial_m": s["class_max_burial_m"],
            "class_basis": s["class_basis"], "main_field_inclination_deg": inclination,
            "main_field_nT": float(field_nT), "moment_per_kg_Am2": per_kg, "optimistic_factor": amp,
        },
    )
    validate_grid(out_grid, where="detectability")

    # coverage of the class
    cell_area = dx * dy
    layer = {b: stack[len(maps.MAP_VARIABLES) + k] for k, b in enumerate(BASES)}
    counts = dask.compute(
        da.isfinite(layer["conservative"]).sum(), (area & filled).sum(),
        *[(layer[b] == 1).sum() for b in BASES],
    )
    in_area, surveyed = int(counts[0]), int(counts[1])
    detect = dict(zip(BASES, (int(c) for c in counts[2:])))
    total_area = float(area_polygon.area) if area_polygon is not None else in_area * cell_area
    simplify = s["simplify_m"] if s["simplify_m"] is not None else cell / 2.0
    gaps = gaps_mod.gap_polygons(layer[s["class_basis"]], east, north, cell, area_polygon)
    gap_geoms, gap_rows, (small_n, small_area) = gaps_mod.gap_table(gaps, s["class_name"], s["min_gap_area_m2"], simplify)
    coverage = []
    for b in BASES:
        det_area = detect[b] * cell_area
        row = {"class_name": s["class_name"], "class_mass_kg": s["class_mass_kg"],
               "class_max_burial_m": s["class_max_burial_m"], "basis": b, "orientation": phys.BASES[b],
               "area_m2": total_area, "surveyed_area_m2": surveyed * cell_area, "detectable_area_m2": det_area,
               "percent_detectable": 100.0 * det_area / total_area if total_area > 0 else float("nan"),
               "gap_area_m2": total_area - det_area}
        if b == s["class_basis"]:
            row.update(gaps=len(gap_geoms), gaps_written_area_m2=float(gap_rows["area_m2"].sum()),
                       small_gaps=small_n, small_gap_area_m2=small_area)
        coverage.append(row)
    coverage = pd.DataFrame(coverage)

    # sampling: anomaly width of the class at its detection distance, against sensor altitude
    class_moment = s["class_mass_kg"] * per_kg * (amp if s["class_basis"] == "optimistic" else 1.0)
    top = max(float(alt_max) if np.isfinite(alt_max) else fallback, fallback, 0.5) * 1.5
    alt_grid = np.linspace(0.0, top, 61)
    if criterion == "detector":
        # the detector sums over its window: the class's detection distance is its
        # detection depth below a wholly filled window; the width is that of the
        # total-field anomaly seen straight over it there
        z_det = det.detection_depth(settings, class_moment, (dy, dx), phys.BASES[s["class_basis"]])
        reach = z_det if np.isfinite(z_det) else fallback + s["class_max_burial_m"]
        width_grid = np.full(alt_grid.size, float(phys.anomaly_width(table, 0.0, reach)))
        class_reach = {"class_detection_depth_m": z_det, "class_anomaly_width_m": float(width_grid[0])}
    else:
        geo = [class_geometry(table, s["class_basis"], class_moment, threshold, h + s["class_max_burial_m"])
               for h in alt_grid]
        width_grid = np.array([g["width_m"] for g in geo])
        geo_mean = class_geometry(table, s["class_basis"], class_moment, threshold,
                                  fallback + s["class_max_burial_m"])
        class_reach = {"class_detection_offset_m": geo_mean["offset_m"],
                       "class_detection_distance_m": geo_mean["distance_m"],
                       "class_anomaly_width_m": geo_mean["width_m"]}
    stretches, spacing, lines = sampling.sampling_checks(
        readings, segments, exclude, value, s["stretch_length_m"], alt_grid, width_grid, fallback,
        s["min_readings_per_anomaly"], s["max_speed_m_s"], s["max_line_spacing_m"], lambda e, n: _inside(area_polygon, e, n))

    # files
    files = pngs.write_files(context.scratch, out_grid, gap_geoms, gap_rows, stretches, s, burial,
                             f"{context.survey.get('name', '')}\n{s['class_name']} ({s['class_basis']})")

    conservative = coverage.set_index("basis").loc[s["class_basis"]]
    flat = {b: float(coverage.set_index("basis").loc[b, "percent_detectable"]) for b in BASES}
    summary = {
        "criterion": criterion, "threshold": threshold, "edge_margin_m": margin, "inclination_deg": inclination,
        "class_name": s["class_name"], "class_mass_kg": s["class_mass_kg"],
        "class_max_burial_m": s["class_max_burial_m"], "class_basis": s["class_basis"],
        **{f"percent_detectable_{b}": flat[b] for b in BASES},
        "area_m2": total_area, "gap_area_m2": float(conservative["gap_area_m2"]), "gaps": len(gap_geoms),
        "small_gaps": small_n, **class_reach, "mean_altitude_m": fallback, **detector_note,
        "readings_without_altitude": unknown_alt,
        "stretches": int(len(stretches)),
        "stretches_too_fast": int(stretches["too_fast"].sum()),
        "stretches_too_sparse": int(stretches["too_sparse"].sum()),
        "line_stretches_spacing_exceeded": int(spacing["spacing_exceeded"].sum()),
        "line_stretches_measured": int(len(spacing)),
        "lines_flagged": int((lines["flags"] != "").sum()),
    }
    context.log.info(
        "detectability: %s (%g kg to %g m, %s): %.1f %% of %.0f m2 detectable (typical %.1f %%, optimistic %.1f %%); "
        "%d gaps of %.0f m2 written, %d smaller; stretches too fast %d, too sparse %d; line stretches spacing exceeded %d",
        s["class_name"], s["class_mass_kg"], s["class_max_burial_m"], s["class_basis"], flat[s["class_basis"]],
        total_area, flat["typical"], flat["optimistic"], len(gap_geoms), float(gap_rows["area_m2"].sum()), small_n,
        summary["stretches_too_fast"], summary["stretches_too_sparse"], summary["line_stretches_spacing_exceeded"])
    return StageResult(
        datasets={"grid": out_grid},
        tables={"coverage_summary": coverage, "gaps": gap_rows, "sampling_lines": lines,
                "sampling_stretches": stretches, "line_spacing": spacing},
        files=files,
        summary=summary,
    )


STAGE = Stage(
    name="detectability",
    run=run,
    params=PARAMS,
    after=("levelling", "gridding", "picking"),
    order=95,
    summary="Detection assurance: least detectable target per cell, coverage and gaps of a target class, "
            "along-line sampling and line-spacing checks",
)
