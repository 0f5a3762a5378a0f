"""A small invented run for the report's tests: every upstream output the report reads.

One induced point dipole under a patch of parallel tracks (6 lines x 2
sensors, readings every 0.1 m, noise 0.05 nT), its grid and total
gradient amplitude, a detectability map with one gap, invented crossovers, diurnal curve, picking metadata,
dipole and target tables, seed checks and a reacquisition plan made by the
reacquisition stage, and manifest records. Strings that a hostile input
file could carry are put in the survey name, a target id and a seed note.
"""

from __future__ import annotations

import logging

import numpy as np
import pandas as pd
import xarray as xr
from pyproj import CRS

from lodeline.model import StageContext, flag_attrs, segment_chunks, segments_dataset
from lodeline.progress import make_progress
from lodeline.steps import reacquisition
from lodeline.steps._dipole_model import design, field_unit_vector

E0, N0 = 493_700.0, 5_994_800.0
INC, DEC = 68.7, 2.1
SENSOR_ELEV = -10.0
SOURCE = np.array([E0 + 0.3, N0 + 2.6, -12.8])      # 2.8 m below the sensors
MOMENT = 6.0 * field_unit_vector(INC, DEC)          # induced, 6 A m^2
NOISE_NT = 0.05
HOSTILE_ID = '<img src=x onerror="alert(1)">&T2'
HOSTILE_NAME = "Invented <b>survey</b> & 'route'"
CRS_WKT = CRS.from_epsg(32631).to_wkt()


def readings(seed: int = 1):
    """Readings (residual, flags, main-field attributes) and their segments."""
    rng = np.random.default_rng(seed)
    along = np.arange(-20.0, 20.0 + 1e-9, 0.1)
    parts = {k: [] for k in ("e", "n", "line", "sensor")}
    for line in range(6):
        for sensor in range(2):
            parts["e"].append(E0 + along if line % 2 == 0 else E0 - along)
            parts["n"].append(np.full(along.size, N0 + line * 1.0 + sensor * 0.5))
            parts["line"].append(np.full(along.size, line, np.int32))
            parts["sensor"].append(np.full(along.size, sensor, np.int16))
    e, n = np.concatenate(parts["e"]), np.concatenate(parts["n"])
    line, sensor = np.concatenate(parts["line"]), np.concatenate(parts["sensor"])
    obs = np.column_stack([e, n, np.full(e.size, SENSOR_ELEV)])
    f_hat = field_unit_vector(INC, DEC)
    clean = design(obs, SOURCE[None], f_hat) @ MOMENT
    residual = clean + rng.normal(0, NOISE_NT, e.size)
    count = e.size
    t0 = np.datetime64("2026-05-14T08:00:00", "ns")
    ds = xr.Dataset(
        {"total_field": ("reading", residual + 49_900.0, {"units": "nT"}),
         "residual": ("reading", residual, {"units": "nT"}),
         "flags": ("reading", np.zeros(count, np.uint32), flag_attrs())},
        coords={"time": ("reading", t0 + (np.arange(count) * 50_000_000).astype("timedelta64[ns]")),
                "easting": ("reading", e, {"units": "m"}), "northing": ("reading", n, {"units": "m"}),
                "elevation": ("reading", obs[:, 2], {"units": "m"}), "altitude": ("reading", np.full(count, 2.5), {"units": "m"}),
                "line_index": ("reading", line), "sensor_index": ("reading", sensor),
                "source_file": ("reading", np.zeros(count, np.int16)), "source_row": ("reading", np.arange(1, count + 1))},
        attrs={"crs": "EPSG:32631", "crs_wkt": CRS_WKT, "line_names": [f"L{i:03d}" for i in range(6)],
               "line_kinds": ["survey"] * 6, "sensor_names": ["S1", "S2"], "source_files": ["invented.csv"],
               "main_field_inclination_deg": INC, "main_field_grid_declination_deg": DEC, "main_field_nT": 49_900.0},
    )
    segs = segments_dataset(line, sensor)
    chunks = segment_chunks((segs["stop"] - segs["start"]).values, 2000)
    return ds.chunk({"reading": chunks}), segs, clean


def grid():
    """Residual and total gradient amplitude of the dipole on 0.25 m cells (dask tiles)."""
    e = E0 + np.arange(-20, 20.01, 0.25)
    n = N0 + np.arange(-4, 10.01, 0.25)
    ee, nn = np.meshgrid(e, n)
    f_hat = field_unit_vector(INC, DEC)

    def field(dz=0.0):
        obs = np.column_stack([ee.ravel(), nn.ravel(), np.full(ee.size, SENSOR_ELEV + dz)])
        return (design(obs, SOURCE[None], f_hat) @ MOMENT).reshape(ee.shape)

    t = field()
    gy, gx = np.gradient(t, 0.25)
    gz = (field(0.01) - field(-0.01)) / 0.02
    tga = np.sqrt(gx**2 + gy**2 + gz**2)
    ds = xr.Dataset({"residual": (("northing", "easting"), t, {"units": "nT"}),
                     "total_gradient_amplitude": (("northing", "easting"), tga, {"units": "nT/m"})},
                    coords={"northing": n, "easting": e}, attrs={"crs_wkt": CRS_WKT})
    return ds.chunk({"northing": 32, "easting": 64})


def detectability():
    """Least detectable mass grid, a 0/1 class map with one gap, and the coverage and gap tables."""
    e = E0 + np.arange(-20, 20.01, 0.5)
    n = N0 + np.arange(-4, 10.01, 0.5)
    ee, nn = np.meshgrid(e, n)
    mass = 5.0 + 0.5 * (nn - N0) ** 2
    detectable = (mass < 40.0).astype(float)
    grid = xr.Dataset({"least_mass_high_kg": (("northing", "easting"), mass, {"units": "kg"}),
                       "class_detectable": (("northing", "easting"), detectable, {"units": "1"})},
                      coords={"northing": n, "easting": e},
                      attrs={"crs_wkt": CRS_WKT, "class_name": "invented <class>", "class_mass_kg": 40.0, "burial_m": 1.0})
    coverage = pd.DataFrame({"class_name": ["invented <class>"], "basis": ["conservative"],
                             "percent_detectable": [100 * detectable.mean()]})
    gaps = pd.DataFrame({"gap_id": [1], "class_name": ["invented <class>"], "area_m2": [120.0],
                         "centroid_easting_m": [E0], "centroid_northing_m": [N0 + 9.0]})
    return {"grid": grid.chunk({"northing": 16, "easting": 32}), "coverage_summary": coverage, "gaps": gaps}


def tables(rng=None):
    """Crossovers, diurnal curve and gap, picking metadata, dipoles, targets, seeds."""
    rng = rng or np.random.default_rng(7)
    k = 300
    crossovers = pd.DataFrame({"before_nT": rng.normal(0, 3.0, k), "after_tie_nT": rng.normal(0, 0.05, k),
                               "after_nT": rng.normal(0, 0.06, k), "used": rng.uniform(size=k) > 0.05})
    times = pd.date_range("2026-05-14T07:50:00", periods=400, freq="10s")
    variation = 4 * np.sin(np.arange(400) / 25.0)
    rate = np.gradient(variation, 10.0 / 60.0)
    curve = pd.DataFrame({"time": times.astype(str), "base_nT": 49_930 + variation, "variation_nT": variation,
                          "rate_nT_per_min": rate, "too_fast": np.abs(rate) > 9.0, "in_gap": False})
    gaps = pd.DataFrame({"last_sample_before": ["2026-05-14 08:20:00"], "first_sample_after": ["2026-05-14 08:22:00"],
                         "length_s": [120.0], "readings_flagged": [10], "lines": ["L003"]})
    meta = pd.DataFrame({"key": ["pick_on", "noise_level", "threshold"], "value": ["total_gradient_amplitude", "0.4", "2.0"]})
    size = float(np.linalg.norm(MOMENT))
    inc = float(np.degrees(np.arctan2(-MOMENT[2], np.hypot(MOMENT[0], MOMENT[1]))))
    dec = float(np.degrees(np.arctan2(MOMENT[0], MOMENT[1])) % 360)
    dipoles = pd.DataFrame({
        "pick_id": [1, 2], "kind": ["point", "linear"], "easting_m": [SOURCE[0], np.nan], "northing_m": [SOURCE[1], np.nan],
        "elevation_m": [SOURCE[2], np.nan], "moment_east_Am2": [MOMENT[0], np.nan], "moment_north_Am2": [MOMENT[1], np.nan],
        "moment_up_Am2": [MOMENT[2], np.nan], "moment_Am2": [size, np.nan], "joint_group": [-1, -1]})
    targets = pd.DataFrame({
        "target_id": ["T0001", HOSTILE_ID], "rank": [1, 2], "score": [0.9, 0.4], "kind": ["point", "linear"],
        "easting_m": [SOURCE[0], E0 - 10.0], "northing_m": [SOURCE[1], N0 + 8.0], "longitude": np.nan, "latitude": np.nan,
        "elevation_m": [SOURCE[2], np.nan], "depth_below_sensor_m": [2.8, np.nan], "burial_m": [0.3, np.nan],
        "structural_index": [3.0, 1.0], "moment_Am2": [size, np.nan], "moment_inclination_deg": [inc, np.nan],
        "moment_declination_deg": [dec, np.nan], "remanence_angle_deg": [0.0, np.nan], "peak_anomaly_nT": [40.0, 3.0],
        "peak_gradient_nT_per_m": [30.0, 2.5], "snr": [75.0, 6.0], "fit_r2": [0.999, np.nan],
        "position_sigma_m": [0.05, np.nan], "depth_sigma_m": [0.02, np.nan], "mass_min_kg": [3.0, np.nan],
        "mass_max_kg": [90.0, np.nan], "fit_rms_nT": [0.05, np.nan], "pick_id": [1, 2], "status": ["fitted", "<linear>"],
        "geometry_wkt": ["", f"LINESTRING ({E0 - 20} {N0 + 8}, {E0} {N0 + 8.5})"]})
    seeds = pd.DataFrame({"seed_id": ["SD1", "SD2"], "found": [True, False], "target_id": ["T0001", ""],
                          "horizontal_error_m": [0.2, np.nan], "depth_error_m": [0.1, np.nan],
                          "description": ["steel seed", "<script>alert('seed')</script>"]})
    return crossovers, curve, gaps, meta, dipoles, targets, seeds


def records():
    """Manifest records of the upstream stages, as the runner hands them."""
    def rec(key, params=None, removed=None, summary=None, ledger=True):
        led = {"readings_in": 4812, "readings_out": 4812, "rejected": {}, "new_flags": {"edge": 12} if removed else {},
               "removed": removed or {}} if ledger else {}
        return {"key": key, "wall_s": 0.5, "ledger": led, "summary": summary or {},
                "components": {"params": params or {}}}
    return {
        "ingest": rec("k-ingest", {"field_min_nT": 15000.0}),
        "diurnal": rec("k-diurnal", {"rate_limit_nT_per_min": 9.0},
                       {"diurnal": {"min_nT": -4.0, "max_nT": 4.0, "rms_nT": 2.83, "readings": 4812}}),
        "levelling": rec("k-levelling", {"method": "tie_lines"},
                         {"levelling": {"min_nT": -1.0, "max_nT": 2.0, "rms_nT": 0.7, "readings": 4812}},
                         {"crossover_rms_before_nT": 3.0, "crossover_rms_after_tie_nT": 0.05}),
        "dipole_fit": rec("k-dipole", {"radius_m": 5.0, "background": "plane", "exclude_flags": ["spike", "dropout"]},
                          ledger=False),
        "ranking": rec("k-ranking", {}, summary={"targets": 2}, ledger=False),
        "reacquisition": rec("k-reacq", {}, ledger=False),
    }


def context(scratch, name: str = HOSTILE_NAME) -> StageContext:
    recs = records()
    return StageContext(survey={"crs": "EPSG:32631", "crs_wkt": CRS_WKT, "name": name}, inputs={}, scratch=scratch,
                        log=logging.getLogger("test"), progress=make_progress(False),
                        lineage={"lodeline_version": "0.0.test", "config_hash": "feedc0de" * 4,
                                 "stages": {**{n: r["key"] for n, r in recs.items()}, "report": "k-report"}},
                        records=recs)


def upstream(scratch) -> dict:
    """The ``data`` argument of the report stage."""
    ds, segs, _ = readings()
    crossovers, curve, gaps, meta, dipoles, targets, seeds = tables()
    plan_dir = scratch / "plan"
    plan_dir.mkdir(exist_ok=True)
    plan = reacquisition.run({"ranking": {"targets": targets}}, {}, context(plan_dir)).tables["reacquisition_plan"]
    return {
        "ranking": {"targets": targets, "seed_checks": seeds},
        "reacquisition": {"reacquisition_plan": plan},
        "enhancement": {"grid": grid()},
        "levelling": {"readings": ds, "segments": segs, "crossovers": crossovers},
        "diurnal": {"diurnal_curve": curve, "base_station_gaps": gaps},
        "picking": {"picking_metadata": meta},
        "dipole_fit": {"dipoles": dipoles},
        "detectability": detectability(),
    }
