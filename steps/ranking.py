"""Ranking: the target table, scored and ranked, with its seed checks.

One row per target, built from the picks (``picking``), their Euler
solutions (``euler``), dipole fits and mass bands (``sizing``):

Confirmation
    A compact pick (kind ``point`` or ``cluster``) becomes a target when its
    dipole fit is accepted (``dipole_fit`` marks ``ok``: R^2 above its
    threshold, position inside the search bound), the fitted dipole's
    peak anomaly is at least ``min_snr`` times the residual noise, and the
    source lies no higher than ``min_burial_m`` below the seabed (where the
    seabed is known): a fit that puts a source well up in the water column
    explains noise or the tail of a neighbour, not a buried item. A fit with
    no accepted reading within ``seabed_radius_m`` lies outside the surveyed
    area and is not confirmed either. Picks whose fit failed
    are not dropped: they go to the table ``unconfirmed`` with the reason,
    and ``keep_unconfirmed = true`` lists them as targets too (kind and
    position of the pick, no fit figures). Fits of different picks that
    converge on the same source (closer than ``merge_distance_m``
    horizontally and ``merge_depth_m`` in depth) are one target: the row
    with the smaller position uncertainty is kept and the others are listed
    in ``merged_picks``. Linear and extended features are targets of their
    own kind, with the feature's outline.

Score
    ``score = 100 (w_s S + w_f F + w_m M) / (w_s + w_f + w_m)`` with

    * ``S = clip(log10(snr) / log10(snr_full), 0, 1)``: ``snr`` is the
      peak anomaly over the residual noise measured by the picking stage;
    * ``F = clip(fit_r2, 0, 1)`` (0 without a fit);
    * ``M = clip(log10(1 + mass_max_kg) / log10(1 + mass_full_kg), 0, 1)``
      (the upper end of the mass band: the cautious reading of the size;
      1 for linear and extended features, which are large by nature, and 0
      without a fit).

    The weights ``weight_snr``, ``weight_fit``, ``weight_mass`` and the
    saturation points ``snr_full``, ``mass_full_kg`` are parameters. Rank 1
    is the highest score (ties broken by snr, then target number). The
    weighting is a processing choice (common practice, no published source);
    the table keeps every term so another order can be made.

Peak anomaly
    For a fitted target the largest magnitude of the fitted dipole's
    total-field anomaly on the horizontal plane of the sensors above it
    (closed form, Blakely 1995, ch. 4, ``_dipole_model.design``, on a 0.05 m
    lattice); otherwise the pick's.

Burial
    ``burial_m`` is the depth of the target below the seabed (or ground),
    where the readings carry the sensor ``altitude``: the seabed elevation
    is the mean of ``elevation - altitude`` of the accepted readings within
    ``seabed_radius_m``.

Seeds
    Known QC seed items (``[inputs.seeds]``: a CSV with ``seed_id`` and
    ``easting_m``, ``northing_m`` or ``lon``, ``lat``; optional
    ``burial_m`` or ``elevation_m``) are matched to the nearest target
    within ``seed_radius_m``. Table ``seed_checks`` gives, per seed,
    whether it was found, the target, the horizontal error and the depth
    error. A missed seed fails the stage (the run stops with a one-line
    message) unless ``fail_on_missed_seed = false``.

Outputs: tables ``targets`` (CSV), ``unconfirmed``, ``merged_picks``,
``seed_checks``; files ``targets.geojson`` (RFC 7946, longitude/latitude),
``targets.gpkg`` (GeoPackage, survey CRS) and ``targets_provenance.json``
(the configuration hash, every upstream stage's cache key and the lodeline
version that produced the table).

The table supports, and never replaces, the judgement of qualified
specialists. It is no clearance certificate; local regulations and licensed
practice govern any reacquisition or disposal.

References
----------
Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic
    Applications. Cambridge University Press. [Blakely1995]_
Butler, H. et al. (2016). The GeoJSON Format. IETF RFC 7946. [RFC7946]_
Open Geospatial Consortium (2021). OGC GeoPackage Encoding Standard
    1.3.1, 12-128r18. [GeoPackage]_
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import shapely
from pyproj import CRS, Transformer

from lodeline.model import DEFAULT_EXCLUDE, FLAGS, DataError, Stage, StageContext, StageResult, flag_mask
from lodeline.params import Param, ParameterError, validate_table

from ._dipole_model import design, field_unit_vector
from ._dipole_select import select_near
from ._ranking_seeds import SEEDS_INPUT, check_seeds, read_seeds
from ._vector_files import write_geojson, write_geopackage

__all__ = ["PARAMS", "STAGE", "run", "COLUMNS", "score_rows"]

COLUMNS = (
    "target_id", "rank", "score", "kind", "easting_m", "northing_m", "longitude", "latitude", "elevation_m",
    "depth_below_sensor_m", "burial_m", "structural_index", "moment_Am2", "moment_inclination_deg",
    "moment_declination_deg", "remanence_angle_deg", "peak_anomaly_nT", "peak_gradient_nT_per_m", "snr", "fit_r2",
    "fit_rms_nT", "position_sigma_m", "depth_sigma_m", "mass_min_kg", "mass_max_kg", "n_picks", "length_m",
    "pick_id", "status", "seed_id", "score_snr", "score_fit", "score_mass", "geometry_wkt",
)

PARAMS = (
    Param("weight_snr", 0.4, "Weight of the signal-to-noise term of the score.", minimum=0.0),
    Param("weight_fit", 0.2, "Weight of the fit-quality (R^2) term of the score.", minimum=0.0),
    Param("weight_mass", 0.4, "Weight of the size (upper mass) term of the score.", minimum=0.0),
    Param("snr_full", 1000.0, "Signal-to-noise ratio at which the snr term reaches 1.", minimum=1.0, exclusive_minimum=True),
    Param("mass_full_kg", 1000.0, "Upper mass at which the size term reaches 1, kg.", minimum=0.0, exclusive_minimum=True),
    Param("merge_distance_m", 0.75, "Fitted sources of different picks closer than this horizontally are one target, m (about a fifth of the sensor-to-item distance: closer items are not resolved).", minimum=0.0),
    Param("merge_depth_m", 0.75, "... and closer than this in depth, m.", minimum=0.0),
    Param("min_snr", 5.0, "A fitted compact target is confirmed only when its peak anomaly is at least this multiple of the residual noise.",
          minimum=0.0),
    Param("min_burial_m", -1.0, "A fitted compact target is confirmed only when it lies no higher than this below the seabed, m "
          "(negative: above the seabed; an item proud of the seabed has its centre above it by its own radius).", optional=True),
    Param("keep_unconfirmed", False, "List picks whose dipole fit failed as targets too (without fit figures).", kind=bool),
    Param("seabed_radius_m", 2.0, "Radius within which the seabed elevation under a target is averaged from the readings, m.",
          minimum=0.0, exclusive_minimum=True),
    Param("seed_radius_m", 1.5, "A seed counts as found when a target lies this close horizontally, m.",
          minimum=0.0, exclusive_minimum=True),
    Param("fail_on_missed_seed", True, "Stop the run with an error when a seed item is not found.", kind=bool),
    Param("exclude_flags", list(DEFAULT_EXCLUDE), "Flags whose readings are left out of the seabed elevation.",
          kind=list, choices=tuple(FLAGS)),
)

COMPACT = ("point", "cluster")


def check_params(params: dict) -> dict:
    """Validate the ``[ranking]`` table."""
    s = validate_table(PARAMS, params, "ranking")
    if s["weight_snr"] + s["weight_fit"] + s["weight_mass"] <= 0:
        raise ParameterError("ranking: weight_snr, weight_fit and weight_mass are all 0; give at least one a positive weight")
    return s


def score_rows(table: pd.DataFrame, s: dict) -> pd.DataFrame:
    """Add ``score_snr``, ``score_fit``, ``score_mass``, ``score`` (0-100) and ``rank`` (1 = highest)."""
    snr = table["snr"].to_numpy(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        term_s = np.clip(np.log10(np.where(snr > 0, snr, np.nan)) / math.log10(s["snr_full"]), 0, 1)
        term_m = np.clip(np.log10(1 + table["mass_max_kg"].to_numpy(float)) / math.log10(1 + s["mass_full_kg"]), 0, 1)
    term_s = np.nan_to_num(term_s, nan=0.0)
    term_f = np.nan_to_num(np.clip(table["fit_r2"].to_numpy(float), 0, 1), nan=0.0)
    feature = table["kind"].isin(["linear", "extended"]).to_numpy()
    term_m = np.where(feature, 1.0, np.nan_to_num(term_m, nan=0.0))
    w = s["weight_snr"] + s["weight_fit"] + s["weight_mass"]
    out = table.copy()
    out["score_snr"], out["score_fit"], out["score_mass"] = term_s, term_f, term_m
    out["score"] = 100.0 * (s["weight_snr"] * term_s + s["weight_fit"] * term_f + s["weight_mass"] * term_m) / w
    order = np.lexsort((np.arange(len(out)), -np.nan_to_num(snr, nan=-1.0), -out["score"].to_numpy()))
    rank = np.empty(len(out), dtype=np.int64)
    rank[order] = np.arange(1, len(out) + 1)
    out["rank"] = rank
    return out


def _peak_anomaly(row, f_hat) -> float:
    """Largest |anomaly| of a fitted dipole on the sensors' plane above it, nT (0.05 m lattice)."""
    depth = float(row["depth_below_sensor_m"])
    m = np.array([row["moment_east_Am2"], row["moment_north_Am2"], row["moment_up_Am2"]], float)
    if not (np.isfinite(depth) and depth > 0 and np.all(np.isfinite(m))):
        return float("nan")
    half = 1.5 * depth
    g = np.arange(-half, half + 1e-9, 0.05)
    x, y = np.meshgrid(g, g)
    obs = np.column_stack([x.ravel(), y.ravel(), np.zeros(x.size)])
    return float(np.max(np.abs(design(obs, np.array([[0.0, 0.0, -depth]]), f_hat) @ m)))


def _merge(fitted: pd.DataFrame, s: dict) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Merge fitted rows that converged on the same source; returns kept rows and the merged-away list."""
    order = fitted.sort_values(["position_sigma_m", "pick_id"], kind="stable").index.to_list()
    kept, merged = [], []
    xyz = fitted[["easting_m", "northing_m", "elevation_m"]]
    for i in order:
        p = xyz.loc[i].to_numpy(float)
        into = None
        for k in kept:
            q = xyz.loc[k].to_numpy(float)
            if math.hypot(*(p[:2] - q[:2])) <= s["merge_distance_m"] and abs(p[2] - q[2]) <= s["merge_depth_m"]:
                into = k
                break
        if into is None:
            kept.append(i)
        else:
            merged.append({"pick_id": fitted.loc[i, "pick_id"], "into_pick_id": fitted.loc[into, "pick_id"],
                           "distance_m": math.hypot(*(p[:2] - xyz.loc[into].to_numpy(float)[:2]))})
    return fitted.loc[sorted(kept)], pd.DataFrame(merged, columns=["pick_id", "into_pick_id", "distance_m"])


def _seabed(readings, xy: np.ndarray, radius: float, exclude: int) -> np.ndarray:
    """Mean seabed elevation (elevation - altitude) of the readings within ``radius`` of each point, m (NaN: none)."""
    if readings is None or "altitude" not in readings.variables or len(xy) == 0:
        return np.full(len(xy), np.nan)
    sel = select_near(readings, "altitude", xy, radius, exclude)
    if len(sel["value"]) == 0:
        return np.full(len(xy), np.nan)
    from scipy.spatial import cKDTree

    bed = sel["elevation"] - sel["value"]
    tree = cKDTree(np.column_stack([sel["easting"], sel["northing"]]))
    out = np.full(len(xy), np.nan)
    for i, p in enumerate(xy):
        idx = tree.query_ball_point(p, radius)
        if idx:
            out[i] = float(np.mean(bed[idx]))
    return out


def run(data: dict, params: dict, context: StageContext) -> StageResult:
    """Build, score and rank the target table and check the seed items.

    Parameters
    ----------
    data : dict
        ``data["sizing"]["dipoles"]`` (one row per pick: fit and mass band),
        ``data["picking"]["picks"]`` and ``["picking_metadata"]``,
        ``data["euler"]["euler"]`` (structural index), and
        ``data["levelling"]["readings"]`` (for the seabed elevation).
    params : dict
        The ``[ranking]`` table (see :data:`PARAMS`).
    context : lodeline.model.StageContext
        ``context.inputs["seeds"]`` when seeds are given.
    """
    s = check_params(params)
    dipoles = data["sizing"]["dipoles"]
    picks = data["picking"]["picks"].set_index("pick_id", drop=False)
    meta = data["picking"].get("picking_metadata")
    meta = dict(zip(meta["key"], meta["value"])) if meta is not None and len(meta) else {}
    try:
        noise_nT = float(meta.get("residual_noise_nT", "nan"))
    except ValueError:
        noise_nT = float("nan")
    euler = data.get("euler", {}).get("euler")
    si = dict(zip(euler["pick_id"], euler["structural_index"])) if euler is not None and len(euler) else {}
    readings = data.get("levelling", {}).get("readings")
    attrs = readings.attrs if readings is not None else {}
    if "main_field_inclination_deg" not in attrs:
        raise DataError("ranking: the levelled readings lack the main-field attributes: run the main_field stage upstream")
    f_hat = field_unit_vector(float(attrs["main_field_inclination_deg"]), float(attrs["main_field_grid_declination_deg"]))

    d = dipoles.merge(picks[["pick_id", "snr", "peak_gradient_nT_per_m", "peak_anomaly_nT", "n_picks", "length_m",
                             "geometry_wkt", "easting_m", "northing_m"]].reset_index(drop=True),
                      on="pick_id", how="left", suffixes=("", "_pick"))
    compact = d["kind"].isin(COMPACT)
    peak = np.array([_peak_anomaly(r, f_hat) if bool(r["ok"]) else np.nan for _, r in d.iterrows()])
    weak = compact & d["ok"].astype(bool) & ~(peak >= s["min_snr"] * noise_nT) if noise_nT > 0 else pd.Series(False, index=d.index)
    d["note"] = d["note"].where(~weak, [f"peak anomaly {p:.3g} nT below min_snr x noise ({s['min_snr']:g} x {noise_nT:.3g} nT)" for p in peak])
    ok = compact & d["ok"].astype(bool) & np.isfinite(d["easting_m"]) & ~weak
    exclude = flag_mask(*s["exclude_flags"])
    if s["min_burial_m"] is not None:
        fit_xy = d[["easting_m", "northing_m"]].to_numpy(float)
        bed = np.full(len(d), np.nan)
        if ok.any():
            bed[ok.to_numpy()] = _seabed(readings, fit_xy[ok.to_numpy()], s["seabed_radius_m"], exclude)
        high = ok & (bed - d["elevation_m"].to_numpy(float) < s["min_burial_m"])
        if readings is not None and "altitude" in readings.variables:
            # no accepted reading within seabed_radius_m: the fitted source lies outside the surveyed area
            outside = ok & ~np.isfinite(bed)
            d.loc[outside, "note"] = f"no accepted reading within {s['seabed_radius_m']:g} m: outside the surveyed area"
            ok = ok & ~outside
        d.loc[high, "note"] = [f"source {b:.2f} m above the seabed (min_burial_m = {s['min_burial_m']:g})"
                               for b in (d.loc[high, "elevation_m"] - bed[high.to_numpy()])]
        ok = ok & ~high
    unconfirmed = d[compact & ~ok]
    fitted, merged = _merge(d[ok], s)

    rows = []
    for _, r in fitted.iterrows():
        rows.append({**{c: r.get(c, np.nan) for c in COLUMNS if c in r.index}, "status": "confirmed by dipole fit",
                     "peak_anomaly_nT": _peak_anomaly(r, f_hat),
                     "n_picks": 1 + int((merged["into_pick_id"] == r["pick_id"]).sum()) if len(merged) else 1,
                     "length_m": np.nan, "geometry_wkt": ""})
    for _, r in d[d["kind"].isin(["linear", "extended"])].iterrows():
        rows.append({"kind": r["kind"], "pick_id": r["pick_id"], "easting_m": r["easting_m_pick"], "northing_m": r["northing_m_pick"],
                     "peak_anomaly_nT": r["peak_anomaly_nT"], "peak_gradient_nT_per_m": r["peak_gradient_nT_per_m"],
                     "n_picks": r["n_picks"], "length_m": r["length_m"], "geometry_wkt": r["geometry_wkt"] if isinstance(r["geometry_wkt"], str) else "",
                     "status": f"{r['kind']} feature"})
    if s["keep_unconfirmed"]:
        for _, r in unconfirmed.iterrows():
            rows.append({"kind": r["kind"], "pick_id": r["pick_id"], "easting_m": r["easting_m_pick"], "northing_m": r["northing_m_pick"],
                         "peak_anomaly_nT": r["peak_anomaly_nT"], "peak_gradient_nT_per_m": r["peak_gradient_nT_per_m"],
                         "n_picks": 1, "geometry_wkt": "", "status": f"unconfirmed: {r['note']}"})
    table = pd.DataFrame(rows)
    for c in COLUMNS:
        if c not in table:
            table[c] = np.nan
    table["structural_index"] = [si.get(p, np.nan) for p in table["pick_id"]]
    table["snr"] = table["peak_anomaly_nT"] / noise_nT if noise_nT > 0 else np.nan

    # positions: lon/lat and the seabed under each target
    xy = table[["easting_m", "northing_m"]].to_numpy(float)
    to_ll = Transformer.from_crs(CRS.from_user_input(context.survey["crs_wkt"]), CRS.from_epsg(4326), always_xy=True)
    table["longitude"], table["latitude"] = to_ll.transform(xy[:, 0], xy[:, 1]) if len(xy) else ([], [])
    bed = _seabed(readings, xy, s["seabed_radius_m"], exclude)
    table["burial_m"] = bed - table["elevation_m"].to_numpy(float)

    table = score_rows(table, s)
    table = table.sort_values("rank", kind="stable").reset_index(drop=True)
    table["target_id"] = [f"T{k:04d}" for k in range(1, len(table) + 1)]

    # seeds
    seeds_checked = pd.DataFrame()
    seed_input = context.inputs.get("seeds")
    table["seed_id"] = ""
    if seed_input is not None:
        seeds = read_seeds(seed_input, context.survey["crs_wkt"], readings_bed=lambda p: _seabed(readings, p, s["seabed_radius_m"], flag_mask(*s["exclude_flags"])))
        seeds_checked = check_seeds(seeds, table, s["seed_radius_m"])
        for _, row in seeds_checked[seeds_checked["found"]].iterrows():
            table.loc[table["target_id"] == row["target_id"], "seed_id"] = row["seed_id"]
    table = table[list(COLUMNS)]

    files = _write_files(table, context)
    summary = {
        "targets": int(len(table)),
        "by_kind": {k: int((table["kind"] == k).sum()) for k in ("point", "cluster", "linear", "extended")},
        "unconfirmed": int(len(unconfirmed)),
        "merged": int(len(merged)),
        "residual_noise_nT": noise_nT,
        "seeds": int(len(seeds_checked)),
        "seeds_found": int(seeds_checked["found"].sum()) if len(seeds_checked) else 0,
    }
    context.log.info("ranking: %d targets (%s); %d picks unconfirmed, %d merged; seeds found %d of %d",
                     summary["targets"], ", ".join(f"{v} {k}" for k, v in summary["by_kind"].items()),
                     summary["unconfirmed"], summary["merged"], summary["seeds_found"], summary["seeds"])
    if len(seeds_checked):
        for _, r in seeds_checked.iterrows():
            context.log.info("ranking: seed %s %s", r["seed_id"], r["message"])
        missed = seeds_checked[~seeds_checked["found"]]
        if len(missed) and s["fail_on_missed_seed"]:
            names = ", ".join(missed["seed_id"].astype(str))
            raise DataError(
                f"ranking: seed item(s) {names} not found within {s['seed_radius_m']:g} m of any target; check the seed "
                "positions in [inputs.seeds] and the picking and dipole_fit settings, or set ranking.fail_on_missed_seed = false"
            )
    unconf = unconfirmed[["pick_id", "kind", "easting_m_pick", "northing_m_pick", "fit_r2", "note"]].rename(
        columns={"easting_m_pick": "easting_m", "northing_m_pick": "northing_m"})
    tables = {"targets": table, "unconfirmed": unconf, "merged_picks": merged}
    if len(seeds_checked):
        tables["seed_checks"] = seeds_checked
    return StageResult(tables=tables, files=files, summary=summary)


def _write_files(table: pd.DataFrame, context: StageContext) -> dict:
    geoms = []
    for _, r in table.iterrows():
        wkt = r["geometry_wkt"]
        if isinstance(wkt, str) and wkt:
            geoms.append(shapely.from_wkt(wkt))
        elif np.isfinite(r["easting_m"]) and np.isfinite(r["northing_m"]):
            geoms.append(shapely.Point(r["easting_m"], r["northing_m"]))
        else:
            geoms.append(None)
    props = table.drop(columns=["geometry_wkt"])
    lineage = dict(context.lineage)
    files = {
        "targets.geojson": write_geojson(context.scratch / "targets.geojson", geoms, props, context.survey["crs_wkt"],
                                         metadata={"lodeline_version": lineage.get("lodeline_version"),
                                                   "config_hash": lineage.get("config_hash")}),
        "targets.gpkg": write_geopackage(context.scratch / "targets.gpkg", geoms, props, context.survey["crs_wkt"],
                                         layer="targets", geometry_type="Unknown"),
    }
    provenance = {
        "table": "targets.csv",
        "rows": int(len(table)),
        "lodeline_version": lineage.get("lodeline_version"),
        "config_hash": lineage.get("config_hash"),
        "stage_keys": lineage.get("stages", {}),
        "crs": context.survey.get("crs"),
        "caution": "Supports, never replaces, the judgement of qualified specialists; no clearance certificate; "
                   "local regulations and licensed practice govern any reacquisition or disposal.",
    }
    path = context.scratch / "targets_provenance.json"
    path.write_text(json.dumps(provenance, indent=1, sort_keys=True) + "\n")
    files["targets_provenance.json"] = path
    return files


STAGE = Stage(
    name="ranking",
    run=run,
    params=PARAMS,
    after=("sizing", "picking", "euler", "levelling"),
    file_inputs=("seeds",),
    input_params={"seeds": SEEDS_INPUT},
    order=130,
    summary="The target table: confirmed targets, linear and extended features, scored and ranked; seed checks; CSV, GeoJSON, GeoPackage.",
)
