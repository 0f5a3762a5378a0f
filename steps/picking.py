"""Target picking: local maxima of the total gradient amplitude, grouped into points, clusters, linear features and extended sources.

Candidates are local maxima of the total gradient amplitude (the amplitude
of the 3-D analytic signal, Roest, Verhoef & Pilkington 1992, Magnetic
interpretation using the 3-D analytic signal), or, with ``pick_on =
"abs_residual"``, of the absolute residual. A candidate must exceed a
threshold given in physical units (``threshold_mode = "absolute"``) or as a
multiple of a noise level the stage measures from the grid itself
(``"noise_multiple"``); it must be a maximum within ``min_separation_m``
(closer candidates are merged, the highest kept) and lie at least
``edge_margin_m`` from blanked cells and from the grid edge. The search
runs tile by tile with a halo (``steps/_picking_maxima.py``).

Noise level (``steps/_picking_maxima.py``): 1.4826 x the median absolute
deviation (Rousseeuw & Croux 1993, Alternatives to the median absolute
deviation) of each derivative grid over a regular subsample of at most
``noise_max_cells`` cells, combined as the root sum of squares of the three
components (the RMS of the total gradient amplitude of noise alone); for
``abs_residual``, of the residual less its ``noise_box_m`` box mean, with
the white-noise factor ``1 - 1/n`` divided out.

Picks are then grouped by the connected region of above-threshold cells
they lie in (labelled tile by tile and joined across tile borders,
``steps/_picking_regions.py``) and each group is given a kind
(``steps/_picking_features.py``): a long thin group joined by a ridge is
one ``linear`` row (a cable or pipeline), a large dense group one
``extended`` row (a wreck); the member picks of those two go to the table
``feature_picks``. Other picks stay rows, ``cluster`` when their region
holds other picks, else ``point``.

Outputs: table ``picks`` (one row per candidate), ``feature_picks`` and
``picking_metadata`` (key, value: the noise level, the threshold and how
they were found).

This stage lists candidates for a qualified specialist to judge; it never
replaces that judgement and is no clearance certificate.

References
----------
Bentley, J. L. (1975). Multidimensional binary search trees used for
    associative searching. Communications of the ACM 18(9), 509-517.
Jolliffe, I. T. (2002). Principal Component Analysis, 2nd ed. Springer.
    (From memory.)
Roest, W. R., Verhoef, J. & Pilkington, M. (1992). Magnetic interpretation
    using the 3-D analytic signal. Geophysics 57(1), 116-125.
Rousseeuw, P. J. & Croux, C. (1993). Alternatives to the median absolute
    deviation. Journal of the American Statistical Association 88(424),
    1273-1283.
"""

from __future__ import annotations

import dask.array as da
import numpy as np
import pandas as pd
import xarray as xr

from lodeline.model import DataError, Stage, StageContext, StageResult, validate_grid
from lodeline.params import Param, validate_table

from ._picking_features import classify, could_be_linear, describe_picks, hull, linestring, polygon, ridge_samples
from ._picking_maxima import gradient_noise, merge_by_separation, residual_noise, tile_maxima
from ._picking_regions import regions
from ._picking_detector import normalise, statistic_grid

__all__ = ["PARAMS", "STAGE", "run", "KINDS"]

KINDS = ("point", "cluster", "linear", "extended")
DERIVATIVES = ("derivative_easting", "derivative_northing", "derivative_upward")

PARAMS = (
    Param("pick_on", "dipole_detector", "Grid searched for maxima: the matched subspace dipole detector on the residual, the total gradient amplitude, or the absolute residual.", kind=str, choices=("dipole_detector", "total_gradient_amplitude", "abs_residual")),
    Param("detector_depths_m", [2.5, 3.5, 4.5], "Depths below the sensors at which the dipole detector looks for sources, m (the largest detection value is kept).", kind=list, minimum=0.1, maximum=100.0),
    Param("detector_window_factor", 1.5, "Radius of the dipole detector's window as a multiple of the depth.", minimum=0.5, maximum=10.0),
    Param("detector_min_window_m", 1.5, "Least radius of the dipole detector's window, m.", minimum=0.1, maximum=100.0),
    Param("detector_background_order", 2, "Degree of the polynomial background fitted with the dipole in each window (0 constant, 1 plane, 2 quadratic).", kind=int, minimum=0, maximum=2),
    Param("detector_min_fill", 0.5, "Least fraction of a detector window that must hold data.", minimum=0.05, maximum=1.0),
    Param("threshold_mode", "noise_multiple", "How the threshold is given.", kind=str, choices=("noise_multiple", "absolute")),
    Param("threshold_noise_multiple", 5.0, "Threshold as a multiple of the measured noise level (threshold_mode = 'noise_multiple').", minimum=0.0, exclusive_minimum=True, maximum=1.0e4),
    Param("threshold_nT_per_m", 1.0, "Threshold of the total gradient amplitude, nT/m (threshold_mode = 'absolute', pick_on = 'total_gradient_amplitude').", minimum=0.0, exclusive_minimum=True),
    Param("threshold_nT", 2.0, "Threshold of the absolute residual, nT (threshold_mode = 'absolute', pick_on = 'abs_residual').", minimum=0.0, exclusive_minimum=True),
    Param("min_separation_m", 1.5, "Candidates closer than this are merged (the highest kept), m.", minimum=0.0, exclusive_minimum=True, maximum=1000.0),
    Param("edge_margin_m", 2.0, "Least distance of a candidate from a blanked cell or the grid edge, m.", minimum=0.0, maximum=1000.0),
    Param("noise_max_cells", 1_000_000, "Largest subsample of cells used for the noise level.", kind=int, minimum=1000),
    Param("noise_box_m", 2.0, "Side of the box mean removed before measuring the residual noise (pick_on = 'abs_residual'), m.", minimum=0.0, exclusive_minimum=True),
    Param("feature_noise_multiple", 5.0, "With pick_on = 'dipole_detector': linear and extended features are outlined where the total gradient amplitude exceeds this multiple of its measured noise level.", minimum=0.0, exclusive_minimum=True, maximum=1.0e4),
    Param("linear_min_picks", 4, "Least number of picks of a linear feature.", kind=int, minimum=2),
    Param("linear_min_length_m", 10.0, "Least length of a linear feature (extent of its picks), m.", minimum=0.0, exclusive_minimum=True),
    Param("linear_max_width_m", 4.0, "Largest width of a linear feature (extent of the central 80 % of its picks across its axis), m.", minimum=0.0),
    Param("linear_min_aspect", 5.0, "Least ratio of length to width of a linear feature.", minimum=1.0),
    Param("linear_min_ridge_fraction", 0.5, "Along the median link between consecutive picks of a linear feature the searched grid stays above this fraction of the smaller pick.", minimum=0.0, maximum=1.0),
    Param("extended_min_picks", 4, "Least number of picks in the region of an extended source.", kind=int, minimum=2),
    Param("extended_max_spacing_m", 5.0, "Largest median distance between neighbouring picks of an extended source, m.", minimum=0.0, exclusive_minimum=True),
    Param("extended_min_area_m2", 25.0, "Least area of the region of above-threshold cells of an extended source, m2.", minimum=0.0),
)


def _spacing(grid: xr.Dataset, name: str) -> float:
    values = np.asarray(grid[name].values, dtype=float)
    if values.size < 3:
        raise DataError(f"picking: the grid has {values.size} cells along {name}; at least 3 are needed")
    step = np.diff(values)
    if not np.allclose(step, step[0], rtol=1e-6, atol=0.0) or step[0] == 0:
        raise DataError(f"picking: grid coordinate {name!r} is not regularly spaced; regrid on a regular lattice")
    return float(step[0])


def _dask(var: xr.DataArray) -> da.Array:
    data = var.data
    return data if isinstance(data, da.Array) else da.from_array(np.asarray(data, dtype=float), chunks=(512, 512))


def _ridges(values: da.Array, groups: dict, rows, cols, value, rules) -> dict:
    """Region id -> whether the picks of a linear-shaped group are joined by a ridge (median link; one gather of cells)."""
    samples, owners = [], []
    for rid, (idx, desc) in groups.items():
        if rid < 0 or not could_be_linear(desc, len(idx), rules):
            continue
        ordered = idx[desc["order"]]
        cells, link = ridge_samples(np.column_stack([rows[ordered], cols[ordered]]))
        floor = np.minimum(value[ordered][:-1], value[ordered][1:]) * rules["linear_min_ridge_fraction"]  # > 0
        samples.append(cells)
        owners.append((rid, link, floor))
    if not samples:
        return {}
    cells = np.concatenate(samples)
    got = np.asarray(values.vindex[cells[:, 0], cells[:, 1]].compute(), dtype=float)
    out, start = {}, 0
    for rid, link, floor in owners:
        part = got[start : start + len(link)]
        start += len(link)
        lows = np.array([np.min(np.nan_to_num(part[link == k], nan=-np.inf)) for k in range(len(floor))])
        out[rid] = bool(np.median(lows / floor) >= 1.0 - 1e-12)
    return out


def _detector(grid, residual, spacing, s, context):
    """Detection value grid of the matched subspace detector (max over depths) and its noise scale per depth (nT^2).

    Each depth's statistic is written to the scratch folder (a zarr store)
    before it is normalised, so it is computed once and memory stays
    bounded by the tiles.
    """
    from ._dipole_model import field_unit_vector

    missing = [a for a in ("main_field_inclination_deg", "main_field_grid_declination_deg") if a not in grid.attrs]
    if missing:
        raise DataError(f"picking: the grid lacks the attribute {missing[0]!r}: run the main_field stage upstream")
    f_hat = field_unit_vector(float(grid.attrs["main_field_inclination_deg"]), float(grid.attrs["main_field_grid_declination_deg"]))
    values, scales = None, []
    for k, depth in enumerate(s["detector_depths_m"]):
        radius = max(s["detector_min_window_m"], s["detector_window_factor"] * float(depth))
        stat = statistic_grid(residual, float(depth), radius, spacing, f_hat, s["detector_min_fill"], s["detector_background_order"])
        path = context.scratch / f"detector_{k}.zarr"
        stat.rechunk(residual.chunks).to_zarr(str(path), overwrite=True)
        z, scale = normalise(da.from_zarr(str(path)), s["noise_max_cells"])
        scales.append(scale)
        values = z if values is None else da.fmax(values, z)
    return values, scales


def run(data: dict, params: dict, context: StageContext) -> StageResult:
    """Pick candidate targets on the enhanced grids.

    Parameters
    ----------
    data : dict
        ``data["enhancement"]["grid"]``: dataset on (northing, easting) with
        ``residual`` (nT), ``total_gradient_amplitude`` and the three
        derivatives (nT/m); NaN cells are blank.
    params : dict
        The ``[picking]`` table (see :data:`PARAMS`).
    context : lodeline.model.StageContext

    Returns
    -------
    lodeline.model.StageResult
        Tables ``picks``, ``feature_picks`` and ``picking_metadata``; summary
        with the noise level, threshold and counts by kind.
    """
    s = validate_table(PARAMS, params, "picking")
    if not s["detector_depths_m"] or any(not isinstance(d, (int, float)) or not d > 0 for d in s["detector_depths_m"]):
        raise DataError("picking.detector_depths_m must be a non-empty list of positive depths in metres, e.g. [2.5, 3.5, 4.5]")
    grid = data["enhancement"]["grid"]
    validate_grid(grid, where="picking")
    need = ["residual"] + (["total_gradient_amplitude", *DERIVATIVES] if s["pick_on"] != "abs_residual" else [])
    missing = [v for v in need if v not in grid.data_vars]
    if missing:
        raise DataError(f"picking: the enhancement grid lacks {', '.join(missing)}; add them to enhancement.products and rerun")
    dy, dx = _spacing(grid, "northing"), _spacing(grid, "easting")
    north = np.asarray(grid["northing"].values, dtype=float)
    east = np.asarray(grid["easting"].values, dtype=float)
    residual = _dask(grid["residual"])

    if s["pick_on"] == "dipole_detector":
        values, scales = _detector(grid, residual, (abs(dy), abs(dx)), s, context)
        noise = 1.0
        parts = []
        noise_how = ("matched subspace detector (dipole of any moment + polynomial background per window); value = "
                     "sqrt(T / scale), scale = median(T) / median(chi2_3) per depth; scales (nT^2) at depths "
                     + ", ".join(f"{d:g} m: {c:.4g}" for d, c in zip(s["detector_depths_m"], scales)))
        units, abs_threshold = "1", s["threshold_noise_multiple"]
        extras = [residual] + ([_dask(grid["total_gradient_amplitude"])] if "total_gradient_amplitude" in grid else [])
    elif s["pick_on"] == "total_gradient_amplitude":
        values = _dask(grid["total_gradient_amplitude"]).astype(float)
        noise, parts = gradient_noise([_dask(grid[v]) for v in DERIVATIVES], s["noise_max_cells"])
        noise_how = "sqrt(sum of (1.4826 x MAD)^2 of derivative_easting, derivative_northing, derivative_upward)"
        units, abs_threshold = "nT/m", s["threshold_nT_per_m"]
        extras = [residual, values]
    else:
        values = abs(residual)
        box = max(3, int(round(s["noise_box_m"] / max(abs(dy), abs(dx)))))
        noise, parts = residual_noise(residual, box, s["noise_max_cells"]), []
        noise_how = f"1.4826 x MAD of residual less its {2 * (box // 2) + 1}-cell box mean, / sqrt(1 - 1/n)"
        units, abs_threshold = "nT", s["threshold_nT"]
        extras = [residual] + ([_dask(grid["total_gradient_amplitude"])] if "total_gradient_amplitude" in grid else [])
    if s["threshold_mode"] == "noise_multiple":
        if not np.isfinite(noise) or noise <= 0:
            raise DataError(
                "picking: the noise level measured from the grid is zero or undefined (empty or constant grid); "
                "set picking.threshold_mode = 'absolute'"
            )
        threshold = s["threshold_noise_multiple"] * noise
    else:
        threshold = abs_threshold

    found = tile_maxima(values, extras, threshold, (abs(dy), abs(dx)), s["min_separation_m"], s["edge_margin_m"])
    rows, cols = found[:, 0].astype(int), found[:, 1].astype(int)
    xy = np.column_stack([east[cols], north[rows]])
    keep = merge_by_separation(xy, found[:, 2], s["min_separation_m"])
    found, xy = found[keep], xy[keep]
    value = found[:, 2]
    peak_anomaly = found[:, 3]
    peak_gradient = found[:, 4] if found.shape[1] > 4 else np.full(len(found), np.nan)

    # regions of above-threshold cells (coordinates relative to the grid corner, for conditioning)
    if s["pick_on"] == "dipole_detector":
        # The detector's value falls off slowly (as the anomaly, r^-3) and joins the far tails of a
        # strong item into one large region, so features are outlined on the total gradient
        # amplitude (r^-4) above its own noise threshold instead.
        shape_grid = _dask(grid["total_gradient_amplitude"]).astype(float) if "total_gradient_amplitude" in grid else None
        if shape_grid is None:
            raise DataError("picking: pick_on = 'dipole_detector' outlines features on the total gradient amplitude; "
                            "add total_gradient_amplitude to enhancement.products and rerun")
        tga_noise, _ = gradient_noise([_dask(grid[v]) for v in DERIVATIVES], s["noise_max_cells"])
        shape_threshold = s["feature_noise_multiple"] * tga_noise
        region_of, info = regions(shape_grid, shape_threshold, north - north[0], east - east[0], rows[keep], cols[keep])
        ridge_values = shape_grid
    else:
        shape_threshold, tga_noise = threshold, noise
        region_of, info = regions(values, threshold, north - north[0], east - east[0], rows[keep], cols[keep])
        ridge_values = values
    rows, cols = rows[keep], cols[keep]
    groups = {}
    for rid in sorted(set(region_of.tolist())):
        idx = np.flatnonzero(region_of == rid)
        idx = idx[np.argsort(-value[idx], kind="stable")]
        groups[rid] = (idx, describe_picks(xy[idx]))
    ridge_value = value if ridge_values is values else np.asarray(ridge_values.vindex[rows, cols].compute(), dtype=float)
    ridge_ok = _ridges(ridge_values, groups, rows, cols, ridge_value, s)

    rows_out, members = [], []
    feature = 0
    for rid, (idx, desc) in groups.items():
        reg = info.get(rid) if rid >= 0 else None
        kind = classify(desc, reg, len(idx), ridge_ok.get(rid, False), s)
        shape = {"n_picks": len(idx), "area_m2": reg["area_m2"] if reg is not None else np.nan}
        if kind in ("linear", "extended"):
            feature += 1
            top = idx[0]
            centre, ends = desc["centre"], desc["ends"]
            shape.update(length_m=desc["length_m"], width_m=desc["width_m"], azimuth_deg=desc["azimuth_deg"])
            if kind == "linear":
                geometry = linestring(xy[idx][desc["order"]])
            else:
                outline = hull(xy[idx])
                geometry = polygon(outline) if outline is not None else ""
            rows_out.append({
                "easting_m": centre[0], "northing_m": centre[1], "kind": kind, "feature_id": feature,
                "pick_value": value[top], "snr": value[top] / noise if noise > 0 else np.nan,
                "peak_gradient_nT_per_m": np.nanmax(peak_gradient[idx]) if np.isfinite(peak_gradient[idx]).any() else np.nan,
                "peak_anomaly_nT": np.max(peak_anomaly[idx]),
                "end1_easting_m": ends[0][0], "end1_northing_m": ends[0][1],
                "end2_easting_m": ends[1][0], "end2_northing_m": ends[1][1],
                "geometry_wkt": geometry,
                **shape,
            })
            for k in idx:
                members.append({"feature_id": feature, "easting_m": xy[k, 0], "northing_m": xy[k, 1], "pick_value": value[k],
                                "peak_anomaly_nT": peak_anomaly[k]})
            continue
        fid = 0
        if kind == "cluster":
            feature += 1
            fid = feature
            shape.update(length_m=desc["length_m"], width_m=desc["width_m"], azimuth_deg=desc["azimuth_deg"])
        for k in idx:
            rows_out.append({
                "easting_m": xy[k, 0], "northing_m": xy[k, 1], "kind": kind, "feature_id": fid,
                "pick_value": value[k], "snr": value[k] / noise if noise > 0 else np.nan,
                "peak_gradient_nT_per_m": peak_gradient[k], "peak_anomaly_nT": peak_anomaly[k],
                "geometry_wkt": "", **shape,
            })
    columns = ["pick_id", "easting_m", "northing_m", "kind", "feature_id", "n_picks", "pick_value", "snr",
               "peak_gradient_nT_per_m", "peak_anomaly_nT", "length_m", "width_m", "azimuth_deg", "area_m2",
               "end1_easting_m", "end1_northing_m", "end2_easting_m", "end2_northing_m", "geometry_wkt"]
    picks = pd.DataFrame(rows_out, columns=columns[1:])
    picks = picks.sort_values("pick_value", ascending=False, kind="stable").reset_index(drop=True)
    picks.insert(0, "pick_id", np.arange(1, len(picks) + 1))
    feature_picks = pd.DataFrame(members, columns=["feature_id", "easting_m", "northing_m", "pick_value", "peak_anomaly_nT"])

    box = max(3, int(round(s["noise_box_m"] / max(abs(dy), abs(dx)))))
    residual_sigma = residual_noise(residual, box, s["noise_max_cells"])
    meta = {
        "pick_on": s["pick_on"],
        "residual_noise_nT": residual_sigma,
        "residual_noise_method": f"1.4826 x MAD of residual less its {2 * (box // 2) + 1}-cell box mean, / sqrt(1 - 1/n)",
        "pick_value_units": units,
        "noise_level": noise,
        "noise_method": noise_how,
        "noise_components_nT_per_m": ";".join(f"{p:.6g}" for p in parts),
        **({"detector_depths_m": ";".join(f"{d:g}" for d in s["detector_depths_m"]),
            "detector_scales_nT2": ";".join(f"{c:.6g}" for c in scales)} if s["pick_on"] == "dipole_detector" else {}),
        "threshold_mode": s["threshold_mode"],
        "threshold": threshold,
        "min_separation_m": s["min_separation_m"],
        "edge_margin_m": s["edge_margin_m"],
        "candidates_before_grouping": int(len(found)),
        "feature_threshold_nT_per_m": shape_threshold,
        "gradient_noise_nT_per_m": tga_noise,
    }
    metadata = pd.DataFrame({"key": list(meta), "value": [str(v) for v in meta.values()]})
    picks.attrs.update(meta)
    counts = {k: int((picks["kind"] == k).sum()) for k in KINDS}
    summary = {
        "noise_level": float(noise),
        "noise_units": units,
        "threshold": float(threshold),
        "candidates": int(len(found)),
        "counts_by_kind": counts,
        "residual_noise_nT": float(residual_sigma),
        **({"noise_nT_per_m": float(noise)} if units == "nT/m" else {"noise_nT": float(noise)} if units == "nT" else {}),
    }
    if s["pick_on"] == "dipole_detector":
        context.log.info(
            "picking: dipole detector at depths %s m, threshold %.4g (detection signal-to-noise); residual noise %.4g nT; "
            "%d candidates -> %s", ", ".join(f"{d:g}" for d in s["detector_depths_m"]), threshold, residual_sigma,
            len(found), ", ".join(f"{v} {k}" for k, v in counts.items()),
        )
    else:
        context.log.info(
            "picking: noise %.4g %s, threshold %.4g %s; %d candidates -> %s",
            noise, units, threshold, units, len(found), ", ".join(f"{v} {k}" for k, v in counts.items()),
        )
    return StageResult(tables={"picks": picks, "feature_picks": feature_picks, "picking_metadata": metadata}, summary=summary)


STAGE = Stage(
    name="picking",
    run=run,
    params=PARAMS,
    after=("enhancement",),
    order=90,
    summary="Candidate targets: local maxima of the total gradient amplitude above a measured-noise threshold, grouped into points, clusters, linear features and extended sources.",
)
