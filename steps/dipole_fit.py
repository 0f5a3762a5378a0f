"""Dipole fit: a point magnetic dipole fitted to the levelled readings of each pick.

For every pick of kind ``point`` or ``cluster`` (``fit_kinds``), the
levelled residual readings within ``radius_m`` (horizontal) of the pick,
left out those flagged with any of ``exclude_flags``, are fitted with a
point dipole (position and the three moment components; Blakely 1995,
ch. 4 and 12, total-field anomaly as the projection of the dipole field on
the main-field direction) plus a background (a constant, a plane or a quadratic surface), by
nonlinear least squares with variable projection (Golub & Pereyra 1973):
moments and background by linear least squares at each trial position,
the position by ``scipy.optimize.least_squares`` within bounds (``radius_m``
horizontally about the pick, ``min_depth_m`` to ``max_depth_m`` below the
median sensor elevation). Starts: the Euler solution of the pick when it
has one (Reid et al. 1990), and the pick position at each of
``start_depths_m``; the start of least cost wins. One-sigma errors come
from the covariance ``s^2 (J^T J)^-1`` of the linearised fit (Press et al.
2007, ch. 15.5), widened for residuals correlated along the track.

Readings are selected chunk by chunk (see
:mod:`lodeline.steps._dipole_select`): only the chunks whose bounding box
comes within the radius of a pick are read, and only the readings near a
pick are loaded.

Joint fits
    When a single fit's R^2 is below ``joint_r2_below`` and other fitted
    picks lie within ``radius_m`` of it, the pick and its nearest such
    neighbours (up to ``max_joint`` sources) are fitted together (sum of
    dipoles, on the readings within the radius of any of them), starting
    from the single fits. The joint fit replaces the single fits of its
    members when it explains those readings significantly better than one
    dipole at the pick does: the extra-sum-of-squares F test (Draper &
    Smith 1998, ch. 5; 6 extra parameters per extra source) at p below
    ``joint_p_value``. The members then share ``joint_group`` (an integer;
    -1 for single fits).

Neighbours and added sources
    Then (:mod:`lodeline.steps._dipole_refine`) each window is refitted
    with the modelled fields of the fitted sources outside it removed
    (``neighbour_passes``), and a window whose residual RMS stays above
    ``add_rms_multiple`` times the noise and ``add_fraction`` of its
    anomaly is given further sources, one at a time at the largest
    remaining residual, each kept when the F test prefers it: close
    objects that the picking saw as one. Added sources get new pick
    numbers, kind ``cluster`` and the note "sources added where the fit
    left signal". Last (``residual_sources``), the residual of all fitted
    sources outside every fit window is searched for anomalies above
    ``residual_noise_multiple`` times the noise that no pick found (a weaker
    item on a stronger one's flank); each that passes the checks gets a
    new pick number, kind ``point`` (``cluster`` within twice the radius
    of a fitted source) and the note "found in the residual of the fitted
    sources".

Outputs
    ``tables["dipoles"]``: one row per pick (columns in
    :data:`lodeline.steps._dipole_rows.COLUMNS`). ``remanence_angle_deg`` is
    the angle between the moment and the main field (0 for an induced moment
    of a highly permeable body, so large angles suggest remanence, or an
    elongated body across the field). ``ok`` is true for a fit with
    ``fit_r2 >= accept_r2`` whose position is not on a search bound; the
    ``note`` says why not. Picks of other kinds get NaN and "not a point
    source"; picks with fewer than ``min_readings`` readings get NaN and a
    note. ``main_field_nT`` (the main-field intensity from the readings'
    attributes) is carried for the sizing stage.

References
----------
Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic
    Applications. Cambridge University Press. [Blakely1995]_
Draper and Smith (1998). Applied Regression Analysis. [Draper1998]_
    (extra-sum-of-squares F test; cited from memory)
Golub, G. H., and Pereyra, V. (1973). The differentiation of
    pseudo-inverses and nonlinear least squares problems whose variables
    separate. SIAM Journal on Numerical Analysis 10(2), 413-432.
    [Golub1973]_
Press, W. H., et al. (2007). Numerical Recipes, 3rd ed. Cambridge
    University Press. [Press2007]_
Reid, A. B., et al. (1990). Magnetic interpretation in three dimensions
    using Euler deconvolution. Geophysics 55, 80-91. [Reid1990]_
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import shapely
from scipy.spatial import cKDTree

from lodeline.model import DEFAULT_EXCLUDE, FLAGS, DataError, Stage, StageContext, StageResult, flag_mask
from lodeline.params import Param, ParameterError, validate_table

from ._dipole_model import field_unit_vector
from ._dipole_refine import better, noise_from_readings, refine
from ._dipole_rows import COLUMNS, empty_row, fit_group
from ._dipole_select import select_near

__all__ = ["PARAMS", "STAGE", "run", "check_params"]

KINDS = ("point", "cluster", "linear", "extended")

PARAMS = (
    Param("radius_m", 5.0, "Horizontal radius about a pick within which readings are fitted, m.",
          minimum=0, exclusive_minimum=True),
    Param("background", "plane", "Background fitted with the dipole: a constant, a plane in easting and northing, or a quadratic surface (for windows on the tail of a large source).",
          kind=str, choices=("constant", "plane", "quadratic")),
    Param("min_readings", 30, "Fewest readings for a fit; a pick with fewer gets NaN and a note.", kind=int, minimum=10),
    Param("start_depths_m", [0.5, 1.5, 3.0, 6.0], "Start depths below the median sensor elevation, m (besides the Euler solution).",
          kind=list, item_kind=float, minimum=1),
    Param("min_depth_m", 0.2, "Shallowest source allowed below the median sensor elevation, m.", minimum=0),
    Param("max_depth_m", 15.0, "Deepest source allowed below the median sensor elevation, m.",
          minimum=0, exclusive_minimum=True),
    Param("accept_r2", 0.6, "Smallest R^2 of a fit marked ok.", minimum=0, maximum=1),
    Param("joint_r2_below", 0.95, "Single fits with R^2 below this are refitted jointly with picks within radius_m.",
          minimum=0, maximum=1),
    Param("joint_p_value", 1e-3, "Largest p-value of the F test at which a joint fit replaces the single fits.",
          minimum=0, exclusive_minimum=True, maximum=1),
    Param("max_joint", 5, "Most sources in one fit window, joint fits and added sources together (1 turns both off).",
          kind=int, minimum=1, maximum=8),
    Param("neighbour_passes", 2, "Passes refitting each window with the modelled fields of the other fitted sources removed (0: off).",
          kind=int, minimum=0, maximum=5),
    Param("add_sources", True, "Add dipoles where the residual of all fitted sources still holds signal (kept when the F test prefers them).",
          kind=bool),
    Param("add_rms_multiple", 2.0, "A fit is given another source while its residual RMS exceeds this multiple of the noise and add_fraction of its anomaly.",
          minimum=1),
    Param("add_fraction", 0.01, "A fit is given another source only while its residual RMS exceeds this fraction of its largest anomaly (the misfit of a strong source through position errors is about 1 % of its peak on the demo).",
          minimum=0, maximum=1),
    Param("add_min_separation_m", 1.0, "Closest an added source may lie to another source, m.", minimum=0),
    Param("residual_sources", True, "Search the residual of all fitted sources outside the fit windows for sources no pick found "
          "(beside a stronger anomaly that the picking took in), and fit those that pass the checks.", kind=bool),
    Param("residual_noise_multiple", 10.0, "A residual (averaged over 0.4 m, less the median within radius_m) above this multiple "
          "of the noise seeds a source found in the residual.", minimum=1),
    Param("feature_buffer_m", 3.0, "No source is added within this distance of a linear or extended feature, m.", minimum=0),
    Param("noise_nT", 0.0, "Noise standard deviation of the readings, nT; 0 takes the residual noise measured by the picking stage.",
          minimum=0),
    Param("fit_kinds", ["point", "cluster"], "Pick kinds fitted with a point dipole.", kind=list, choices=KINDS, minimum=1),
    Param("exclude_flags", list(DEFAULT_EXCLUDE), "Flags whose readings are left out of the fit.",
          kind=list, choices=tuple(FLAGS)),
)

_PICK_COLUMNS = ("pick_id", "easting_m", "northing_m", "kind")


def check_params(params: dict) -> dict:
    """Validate the ``[dipole_fit]`` table; returns every key with its value."""
    out = validate_table(PARAMS, params, "dipole_fit")
    if out["min_depth_m"] >= out["max_depth_m"]:
        raise ParameterError(
            f"dipole_fit.min_depth_m = {out['min_depth_m']} must be below dipole_fit.max_depth_m = {out['max_depth_m']}"
        )
    if any(not out["min_depth_m"] <= d <= out["max_depth_m"] for d in out["start_depths_m"]):
        raise ParameterError("dipole_fit.start_depths_m must lie between min_depth_m and max_depth_m")
    return out


def _main_field(readings) -> tuple[np.ndarray, float]:
    missing = [a for a in ("main_field_inclination_deg", "main_field_grid_declination_deg", "main_field_nT")
               if a not in readings.attrs]
    if missing:
        raise DataError(f"dipole_fit: the levelled readings lack the attribute {missing[0]!r}: run the main_field stage upstream")
    f_hat = field_unit_vector(float(readings.attrs["main_field_inclination_deg"]),
                              float(readings.attrs["main_field_grid_declination_deg"]))
    return f_hat, float(readings.attrs["main_field_nT"])


def _euler_lookup(euler) -> dict:
    if euler is None or len(euler) == 0 or "pick_id" not in euler:
        return {}
    out = {}
    for _, row in euler.iterrows():
        xyz = np.array([row.get("easting_m", np.nan), row.get("northing_m", np.nan), row.get("upward_m", np.nan)], float)
        if np.all(np.isfinite(xyz)):
            out[row["pick_id"]] = xyz
    return out


def run(data: dict, params: dict, context: StageContext) -> StageResult:
    """Fit a point dipole to the readings of every pick.

    Parameters
    ----------
    data : dict
        ``data["picking"]["picks"]`` (DataFrame: pick_id, easting_m,
        northing_m, kind), ``data["euler"]["euler"]`` (DataFrame: pick_id,
        easting_m, northing_m, upward_m; NaN where Euler failed; optional),
        ``data["levelling"]["readings"]`` (``residual``, nT; ``flags``;
        main-field attributes).
    params : dict
        The ``[dipole_fit]`` table (see :data:`PARAMS`).
    context : lodeline.model.StageContext
        Run context.

    Returns
    -------
    lodeline.model.StageResult
        ``tables["dipoles"]``, one row per pick; summary counts. No dataset
        is written and no reading is rejected.
    """
    settings = check_params(params)
    picks = data["picking"]["picks"]
    missing = [c for c in _PICK_COLUMNS if c not in picks.columns]
    if missing:
        raise DataError(f"dipole_fit: the picks table lacks the column {missing[0]!r}: check the picking stage output")
    readings = data["levelling"]["readings"]
    if "residual" not in readings:
        raise DataError("dipole_fit: the levelled readings lack the variable 'residual': run the levelling stage upstream")
    f_hat, main_nT = _main_field(readings)
    euler = _euler_lookup(data.get("euler", {}).get("euler"))
    radius = settings["radius_m"]

    ids = list(picks["pick_id"])
    kinds = [str(k) for k in picks["kind"]]
    xy = picks[["easting_m", "northing_m"]].to_numpy(float)
    fitted = np.array([k in settings["fit_kinds"] and np.all(np.isfinite(p)) for k, p in zip(kinds, xy)], bool)
    # readings out to twice the radius: a window is widened when a source is added at its edge
    sel = select_near(readings, "residual", xy[fitted], 2 * radius, flag_mask(*settings["exclude_flags"]))
    obs_all = np.column_stack([sel["easting"], sel["northing"], sel["elevation"]])
    tree = cKDTree(obs_all[:, :2]) if len(obs_all) else None
    near = [np.array(tree.query_ball_point(p, radius), dtype=np.int64) if (tree is not None and ok) else np.zeros(0, np.int64)
            for p, ok in zip(xy, fitted)]

    rows: list[dict] = []
    progress = context.progress(len(ids), "dipole fits")
    for i, pid in enumerate(ids):
        idx = near[i]
        if not fitted[i]:
            note = "not a point source" if kinds[i] not in settings["fit_kinds"] else "pick position not finite"
            rows.append(empty_row(pid, kinds[i], 0, note, main_nT))
        elif idx.size < settings["min_readings"]:
            rows.append(empty_row(pid, kinds[i], idx.size, f"too few readings ({idx.size} < {settings['min_readings']})", main_nT))
        else:
            fit, (row,) = fit_group(obs_all[idx], sel["value"][idx], f_hat, xy[i : i + 1], [euler.get(pid)], settings)
            row.update(pick_id=pid, kind=kinds[i], joint_group=-1, main_field_nT=main_nT, note="", ok=False,
                       _at_bound=fit.at_bound, _centre=xy[i].copy(), _window=idx)
            rows.append(row)
        progress.update(1)
    progress.close()

    n_joint = _joint_fits(rows, xy, fitted, near, obs_all, sel["value"], f_hat, settings)
    noise_nT, noise_source = _noise(settings, data, obs_all, sel["value"])
    domain = _add_domain(obs_all, picks, settings)
    refined = refine(rows, obs_all, sel["value"], f_hat, settings, noise_nT, domain,
                     next_pick_id=max([0, *[int(i) for i in ids]]), next_group=n_joint)
    for row in rows:
        if "_at_bound" not in row:
            continue
        row.pop("_centre", None)
        row.pop("_window", None)
        _mark(row, settings)
    table = pd.DataFrame(rows, columns=list(COLUMNS))
    for col in COLUMNS[2:]:
        if col in ("n_readings", "joint_group"):
            table[col] = table[col].astype(np.int64)
        elif col == "ok":
            table[col] = table[col].astype(bool)
        elif col != "note":
            table[col] = table[col].astype(float)
    summary = {
        "picks": len(ids),
        "fitted": int(np.isfinite(table["fit_r2"]).sum()),
        "ok": int(table["ok"].sum()),
        "joint_groups": n_joint,
        "refitted_without_neighbours": refined["refitted"],
        "sources_added": refined["added"],
        "seeds_tried": refined["seeds_tried"],
        "nuisance_dipoles": refined["nuisance"],
        "residual_sources": refined.get("residual", 0),
        "noise_nT": noise_nT,
        "noise_source": noise_source,
        "median_r2": float(np.nanmedian(table["fit_r2"])) if np.isfinite(table["fit_r2"]).any() else float("nan"),
        "readings_loaded": int(len(obs_all)),
        "chunks_read": int(sel["chunks_read"]),
        "chunks_total": int(sel["chunks_total"]),
    }
    context.log.info("dipole_fit: %(fitted)d of %(picks)d picks fitted, %(ok)d ok, %(joint_groups)d joint groups, "
                     "%(refitted_without_neighbours)d windows refitted with neighbours removed, %(sources_added)d sources "
                     "added, %(residual_sources)d found in the residual (noise %(noise_nT).3g nT, %(noise_source)s), median R^2 %(median_r2).3f; %(readings_loaded)d "
                     "readings loaded from %(chunks_read)d of %(chunks_total)d chunks", summary)
    return StageResult(tables={"dipoles": table}, summary=summary)


def _add_domain(obs, picks, settings) -> np.ndarray:
    """Readings that may seed an added source: those outside the buffer of linear and extended features."""
    domain = np.ones(len(obs), bool)
    if "geometry_wkt" in picks and domain.any():
        shapes = [shapely.from_wkt(w) for k, w in zip(picks["kind"], picks["geometry_wkt"])
                  if k in ("linear", "extended") and isinstance(w, str) and w]
        if shapes:
            features = shapely.union_all(shapes)
            where = np.flatnonzero(domain)
            far = shapely.distance(shapely.points(obs[where, 0], obs[where, 1]), features) > settings["feature_buffer_m"]
            domain[where[~far]] = False
    return domain


def _noise(settings: dict, data: dict, obs: np.ndarray, values: np.ndarray) -> tuple[float, str]:
    """Noise standard deviation, nT, and where it came from."""
    if settings["noise_nT"] > 0:
        return float(settings["noise_nT"]), "dipole_fit.noise_nT"
    meta = data.get("picking", {}).get("picking_metadata")
    if meta is not None and len(meta) and "key" in meta:
        found = meta.loc[meta["key"] == "residual_noise_nT", "value"]
        if len(found):
            value = float(found.iloc[0])
            if np.isfinite(value) and value > 0:
                return value, "picking residual noise"
    if len(values) == 0:
        return float("nan"), "none (no readings near the picks)"
    value = noise_from_readings(obs, values)
    if not (np.isfinite(value) and value > 0):
        raise DataError("dipole_fit: no noise level: the picking metadata lacks residual_noise_nT and the readings near "
                        "the picks are too few to measure it; set dipole_fit.noise_nT")
    return value, "second differences of the readings"


def _mark(row: dict, settings: dict) -> None:
    """Set ``ok`` and ``note`` of a fitted row."""
    joint = row["note"]
    r2 = row["fit_r2"]
    reasons = []
    if not np.isfinite(r2) or r2 < settings["accept_r2"]:
        reasons.append(f"poor fit (R^2 {r2:.2f} < {settings['accept_r2']:g})")
    if row.pop("_at_bound", False):
        reasons.append("position on the search bound")
    row["ok"] = not reasons
    row["note"] = "; ".join([joint] + reasons if joint else reasons) or "fitted"


def _joint_fits(rows, xy, fitted, near, obs_all, values, f_hat, settings) -> int:
    """Refit poor single fits jointly with their neighbours; returns the number of groups kept."""
    if settings["max_joint"] < 2:
        return 0
    r2 = np.array([r["fit_r2"] for r in rows], float)
    has_fit = np.isfinite(r2)
    candidates = [i for i in np.argsort(r2) if has_fit[i] and r2[i] < settings["joint_r2_below"]]
    grouped: set[int] = set()
    n_groups = 0
    for i in candidates:
        if i in grouped:
            continue
        dist = np.hypot(*(xy - xy[i]).T)
        others = [j for j in np.argsort(dist) if j != i and has_fit[j] and j not in grouped and dist[j] <= settings["radius_m"]]
        if not others:
            continue
        members = [i] + others[: settings["max_joint"] - 1]
        idx = np.unique(np.concatenate([near[j] for j in members]))
        starts = [np.array([rows[j]["easting_m"], rows[j]["northing_m"], rows[j]["elevation_m"]]) for j in members]
        one, _ = fit_group(obs_all[idx], values[idx], f_hat, xy[[i]], starts[:1], settings)
        fit, new = fit_group(obs_all[idx], values[idx], f_hat, xy[members], starts, settings)
        if not better(one, fit, len(members) - 1, settings):
            continue
        names = ", ".join(str(rows[j]["pick_id"]) for j in members)
        for m, (j, row) in enumerate(zip(members, new)):
            row.update(pick_id=rows[j]["pick_id"], kind=rows[j]["kind"], joint_group=n_groups,
                       main_field_nT=rows[j]["main_field_nT"], note=f"fitted jointly with picks {names}",
                       _at_bound=bool(fit.bound_sources[m]), _centre=xy[j].copy(), _window=idx)
            rows[j] = row
        grouped.update(members)
        n_groups += 1
    return n_groups


STAGE = Stage(
    name="dipole_fit",
    run=run,
    params=PARAMS,
    after=("euler", "picking", "levelling"),
    order=110,
    summary="Fit a point dipole (position, moment, background) to the levelled readings of each pick",
)
