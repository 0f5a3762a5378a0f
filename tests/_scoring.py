"""Score a target table against a truth table of buried items.

Used by the tests and the benchmarks; the rules are those of the project's
acceptance figures:

* Compact truth items (``point`` and ``cluster_member``) are matched one to
  one with compact targets (kinds ``point`` and ``cluster``) whose
  horizontal distance is at most ``halo_m``; the assignment minimises the
  total distance (the linear sum assignment problem solved by
  ``scipy.optimize.linear_sum_assignment``, Crouse 2016, On implementing 2D
  rectangular assignment algorithms).
* Probability of detection: matched over all compact items whose predicted
  peak anomaly is at least ``snr_min`` times the noise standard deviation.
* False alarms: compact targets matched to no item, outside
  ``cable_buffer_m`` of the linear feature and ``wreck_buffer_m`` of the
  extended one, per hectare of surveyed area.
* Horizontal error: distance of each matched pair; relative depth error:
  ``|estimated - true| / true`` of the depth below the sensor, the sensor
  elevation taken from the target row (``elevation_m +
  depth_below_sensor_m``); moment ratio: estimated over true moment.
* The linear feature is reported when a ``linear`` row's geometry lies
  within ``cable_buffer_m`` of the truth cable for at least 80 % of its
  length; the extended one when an ``extended`` row's position lies within
  ``wreck_buffer_m`` of the wreck's outline.

The buffers (3 m and 5 m) are about the width of the anomaly of a cable or
hull part at the demo's 2-4 m sensor distance (common practice, no
published source).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import shapely
from scipy.optimize import linear_sum_assignment

__all__ = ["score", "match", "SNR_BINS"]

COMPACT_TRUTH = ("point", "cluster_member")
COMPACT_TARGETS = ("point", "cluster")
SNR_BINS = ((1.0, 3.0), (3.0, 10.0), (10.0, 30.0), (30.0, np.inf))


def match(truth_xy: np.ndarray, target_xy: np.ndarray, halo_m: float) -> list[tuple[int, int, float]]:
    """One-to-one pairs (truth index, target index, distance m) within ``halo_m``, least total distance."""
    if len(truth_xy) == 0 or len(target_xy) == 0:
        return []
    d = np.hypot(truth_xy[:, None, 0] - target_xy[None, :, 0], truth_xy[:, None, 1] - target_xy[None, :, 1])
    big = 1e6
    cost = np.where(d <= halo_m, d, big)
    rows, cols = linear_sum_assignment(cost)
    return [(int(r), int(c), float(d[r, c])) for r, c in zip(rows, cols) if d[r, c] <= halo_m]


def _features(truth: pd.DataFrame):
    cable = truth[truth["kind"] == "linear_segment"]
    wreck = truth[truth["kind"] == "extended_part"]
    cable_line = None
    if len(cable):
        # the cable's segments in order along its length (the truth lists them in order, per group)
        cable_line = shapely.MultiLineString([
            list(zip(g["easting_m"], g["northing_m"])) for _, g in cable.groupby("group", sort=False) if len(g) > 1
        ])
    wreck_hull = shapely.MultiPoint(list(zip(wreck["easting_m"], wreck["northing_m"]))).convex_hull if len(wreck) else None
    return cable_line, wreck_hull


def score(
    targets: pd.DataFrame,
    truth: pd.DataFrame,
    noise_nT: float,
    area_ha: float,
    halo_m: float = 1.0,
    snr_min: float = 10.0,
    cable_buffer_m: float = 3.0,
    wreck_buffer_m: float = 5.0,
) -> dict:
    """Detection figures of a target table against the truth.

    Parameters
    ----------
    targets : pandas.DataFrame
        Columns ``kind``, ``easting_m``, ``northing_m`` and, where known,
        ``elevation_m``, ``depth_below_sensor_m``, ``moment_Am2``,
        ``geometry_wkt``.
    truth : pandas.DataFrame
        The demo generator's truth table.
    noise_nT : float
        Standard deviation of the sensor noise, nT.
    area_ha : float
        Surveyed area, hectares.

    Returns
    -------
    dict
        ``pd``, ``n_eligible``, ``n_detected``, ``false_alarms``,
        ``false_alarms_per_ha``, ``median_horizontal_error_m``,
        ``median_relative_depth_error``, ``moment_within_2x``,
        ``linear_reported``, ``extended_reported``, ``pd_by_snr`` (dict of
        bin label to (detected, items)), ``pairs`` (DataFrame of matches).
    """
    compact = truth[truth["kind"].isin(COMPACT_TRUTH)].reset_index(drop=True)
    cand = targets[targets["kind"].isin(COMPACT_TARGETS)].reset_index(drop=True)
    cand = cand[np.isfinite(cand["easting_m"]) & np.isfinite(cand["northing_m"])].reset_index(drop=True)
    pairs = match(compact[["easting_m", "northing_m"]].to_numpy(float), cand[["easting_m", "northing_m"]].to_numpy(float), halo_m)
    matched_truth = {p[0] for p in pairs}
    matched_target = {p[1] for p in pairs}
    snr = compact["predicted_peak_nT"].to_numpy(float) / noise_nT
    eligible = snr >= snr_min
    n_eligible = int(eligible.sum())
    n_detected = int(sum(1 for i in matched_truth if eligible[i]))

    cable_line, wreck_hull = _features(truth)
    fa = 0
    for j in range(len(cand)):
        if j in matched_target:
            continue
        p = shapely.Point(cand.loc[j, "easting_m"], cand.loc[j, "northing_m"])
        if cable_line is not None and p.distance(cable_line) <= cable_buffer_m:
            continue
        if wreck_hull is not None and p.distance(wreck_hull) <= wreck_buffer_m:
            continue
        fa += 1

    rows = []
    for i, j, dist in pairs:
        t, c = compact.loc[i], cand.loc[j]
        depth_est = c.get("depth_below_sensor_m", np.nan)
        sensor_elev = c.get("elevation_m", np.nan) + depth_est
        depth_true = sensor_elev - t["elevation_m"]
        rows.append({
            "item_id": t["item_id"], "truth_kind": t["kind"], "target_kind": c["kind"], "snr": snr[i], "eligible": bool(eligible[i]),
            "horizontal_error_m": dist, "depth_true_m": depth_true, "depth_est_m": depth_est,
            "relative_depth_error": abs(depth_est - depth_true) / depth_true if np.isfinite(depth_true) and depth_true > 0 else np.nan,
            "moment_true_Am2": t["moment_Am2"], "moment_est_Am2": c.get("moment_Am2", np.nan),
        })
    pairs_df = pd.DataFrame(rows, columns=["item_id", "truth_kind", "target_kind", "snr", "eligible", "horizontal_error_m",
                                           "depth_true_m", "depth_est_m", "relative_depth_error", "moment_true_Am2", "moment_est_Am2"])
    good = pairs_df[pairs_df["eligible"]]
    ratio = good["moment_est_Am2"] / good["moment_true_Am2"]
    isolated = good["truth_kind"] == "point"
    within = ((ratio >= 0.5) & (ratio <= 2.0))[isolated]

    linear_ok = False
    extended_ok = False
    for _, row in targets.iterrows():
        if row["kind"] == "linear" and cable_line is not None and isinstance(row.get("geometry_wkt"), str) and row["geometry_wkt"]:
            g = shapely.from_wkt(row["geometry_wkt"])
            inside = g.intersection(cable_line.buffer(cable_buffer_m)).length
            linear_ok |= g.length > 0 and inside / g.length >= 0.8
        if row["kind"] == "extended" and wreck_hull is not None:
            extended_ok |= shapely.Point(row["easting_m"], row["northing_m"]).distance(wreck_hull) <= wreck_buffer_m

    by_bin = {}
    for lo, hi in SNR_BINS:
        inside = (snr >= lo) & (snr < hi)
        label = f"{lo:g}-{hi:g}" if np.isfinite(hi) else f">{lo:g}"
        by_bin[label] = (int(sum(1 for i in matched_truth if inside[i])), int(inside.sum()))

    return {
        "pd": n_detected / n_eligible if n_eligible else float("nan"),
        "n_eligible": n_eligible,
        "n_detected": n_detected,
        "false_alarms": fa,
        "false_alarms_per_ha": fa / area_ha,
        "median_horizontal_error_m": float(good["horizontal_error_m"].median()) if len(good) else float("nan"),
        "median_relative_depth_error": float(good["relative_depth_error"].median()) if len(good) else float("nan"),
        "moment_within_2x": float(within.mean()) if len(within) else float("nan"),
        "n_isolated_detected": int(isolated.sum()),
        "linear_reported": bool(linear_ok),
        "extended_reported": bool(extended_ok),
        "pd_by_snr": by_bin,
        "pairs": pairs_df,
    }
