"""Reacquisition plan: a search radius per target and a short visiting order.

Search radius
    The target's horizontal position error (``position_sigma_m`` of the
    target table, the radial RMS error ``sqrt(sigma_e^2 + sigma_n^2)``, 1
    sigma) and the reacquisition platform's positioning error
    (``platform_position_error_m``, also a 1-sigma radial RMS error) are
    independent, so they add in quadrature:
    ``combined = sqrt(position_sigma^2 + platform^2)``. The search radius is
    ``coverage_sigma x combined``, at least ``min_radius_m``; a feature with
    an outline (``geometry_wkt``: a linear or extended target) adds the
    greatest distance from its waypoint to the outline. Under a circular
    normal error the circle of radius ``R`` holds the position with
    probability ``1 - exp(-R^2 / combined^2)`` (the Rayleigh distribution;
    Papoulis and Pillai 2002, ch. 6), written as
    ``containment_probability``: for ``coverage_sigma = 2`` (the "2 drms"
    of navigation) that is 98.2 %; an elongated error ellipse holds less,
    down to 95.4 % (one axis only).

Visiting order
    Nearest neighbour from the start, then 2-opt moves, as an open path
    (:mod:`lodeline.steps._reacquisition_route`; Rosenkrantz et al. 1977,
    Croes 1958). The start is the first-ranked target included, or the
    position ``start_easting_m``, ``start_northing_m``. The summary compares
    the route's length with the targets visited in rank order from the same
    start. Distances are grid distances in the survey's projected CRS.

Files (:mod:`lodeline.steps._reacquisition_files`): the table
``reacquisition_plan`` (CSV), ``reacquisition_plan.geojson`` (waypoints,
search circles and the route; RFC 7946) and ``reacquisition_plan.gpx``
(GPX 1.1 waypoints and a route). Targets left out (kind, score, rank limit,
no position) are listed in ``reacquisition_left_out`` with the reason.

The plan supports, and never replaces, the judgement of qualified
specialists; local regulations and licensed practice govern any
reacquisition.

References
----------
Croes, G. A. (1958). A method for solving traveling-salesman problems.
    Operations Research 6(6), 791-812. [Croes1958]_
Papoulis, A., and Pillai, S. U. (2002). Probability, Random Variables and
    Stochastic Processes, 4th ed. McGraw-Hill. [Papoulis2002]_ (the
    Rayleigh distribution; cited from memory)
Rosenkrantz, D. J., Stearns, R. E., and Lewis, P. M. (1977). An analysis
    of several heuristics for the traveling salesman problem. SIAM Journal
    on Computing 6(3), 563-581. [Rosenkrantz1977]_
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import shapely
from pyproj import CRS, Transformer

from lodeline.model import DataError, Stage, StageContext, StageResult
from lodeline.params import Param, ParameterError, validate_table

from ._reacquisition_files import write_plan_geojson, write_plan_gpx
from ._reacquisition_route import leg_lengths, plan_order

__all__ = ["PARAMS", "STAGE", "run", "check_params", "search_radius", "containment_probability", "CAUTION"]

KINDS = ("point", "cluster", "linear", "extended")

CAUTION = ("This plan supports, and never replaces, the judgement of qualified specialists. A target list is no "
           "clearance certificate: items can be missed, mislocated or misjudged. Local regulations and licensed "
           "practice govern any reacquisition, investigation or disposal.")

PARAMS = (
    Param("platform_position_error_m", 1.0,
          "Positioning error of the reacquisition platform, 1 sigma as a radial RMS error (drms), m.",
          minimum=0),
    Param("coverage_sigma", 2.0, "Search radius as a multiple of the combined 1-sigma radial error (2 = '2 drms').",
          minimum=0, exclusive_minimum=True, maximum=10),
    Param("min_radius_m", 1.0, "Smallest search radius, m.", minimum=0),
    Param("default_position_sigma_m", 1.0,
          "Target position error (1 sigma, radial RMS) used where the target table gives none, m.",
          minimum=0),
    Param("kinds", ["point", "cluster", "extended"], "Target kinds visited (linear features are mapped, not visited).",
          kind=list, choices=KINDS, minimum=1),
    Param("max_targets", None, "Visit at most this many targets, the best ranked first; default all.",
          kind=int, minimum=1, optional=True),
    Param("min_score", None, "Visit only targets of at least this score; default no limit.", optional=True),
    Param("start_easting_m", None, "Easting of the start of the route, m (survey CRS); default the first-ranked target.",
          optional=True),
    Param("start_northing_m", None, "Northing of the start of the route, m (survey CRS); give it with start_easting_m.",
          optional=True),
)

_REQUIRED = ("target_id", "rank", "kind", "easting_m", "northing_m")
_PLAN_COLUMNS = (
    "visit", "target_id", "rank", "kind", "score", "easting_m", "northing_m", "longitude", "latitude",
    "position_sigma_m", "combined_sigma_m", "outline_reach_m", "search_radius_m", "containment_probability",
    "leg_m", "cumulative_m",
)


def check_params(params: dict) -> dict:
    """Validate the ``[reacquisition]`` table; returns every key with its value."""
    out = validate_table(PARAMS, params, "reacquisition")
    if (out["start_easting_m"] is None) != (out["start_northing_m"] is None):
        raise ParameterError("reacquisition.start_easting_m and reacquisition.start_northing_m go together: give both or neither")
    return out


def containment_probability(radius_m, combined_sigma_m):
    """Probability that a circle of ``radius_m`` holds a position of circular normal error.

    ``combined_sigma_m`` is the radial RMS error (``sqrt(2)`` times the
    per-axis sigma); the radial error then follows a Rayleigh distribution
    and ``P(r <= R) = 1 - exp(-R^2 / combined^2)``. 1 where the error is 0.
    """
    r = np.asarray(radius_m, float)
    s = np.asarray(combined_sigma_m, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        p = 1.0 - np.exp(-(r * r) / (s * s))
    return np.where(s > 0, p, 1.0)


def search_radius(position_sigma_m, settings: dict, outline_reach_m=0.0) -> tuple[np.ndarray, np.ndarray]:
    """Combined 1-sigma radial error and search radius of each target, m.

    Parameters
    ----------
    position_sigma_m : array of float
        Target position errors (1 sigma, radial RMS), m; NaN takes
        ``default_position_sigma_m``.
    settings : dict
        Validated ``[reacquisition]`` table.
    outline_reach_m : array of float
        Greatest distance from each waypoint to its outline, m (0 for points).

    Returns
    -------
    combined_sigma_m, search_radius_m : ndarray
    """
    sigma = np.asarray(position_sigma_m, float)
    sigma = np.where(np.isfinite(sigma), sigma, settings["default_position_sigma_m"])
    combined = np.hypot(sigma, settings["platform_position_error_m"])
    reach = np.broadcast_to(np.asarray(outline_reach_m, float), combined.shape)
    radius = np.maximum(settings["coverage_sigma"] * combined + reach, settings["min_radius_m"])
    return combined, radius


def _outline_reach(table: pd.DataFrame, xy: np.ndarray) -> np.ndarray:
    """Greatest distance from each waypoint to the vertices of its ``geometry_wkt`` outline, m."""
    reach = np.zeros(len(table))
    if "geometry_wkt" not in table.columns:
        return reach
    for i, (text, target) in enumerate(zip(table["geometry_wkt"], table["target_id"])):
        if not isinstance(text, str) or not text.strip():
            continue
        try:
            geom = shapely.from_wkt(text)
        except shapely.errors.GEOSException as err:
            raise DataError(f"reacquisition: target {target}: geometry_wkt is not valid WKT ({err}): check the ranking output") from None
        coords = shapely.get_coordinates(geom)
        if len(coords):
            reach[i] = float(np.max(np.hypot(coords[:, 0] - xy[i, 0], coords[:, 1] - xy[i, 1])))
    return reach


def select_targets(targets: pd.DataFrame, settings: dict) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The targets to visit, in rank order, and those left out with the reason.

    Returns
    -------
    kept : pandas.DataFrame
    left_out : pandas.DataFrame
        ``target_id``, ``rank``, ``kind``, ``reason``.
    """
    missing = [c for c in _REQUIRED if c not in targets.columns]
    if missing:
        raise DataError(f"reacquisition: the target table (ranking/targets.csv) lacks the column {missing[0]!r}: "
                        "check the ranking stage output")
    if settings["min_score"] is not None and "score" not in targets.columns:
        raise DataError("reacquisition: reacquisition.min_score is set but the target table has no 'score' column")
    table = targets.sort_values("rank", kind="stable").reset_index(drop=True)
    reason = pd.Series("", index=table.index, dtype=object)
    xy = table[["easting_m", "northing_m"]].to_numpy(float)
    reason[~np.isfinite(xy).all(axis=1)] = "no position"
    reason[(reason == "") & ~table["kind"].astype(str).isin(settings["kinds"])] = "kind not visited (reacquisition.kinds)"
    if settings["min_score"] is not None:
        low = ~(table["score"].to_numpy(float) >= settings["min_score"])
        reason[(reason == "") & low] = f"score below reacquisition.min_score = {settings['min_score']:g}"
    if settings["max_targets"] is not None:
        beyond = (reason == "").cumsum() > settings["max_targets"]
        reason[(reason == "") & beyond] = f"beyond reacquisition.max_targets = {settings['max_targets']}"
    keep = reason == ""
    left = table.loc[~keep, ["target_id", "rank", "kind"]].assign(reason=reason[~keep]).reset_index(drop=True)
    return table.loc[keep].reset_index(drop=True), left


def run(data: dict, params: dict, context: StageContext) -> StageResult:
    """Plan the visit of the ranked targets.

    Parameters
    ----------
    data : dict
        ``data["ranking"]["targets"]``: the target table (``target_id``,
        ``rank``, ``kind``, ``easting_m``, ``northing_m`` in m;
        ``position_sigma_m``, m; ``score``; ``geometry_wkt``).
    params : dict
        The ``[reacquisition]`` table (see :data:`PARAMS`).
    context : lodeline.model.StageContext
        Run context (survey CRS, scratch folder, lineage).

    Returns
    -------
    lodeline.model.StageResult
        Tables ``reacquisition_plan`` and ``reacquisition_left_out``; files
        ``reacquisition_plan.geojson`` and ``reacquisition_plan.gpx``;
        summary with the route length against the rank order.
    """
    settings = check_params(params)
    targets = data["ranking"]["targets"]
    kept, left_out = select_targets(targets, settings)
    crs_wkt = context.survey.get("crs_wkt") or context.survey["crs"]
    xy = kept[["easting_m", "northing_m"]].to_numpy(float)
    given_start = settings["start_easting_m"] is not None
    nodes = np.vstack([[[settings["start_easting_m"], settings["start_northing_m"]]], xy]) if given_start else xy
    route = plan_order(nodes, 0) if len(nodes) else {"order": np.zeros(0, np.int64), "length_m": 0.0,
                                                     "nearest_neighbour_m": 0.0, "given_order_m": 0.0, "moves": 0}
    order = route["order"]
    target_order = order[1:] - 1 if given_start else order
    legs = np.concatenate([[0.0], leg_lengths(nodes, order)])
    target_legs = legs[1:] if given_start else legs

    plan = kept.iloc[target_order].reset_index(drop=True)
    pxy = plan[["easting_m", "northing_m"]].to_numpy(float)
    sigma = plan["position_sigma_m"].to_numpy(float) if "position_sigma_m" in plan else np.full(len(plan), np.nan)
    reach = _outline_reach(plan, pxy)
    combined, radius = search_radius(sigma, settings, reach)
    to_lonlat = Transformer.from_crs(CRS.from_user_input(crs_wkt), CRS.from_epsg(4326), always_xy=True)
    lon, lat = to_lonlat.transform(pxy[:, 0], pxy[:, 1]) if len(pxy) else (np.zeros(0), np.zeros(0))
    out = pd.DataFrame({
        "visit": np.arange(1, len(plan) + 1, dtype=np.int64),
        "target_id": plan["target_id"].astype(str).to_numpy(),
        "rank": plan["rank"].to_numpy(),
        "kind": plan["kind"].astype(str).to_numpy(),
        "score": plan["score"].to_numpy(float) if "score" in plan else np.nan,
        "easting_m": pxy[:, 0], "northing_m": pxy[:, 1],
        "longitude": np.asarray(lon, float), "latitude": np.asarray(lat, float),
        "position_sigma_m": np.where(np.isfinite(sigma), sigma, np.nan),
        "combined_sigma_m": combined, "outline_reach_m": reach, "search_radius_m": radius,
        "containment_probability": containment_probability(radius - reach, combined),
        "leg_m": target_legs, "cumulative_m": np.cumsum(target_legs),
    }, columns=list(_PLAN_COLUMNS))

    route_xy = nodes[order] if len(order) else np.zeros((0, 2))
    route_names = (["start"] if given_start else []) + list(out["target_id"])
    summary = {
        "waypoints": int(len(out)),
        "left_out": int(len(left_out)),
        "route_m": float(route["length_m"]),
        "rank_order_m": float(route["given_order_m"]),
        "nearest_neighbour_m": float(route["nearest_neighbour_m"]),
        "saving_fraction": float(1.0 - route["length_m"] / route["given_order_m"]) if route["given_order_m"] > 0 else 0.0,
        "two_opt_moves": int(route["moves"]),
        "start": "given position" if given_start else (str(out["target_id"].iloc[0]) if len(out) else ""),
        "median_search_radius_m": float(np.median(radius)) if len(radius) else float("nan"),
        "max_search_radius_m": float(np.max(radius)) if len(radius) else float("nan"),
    }
    for reason_text, count in left_out["reason"].value_counts().items():
        context.log.info("reacquisition: %d target(s) left out: %s", count, reason_text)
    context.log.info("reacquisition: %(waypoints)d waypoints, route %(route_m).1f m against %(rank_order_m).1f m in "
                     "rank order (nearest neighbour %(nearest_neighbour_m).1f m, %(two_opt_moves)d 2-opt moves)", summary)

    files = {}
    if len(out):
        meta = {"name": "lodeline reacquisition plan", "caution": CAUTION, "lodeline": dict(context.lineage),
                "route_m": summary["route_m"], "rank_order_m": summary["rank_order_m"]}
        files["geojson"] = write_plan_geojson(context.scratch / "reacquisition_plan.geojson", out, route_xy, crs_wkt, meta)
        rlon, rlat = to_lonlat.transform(route_xy[:, 0], route_xy[:, 1])
        desc = [f"visit {v}, rank {r}, {k}, search radius {s:.1f} m" for v, r, k, s in
                zip(out["visit"], out["rank"], out["kind"], out["search_radius_m"])]
        lineage = context.lineage or {}
        files["gpx"] = write_plan_gpx(
            context.scratch / "reacquisition_plan.gpx", out["longitude"], out["latitude"], out["target_id"], desc,
            list(zip(np.asarray(rlon, float), np.asarray(rlat, float))), route_names,
            title=f"{context.survey.get('name', 'survey')}: reacquisition plan",
            description=f"{CAUTION} Made by lodeline {lineage.get('lodeline_version', '')}, configuration "
                        f"{str(lineage.get('config_hash', ''))[:16]}.",
        )
    return StageResult(tables={"reacquisition_plan": out, "reacquisition_left_out": left_out}, files=files,
                       summary=summary)


STAGE = Stage(
    name="reacquisition",
    run=run,
    params=PARAMS,
    after=("ranking",),
    order=140,
    summary="Search radius per target and a short visiting order (nearest neighbour, 2-opt); CSV, GeoJSON, GPX",
)
