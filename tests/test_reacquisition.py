"""Tests of the reacquisition plan (search radius, visiting order, files).

Outside references named beside each check: exhaustive search over every
order of 8 points (a reference computation of the shortest open path);
the circle, whose shortest open path through its points in convex
position follows the circumference (elementary geometry); the Rayleigh
distribution of ``scipy.stats`` and a Monte Carlo simulation for the
containment probability; GDAL's GPX and GeoJSON drivers (through pyogrio)
as independent readers of the files; pyproj's geodesic on the WGS 84
ellipsoid and the UTM scale factor 0.9996 (Snyder 1987, Map Projections: A
Working Manual, p. 57) for the route length.
"""

from __future__ import annotations

import itertools
import logging

import numpy as np
import pandas as pd
import pytest
from pyogrio.raw import read
from pyproj import CRS, Geod, Transformer
from scipy.stats import rayleigh

from lodeline.model import DataError, StageContext
from lodeline.params import ParameterError, validate_table
from lodeline.progress import make_progress
from lodeline.steps import reacquisition as stage
from lodeline.steps._reacquisition_route import MIN_GAIN_M, nearest_neighbour, path_length, plan_order, two_opt

CRS_WKT = CRS.from_epsg(32631).to_wkt()
E0, N0 = 493_700.0, 5_994_800.0   # an invented site near 2.9 E, 54.1 N (UTM zone 31N)


def targets(n=12, seed=3, **extra):
    """A target table of the ranking stage's shape (hand-made: the columns the contract names)."""
    rng = np.random.default_rng(seed)
    kinds = np.array(["point", "cluster", "point", "extended", "linear", "point"] * n)[:n]
    table = pd.DataFrame({
        "target_id": [f"T{i:04d}" for i in range(1, n + 1)], "rank": np.arange(1, n + 1),
        "score": np.linspace(1.0, 0.1, n), "kind": kinds,
        "easting_m": E0 + rng.uniform(-200, 200, n), "northing_m": N0 + rng.uniform(-150, 150, n),
        "longitude": np.nan, "latitude": np.nan, "elevation_m": -13.0, "depth_below_sensor_m": 3.0,
        "burial_m": 0.5, "structural_index": 3.0, "moment_Am2": 2.0, "moment_inclination_deg": 68.0,
        "moment_declination_deg": 2.0, "remanence_angle_deg": 5.0, "peak_anomaly_nT": 20.0,
        "peak_gradient_nT_per_m": 10.0, "snr": 40.0, "fit_r2": 0.95, "position_sigma_m": rng.uniform(0.05, 1.5, n),
        "depth_sigma_m": 0.1, "mass_min_kg": 1.0, "mass_max_kg": 30.0, "fit_rms_nT": 0.2, "pick_id": np.arange(n),
        "status": "fitted", "geometry_wkt": "",
    })
    for i in np.flatnonzero(kinds == "extended"):
        x, y = table.loc[i, ["easting_m", "northing_m"]]
        table.loc[i, "geometry_wkt"] = f"POLYGON (({x - 3} {y - 4}, {x + 3} {y - 4}, {x + 3} {y + 4}, {x - 3} {y + 4}, {x - 3} {y - 4}))"
        table.loc[i, "position_sigma_m"] = np.nan
    for key, value in extra.items():
        table[key] = value
    return table


def context(tmp_path, name="Invented survey"):
    return StageContext(survey={"crs": "EPSG:32631", "crs_wkt": CRS_WKT, "name": name}, inputs={}, scratch=tmp_path,
                        log=logging.getLogger("test"), progress=make_progress(False),
                        lineage={"lodeline_version": "0.0.test", "config_hash": "c0ffee", "stages": {"ranking": "k"}})


def plan(tmp_path, table, **params):
    return stage.run({"ranking": {"targets": table}}, params, context(tmp_path))


def exhaustive_shortest(xy):
    """Shortest open path from point 0 by trying every order (reference computation)."""
    return min(path_length(xy, (0,) + p) for p in itertools.permutations(range(1, len(xy))))


# ---------------------------------------------------------------------------
# Visiting order
# ---------------------------------------------------------------------------
def test_two_opt_untangles_any_order_of_points_on_a_circle():
    # 20 points evenly on a circle (convex position): the shortest open path from point 0 runs round the
    # circumference, 19 chords of 2 r sin(pi / 20) (elementary geometry). From 50 random starting orders 2-opt
    # must reach it; 1e-6 m allows for rounding only (other orders are longer by whole chords, metres here)
    n, r = 20, 60.0
    theta = 2 * np.pi * np.arange(n) / n
    xy = np.column_stack([E0 + r * np.cos(theta), N0 + r * np.sin(theta)])
    shortest = (n - 1) * 2 * r * np.sin(np.pi / n)
    rng = np.random.default_rng(11)
    for _ in range(50):
        start = np.concatenate([[0], rng.permutation(np.arange(1, n))])
        order, moves = two_opt(xy, start)
        assert order[0] == 0 and sorted(order) == list(range(n))
        assert path_length(xy, order) == pytest.approx(shortest, abs=1e-6)
        assert moves > 0


def test_route_against_exhaustive_search_of_eight_points():
    # Reference: the shortest open path from point 0 over all 7! orders. 2-opt gives a local optimum, not the
    # optimum: never shorter than it (1e-9 m: rounding), never longer than the nearest-neighbour start, no single
    # reversal left that gains more than MIN_GAIN_M (checked by trying all of them), and on average within 5 %
    # of the optimum: Johnson and McGeoch (1997, cited from memory) give about 5 % above optimal for 2-opt on
    # random uniform instances of any size, small ones faring better.
    rng = np.random.default_rng(2024)
    excess = []
    for _ in range(40):
        xy = rng.uniform(0, 300, (8, 2))
        best = exhaustive_shortest(xy)
        result = plan_order(xy, 0)
        order = result["order"]
        assert result["length_m"] >= best - 1e-9
        assert result["length_m"] <= result["nearest_neighbour_m"] + 1e-9
        assert result["nearest_neighbour_m"] == pytest.approx(path_length(xy, nearest_neighbour(xy, 0)))
        for i in range(1, 7):
            for j in range(i + 1, 8):
                trial = order.copy()
                trial[i : j + 1] = trial[i : j + 1][::-1]
                assert path_length(xy, trial) > result["length_m"] - MIN_GAIN_M
        excess.append(result["length_m"] / best - 1)
    assert np.mean(excess) < 0.05


def test_nearest_neighbour_on_a_line_goes_to_the_closer_side_first():
    # points at 0, 1, -2, 5 m along a line, from 0: 1 (closer than -2), then -2 (3 m) rather than 5 (4 m), then 5
    xy = np.array([[0.0, 0.0], [1.0, 0.0], [-2.0, 0.0], [5.0, 0.0]])
    assert list(nearest_neighbour(xy, 0)) == [0, 1, 2, 3]
    assert path_length(xy, [0, 1, 2, 3]) == pytest.approx(1 + 3 + 7)


# ---------------------------------------------------------------------------
# Search radius
# ---------------------------------------------------------------------------
def test_search_radius_adds_errors_in_quadrature_with_a_floor():
    settings = validate_table(stage.PARAMS, {"platform_position_error_m": 4.0, "coverage_sigma": 2.0,
                                             "min_radius_m": 3.0, "default_position_sigma_m": 0.0}, "reacquisition")
    combined, radius = stage.search_radius([3.0, np.nan, 0.0], settings)
    # 3-4-5 triangle; NaN takes the default (0): the platform alone
    assert combined == pytest.approx([5.0, 4.0, 4.0], abs=1e-12)
    assert radius == pytest.approx([10.0, 8.0, 8.0], abs=1e-12)
    settings["platform_position_error_m"] = 0.0
    _, radius = stage.search_radius([0.5], settings, outline_reach_m=[0.0])
    assert radius == pytest.approx([3.0])     # 2 x 0.5 = 1 m is below the 3 m floor


def test_containment_probability_is_the_rayleigh_distribution():
    # scipy.stats.rayleigh with the per-axis sigma (radial RMS / sqrt 2) is the reference, to 1e-12 (rounding)
    radius = np.array([0.5, 1.0, 2.0, 3.5])
    drms = 1.3
    assert stage.containment_probability(radius, drms) == pytest.approx(rayleigh.cdf(radius, scale=drms / np.sqrt(2)), abs=1e-12)
    # "2 drms" holds 1 - exp(-4) = 98.17 % of a circular error
    assert float(stage.containment_probability(2.0, 1.0)) == pytest.approx(1 - np.exp(-4), abs=1e-12)


def test_two_drms_holds_between_95_4_and_98_2_percent_of_any_error_ellipse():
    # Monte Carlo check of the docstring's claim: 400,000 positions per ellipse give a standard error of about
    # 0.0003 on a probability near 0.97, so 0.002 is six standard errors. The one-axis end is the normal
    # distribution's 2-sigma probability, 0.9545 (Abramowitz and Stegun 1964, table 26.1).
    rng = np.random.default_rng(5)
    for ratio in (0.0, 0.3, 0.6, 1.0):
        a = 1 / np.sqrt(1 + ratio**2)
        x, y = rng.normal(0, a, 400_000), rng.normal(0, ratio * a, 400_000)
        p = np.mean(np.hypot(x, y) <= 2.0)
        assert 0.9545 - 0.002 < p < 1 - np.exp(-4) + 0.002


# ---------------------------------------------------------------------------
# The stage
# ---------------------------------------------------------------------------
def test_plan_visits_every_selected_target_once_and_beats_rank_order(tmp_path):
    table = targets(30)
    result = plan(tmp_path, table)
    out, left = result.tables["reacquisition_plan"], result.tables["reacquisition_left_out"]
    visited = table[table["kind"] != "linear"]
    assert sorted(out["target_id"]) == sorted(visited["target_id"])
    assert list(left["target_id"]) == list(table.loc[table["kind"] == "linear", "target_id"])
    assert set(left["reason"]) == {"kind not visited (reacquisition.kinds)"}
    assert out["target_id"].iloc[0] == "T0001"            # the first-ranked target starts the route
    assert list(out["visit"]) == list(range(1, len(out) + 1))
    # legs and totals, recomputed here from the table's own coordinates
    xy = out[["easting_m", "northing_m"]].to_numpy()
    legs = np.concatenate([[0], np.hypot(*np.diff(xy, axis=0).T)])
    assert out["leg_m"].to_numpy() == pytest.approx(legs, abs=1e-9)
    assert result.summary["route_m"] == pytest.approx(legs.sum(), abs=1e-9)
    ranked = visited.sort_values("rank")[["easting_m", "northing_m"]].to_numpy()
    assert result.summary["rank_order_m"] == pytest.approx(np.hypot(*np.diff(ranked, axis=0).T).sum(), abs=1e-9)
    assert result.summary["route_m"] < result.summary["rank_order_m"]
    # longitude, latitude from pyproj (to 1e-9 degree: the same transformation)
    lon, lat = Transformer.from_crs(CRS_WKT, "EPSG:4326", always_xy=True).transform(xy[:, 0], xy[:, 1])
    assert out["longitude"].to_numpy() == pytest.approx(lon, abs=1e-9)
    assert out["latitude"].to_numpy() == pytest.approx(lat, abs=1e-9)


def test_extended_targets_search_their_whole_outline(tmp_path):
    table = targets(12)
    out = plan(tmp_path, table, platform_position_error_m=0.5, default_position_sigma_m=1.0).tables["reacquisition_plan"]
    ext = out[out["kind"] == "extended"].iloc[0]
    # 6 m x 8 m rectangle about the waypoint: the farthest corner is 5 m away; 2 x sqrt(1 + 0.25) beyond it
    assert ext["outline_reach_m"] == pytest.approx(5.0, abs=1e-9)
    assert ext["search_radius_m"] == pytest.approx(5.0 + 2 * np.sqrt(1.25), abs=1e-9)
    assert ext["containment_probability"] == pytest.approx(1 - np.exp(-4), abs=1e-9)


def test_selection_by_score_rank_limit_and_given_start(tmp_path):
    table = targets(20)
    result = plan(tmp_path, table, min_score=0.5, max_targets=4, kinds=["point", "cluster", "extended", "linear"],
                  start_easting_m=E0 - 500.0, start_northing_m=N0)
    out, left = result.tables["reacquisition_plan"], result.tables["reacquisition_left_out"]
    assert sorted(out["target_id"]) == ["T0001", "T0002", "T0003", "T0004"]
    reasons = dict(zip(left["target_id"], left["reason"]))
    assert reasons["T0005"].startswith("beyond reacquisition.max_targets")
    assert reasons["T0020"].startswith("score below reacquisition.min_score")
    first = out.iloc[0]
    assert first["leg_m"] == pytest.approx(np.hypot(first["easting_m"] - (E0 - 500), first["northing_m"] - N0), abs=1e-9)
    assert result.summary["start"] == "given position"


def test_files_read_back_with_gdal_and_route_length_matches_the_geodesic(tmp_path):
    table = targets(15)
    table.loc[0, "target_id"] = 'T<&>"1'                   # a hostile string from an input file
    result = plan(tmp_path, table)
    out = result.tables["reacquisition_plan"]
    gpx = result.files["gpx"]
    meta, _, geom, fields = read(gpx, layer="waypoints")
    names = list(fields[list(meta["fields"]).index("name")])
    assert names == list(out["target_id"])                 # escaped on writing, read back unchanged
    meta, _, geom, fields = read(gpx, layer="route_points")
    assert list(fields[list(meta["fields"]).index("name")]) == list(out["target_id"])
    import shapely

    pts = shapely.get_coordinates(shapely.from_wkb(geom))
    assert pts[:, 0] == pytest.approx(out["longitude"].to_numpy(), abs=1e-8)   # 8 decimals written
    assert pts[:, 1] == pytest.approx(out["latitude"].to_numpy(), abs=1e-8)
    # grid distance over geodesic distance: the UTM scale factor, 0.9996 on the central meridian (3 E) and
    # 1 + 1.2e-6 above that 0.1 degree away (Snyder 1987, p. 57); 1e-5 covers the site's 500 m extent
    ground = Geod(ellps="WGS84").line_length(pts[:, 0], pts[:, 1])
    assert result.summary["route_m"] / ground == pytest.approx(0.9996, abs=1e-5)
    meta, _, geom, fields = read(result.files["geojson"])
    kinds = list(fields[list(meta["fields"]).index("feature")])
    assert kinds.count("waypoint") == kinds.count("search_area") == len(out) and kinds.count("route") == 1
    route = shapely.from_wkb(geom[kinds.index("route")])
    assert route.geom_type == "LineString" and len(route.coords) == len(out)
    text = gpx.read_text()
    assert "never replaces" in text and "clearance certificate" in text and "regulations" in text


def test_bad_input_gets_a_clear_error(tmp_path):
    with pytest.raises(DataError, match="lacks the column 'rank'"):
        plan(tmp_path, targets(5).drop(columns="rank"))
    with pytest.raises(ParameterError, match="give both or neither"):
        plan(tmp_path, targets(5), start_easting_m=E0)
    with pytest.raises(ParameterError, match="reacquisition.coverage_sigma"):
        plan(tmp_path, targets(5), coverage_sigma=0)
    bad = targets(5)
    bad.loc[3, "geometry_wkt"] = "POLYGON ((1 2, 3"
    with pytest.raises(DataError, match="T0004: geometry_wkt is not valid WKT"):
        plan(tmp_path, bad)


def test_targets_without_position_are_listed_not_dropped(tmp_path):
    table = targets(6)
    table.loc[2, ["easting_m", "northing_m"]] = np.nan
    left = plan(tmp_path, table).tables["reacquisition_left_out"]
    assert dict(zip(left["target_id"], left["reason"]))["T0003"] == "no position"
