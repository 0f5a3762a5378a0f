"""The ranking stage: score and rank, merging of duplicate fits, seed checks,
the peak anomaly of a fitted dipole, and the deliverable files read back by
GIS libraries (pyogrio for the GeoPackage, json for the GeoJSON)."""

from __future__ import annotations

import json
import logging
import math

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from pyproj import CRS

from lodeline.model import StageContext
from lodeline.params import ParameterError
from lodeline.progress import make_progress
from lodeline.steps import ranking
from lodeline.steps._dipole_model import design, field_unit_vector
from lodeline.steps._ranking_seeds import check_seeds

CRS_WKT = CRS.from_epsg(32631).to_wkt()
SETTINGS = ranking.check_params({})


def _context(tmp_path, inputs=None):
    scratch = tmp_path / "scratch"
    scratch.mkdir(exist_ok=True)
    return StageContext(survey={"crs": "EPSG:32631", "crs_wkt": CRS_WKT, "name": "t"}, inputs=inputs or {},
                        scratch=scratch, log=logging.getLogger("test"), progress=make_progress(False),
                        lineage={"lodeline_version": "0", "config_hash": "abc", "stages": {"ranking": "k"}})


def test_score_is_documented_formula():
    # score = 100 (0.4 S + 0.2 F + 0.4 M), S = log10(snr)/3, M = log10(1+m)/log10(1001): worked by hand
    t = pd.DataFrame({"snr": [100.0, 10.0], "fit_r2": [0.9, 0.5], "mass_max_kg": [99.0, 0.0], "kind": ["point", "point"]})
    out = ranking.score_rows(t, SETTINGS)
    s0 = 100 * (0.4 * (2 / 3) + 0.2 * 0.9 + 0.4 * (2 / math.log10(1001)))
    s1 = 100 * (0.4 * (1 / 3) + 0.2 * 0.5 + 0.0)
    # 1e-9: the same arithmetic in floating point
    assert out["score"].tolist() == pytest.approx([s0, s1], abs=1e-9)
    assert out["rank"].tolist() == [1, 2]


def test_features_rank_by_size_term_of_one():
    t = pd.DataFrame({"snr": [50.0, 50.0], "fit_r2": [np.nan, 0.99], "mass_max_kg": [np.nan, 10.0],
                      "kind": ["extended", "point"]})
    out = ranking.score_rows(t, SETTINGS)
    assert out.loc[0, "score_mass"] == 1.0 and out.loc[0, "score_fit"] == 0.0


def test_zero_weights_refused():
    with pytest.raises(ParameterError, match="weight"):
        ranking.check_params({"weight_snr": 0.0, "weight_fit": 0.0, "weight_mass": 0.0})


def test_merge_keeps_the_better_determined_fit():
    fitted = pd.DataFrame({"pick_id": [1, 2, 3], "easting_m": [0.0, 0.3, 5.0], "northing_m": [0.0, 0.1, 0.0],
                           "elevation_m": [-3.0, -3.2, -3.0], "position_sigma_m": [0.2, 0.05, 0.1]})
    kept, merged = ranking._merge(fitted, SETTINGS)
    assert sorted(kept["pick_id"]) == [2, 3]
    assert merged.to_dict("records") == [{"pick_id": 1, "into_pick_id": 2, "distance_m": pytest.approx(math.hypot(0.3, 0.1))}]


def test_peak_anomaly_matches_closed_form_maximum():
    # The largest anomaly of a vertical-field dipole straight below the sensor plane: for the moment along the
    # field, |dT| = mu0/(4 pi) * m * |3 (f.r)^2 / r^2 - 1| / r^3, largest near the point above the source at high
    # inclination (Blakely 1995, ch. 4); compared with a dense brute-force search on a 0.01 m lattice.
    f = field_unit_vector(68.7, 1.0)
    m = 2.0 * f
    row = pd.Series({"depth_below_sensor_m": 3.0, "moment_east_Am2": m[0], "moment_north_Am2": m[1], "moment_up_Am2": m[2]})
    got = ranking._peak_anomaly(row, f)
    g = np.arange(-3, 3, 0.01)
    x, y = np.meshgrid(g, g)
    obs = np.column_stack([x.ravel(), y.ravel(), np.zeros(x.size)])
    ref = np.max(np.abs(design(obs, np.array([[0, 0, -3.0]]), f) @ m))
    # 0.5 %: the stage's 0.05 m lattice against the 0.01 m one, near a smooth maximum 3 m wide
    assert got == pytest.approx(ref, rel=5e-3)


def test_seed_checks_report_found_and_missed():
    targets = pd.DataFrame({"target_id": ["T0001", "T0002"], "kind": ["point", "linear"], "easting_m": [10.0, 50.0],
                            "northing_m": [0.0, 0.0], "elevation_m": [-14.0, np.nan]})
    seeds = pd.DataFrame({"seed_id": ["A", "B"], "easting_m": [10.3, 50.0], "northing_m": [0.4, 0.0], "elevation_m": [-14.2, -14.0]})
    out = check_seeds(seeds, targets, 1.0)
    a, b = out.iloc[0], out.iloc[1]
    assert a["found"] and a["target_id"] == "T0001"
    assert a["horizontal_error_m"] == pytest.approx(0.5) and a["depth_error_m"] == pytest.approx(0.2)
    # a linear feature does not count as finding a compact seed
    assert not b["found"] and "NOT FOUND" in b["message"]


def _synthetic_inputs(tmp_path):
    """One confirmed point fit, a duplicate of it, an unconfirmed pick and a linear feature."""
    f = field_unit_vector(68.7, 1.0)
    m = 1.5 * f
    base = {"moment_east_Am2": m[0], "moment_north_Am2": m[1], "moment_up_Am2": m[2], "moment_Am2": 1.5,
            "moment_inclination_deg": 68.7, "moment_declination_deg": 1.0, "remanence_angle_deg": 0.0,
            "fit_rms_nT": 0.05, "depth_below_sensor_m": 3.0, "depth_sigma_m": 0.05, "mass_min_kg": 5.0, "mass_max_kg": 99.0}
    dipoles = pd.DataFrame([
        {"pick_id": 1, "kind": "point", "easting_m": 500010.0, "northing_m": 6000000.0, "elevation_m": -14.0,
         "fit_r2": 0.99, "position_sigma_m": 0.03, "ok": True, "note": "fitted", **base},
        {"pick_id": 2, "kind": "point", "easting_m": 500010.2, "northing_m": 6000000.1, "elevation_m": -14.1,
         "fit_r2": 0.98, "position_sigma_m": 0.08, "ok": True, "note": "fitted", **base},
        {"pick_id": 3, "kind": "point", "easting_m": np.nan, "northing_m": np.nan, "elevation_m": np.nan,
         "fit_r2": 0.3, "position_sigma_m": np.nan, "ok": False, "note": "poor fit"},
        {"pick_id": 4, "kind": "linear", "easting_m": np.nan, "northing_m": np.nan, "elevation_m": np.nan,
         "fit_r2": np.nan, "position_sigma_m": np.nan, "ok": False, "note": "not a point source"},
    ])
    picks = pd.DataFrame({"pick_id": [1, 2, 3, 4], "kind": ["point", "point", "point", "linear"],
                          "easting_m": [500010.1, 500010.4, 500030.0, 500050.0], "northing_m": [6000000.0] * 4,
                          "snr": [20.0] * 4, "peak_gradient_nT_per_m": [1.0] * 4, "peak_anomaly_nT": [3.0] * 4,
                          "n_picks": [1, 1, 1, 6], "length_m": [np.nan, np.nan, np.nan, 30.0],
                          "geometry_wkt": ["", "", "", "LINESTRING (500040 6000000, 500070 6000000)"]})
    meta = pd.DataFrame({"key": ["residual_noise_nT"], "value": ["0.05"]})
    euler = pd.DataFrame({"pick_id": [1, 2, 3], "structural_index": [3.0, 3.0, np.nan]})
    n = 200
    e = np.linspace(500000, 500060, n)
    readings = xr.Dataset(
        {"residual": ("reading", np.zeros(n)), "flags": ("reading", np.zeros(n, dtype=np.uint32))},
        coords={"easting": ("reading", e), "northing": ("reading", np.full(n, 6000000.0)),
                "elevation": ("reading", np.full(n, -11.0)), "altitude": ("reading", np.full(n, 2.5))},
        attrs={"main_field_inclination_deg": 68.7, "main_field_grid_declination_deg": 1.0, "main_field_nT": 50000.0},
    )
    seeds = tmp_path / "seeds.csv"
    seeds.write_text("seed_id,easting_m,northing_m,burial_m\nS<1>,500010.0,6000000.3,0.5\n")
    data = {"sizing": {"dipoles": dipoles}, "picking": {"picks": picks, "picking_metadata": meta},
            "euler": {"euler": euler}, "levelling": {"readings": readings}}
    return data, {"seeds": {"files": [str(seeds)]}}


def test_run_writes_table_files_and_checks_seeds(tmp_path):
    import pyogrio

    data, inputs = _synthetic_inputs(tmp_path)
    ctx = _context(tmp_path, inputs)
    result = ranking.run(data, {}, ctx)
    t = result.tables["targets"]
    # one merged point target and the linear feature; the unconfirmed pick is listed, not a target
    assert sorted(t["kind"]) == ["linear", "point"]
    assert list(t.columns) == list(ranking.COLUMNS)
    point = t[t["kind"] == "point"].iloc[0]
    assert point["pick_id"] == 1 and point["n_picks"] == 2  # the better-determined fit kept
    assert result.tables["unconfirmed"]["pick_id"].tolist() == [3]
    # seabed: elevation - altitude = -13.5 m, so burial = -13.5 - (-14.0) = 0.5 m
    assert point["burial_m"] == pytest.approx(0.5, abs=1e-9)
    assert point["structural_index"] == 3.0
    assert point["snr"] == pytest.approx(point["peak_anomaly_nT"] / 0.05)
    seeds = result.tables["seed_checks"]
    assert bool(seeds.loc[0, "found"]) and seeds.loc[0, "target_id"] == point["target_id"]
    # seed elevation = seabed (-13.5) - burial (0.5) = -14.0; target elevation -14.0
    assert seeds.loc[0, "depth_error_m"] == pytest.approx(0.0, abs=1e-9)
    assert t.loc[t["target_id"] == point["target_id"], "seed_id"].item() == "S<1>"

    gpkg = result.files["targets.gpkg"]
    info = pyogrio.read_info(gpkg)
    assert info["features"] == len(t) and info["crs"] == "EPSG:32631"
    assert "target_id" in list(info["fields"]) and "mass_max_kg" in list(info["fields"])
    _, _, geometry, fields = pyogrio.raw.read(gpkg)
    assert len(geometry) == len(t)
    doc = json.loads(result.files["targets.geojson"].read_text())
    assert doc["type"] == "FeatureCollection" and len(doc["features"]) == len(t)
    lon, lat = [f for f in doc["features"] if f["properties"]["kind"] == "point"][0]["geometry"]["coordinates"]
    # RFC 7946: longitude first; EPSG:32631 easting 500010 lies 0.00015 deg east of the central meridian 3 E
    assert lon == pytest.approx(3.0001, abs=1e-3) and 54 < lat < 54.2
    prov = json.loads(result.files["targets_provenance.json"].read_text())
    assert prov["config_hash"] == "abc" and prov["stage_keys"] == {"ranking": "k"}


def test_missed_seed_fails_unless_allowed(tmp_path):
    from lodeline.model import DataError

    data, inputs = _synthetic_inputs(tmp_path)
    (tmp_path / "far.csv").write_text("seed_id,easting_m,northing_m\nFAR,500500.0,6000000.0\n")
    inputs = {"seeds": {"files": [str(tmp_path / "far.csv")]}}
    with pytest.raises(DataError, match="FAR not found"):
        ranking.run(data, {}, _context(tmp_path, inputs))
    result = ranking.run(data, {"fail_on_missed_seed": False}, _context(tmp_path, inputs))
    assert not result.tables["seed_checks"]["found"].any()


def test_bad_seed_file_names_file_and_row(tmp_path):
    from lodeline.model import DataError

    data, _ = _synthetic_inputs(tmp_path)
    bad = tmp_path / "bad.csv"
    bad.write_text("seed_id,easting_m,northing_m\nA,500010,6000000\nB,abc,6000000\n")
    with pytest.raises(DataError, match=r"bad.csv: row 3"):
        ranking.run(data, {}, _context(tmp_path, {"seeds": {"files": [str(bad)]}}))
