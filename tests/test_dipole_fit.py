"""Tests of the dipole-fit stage on invented synthetic readings.

Outside reference: the dipole fields are forward-modelled with the
general-purpose library harmonica (``harmonica.dipole_magnetic``, field
"b", projected on the main-field unit vector: the total-field anomaly of
Blakely 1995, ch. 12), not with the stage's own model.
"""

from __future__ import annotations

import logging

import dask.array as da
import harmonica as hm
import numpy as np
import pandas as pd
import pytest
import xarray as xr

from lodeline.model import DataError, StageContext, flag_attrs, flag_mask, segment_chunks, segments_dataset
from lodeline.params import ParameterError
from lodeline.progress import make_progress
from lodeline.steps import dipole_fit as stage
from lodeline.steps._dipole_model import field_unit_vector
from lodeline.steps._dipole_rows import fit_group

INC, DEC, F0 = 68.7, 1.5, 49_924.0
SENSOR_UP = -10.0  # sensors 2.7 m above a seabed at -12.7 m
F_HAT = field_unit_vector(INC, DEC)


def anomaly(e, n, u, sources, moments):
    """Total-field anomaly, nT, from harmonica (reference library)."""
    src = tuple(np.asarray(sources, float).T)
    mom = tuple(np.asarray(moments, float).T)
    be, bn, bu = hm.dipole_magnetic((e, n, u), src, mom, field="b")
    return be * F_HAT[0] + bn * F_HAT[1] + bu * F_HAT[2]


def induced(m):
    return m * F_HAT


def tracks(x0=0.0, x1=60.0, y0=0.0, n_tracks=21, spacing=1.0, step=0.2):
    """Parallel tracks along easting, ``spacing`` apart, one reading each ``step``."""
    x = np.arange(x0, x1 + 1e-9, step)
    e = np.tile(x, n_tracks)
    n = np.repeat(y0 + spacing * np.arange(n_tracks), x.size)
    line = np.repeat(np.arange(n_tracks, dtype=np.int32), x.size)
    return e, n, line


def make_readings(sources, moments, *, noise=0.05, seed=0, background=None, n_tracks=21, x1=60.0,
                  residual_wrapper=None, per_chunk=1):
    """A levelled readings dataset (model conventions) over point dipoles."""
    rng = np.random.default_rng(seed)
    e, n, line = tracks(n_tracks=n_tracks, x1=x1)
    u = SENSOR_UP + 0.1 * np.sin(e / 7.0)
    value = anomaly(e, n, u, sources, moments) + rng.normal(0, noise, e.size)
    if background is not None:
        value = value + background(e, n)
    count = e.size
    segs = segments_dataset(line, np.zeros(count, np.int16))
    chunks = segment_chunks((segs["stop"] - segs["start"]).values, per_chunk * int((line == 0).sum()))
    t0 = np.datetime64("2026-04-01T08:00:00", "ns")
    residual = da.from_array(value, chunks=(chunks,))
    if residual_wrapper is not None:
        residual = residual_wrapper(residual, e, n)
    ds = xr.Dataset(
        {"residual": ("reading", residual, {"units": "nT"}),
         "total_field": ("reading", da.from_array(value + F0, chunks=(chunks,)), {"units": "nT"}),
         "flags": ("reading", da.zeros(count, dtype=np.uint32, chunks=(chunks,)), flag_attrs())},
        coords={
            "time": ("reading", t0 + (np.arange(count) * 100_000_000).astype("timedelta64[ns]")),
            "easting": ("reading", da.from_array(e, chunks=(chunks,)), {"units": "m"}),
            "northing": ("reading", da.from_array(n, chunks=(chunks,)), {"units": "m"}),
            "elevation": ("reading", da.from_array(u, chunks=(chunks,)), {"units": "m"}),
        },
        attrs={"main_field_nT": F0, "main_field_inclination_deg": INC, "main_field_grid_declination_deg": DEC},
    )
    return ds, (e, n, u, value)


def context(tmp_path):
    return StageContext(survey={"crs": "EPSG:32631", "crs_wkt": "", "name": "t"}, inputs={}, scratch=tmp_path,
                        log=logging.getLogger("test"), progress=make_progress(False))


def picks_table(rows):
    return pd.DataFrame(rows, columns=["pick_id", "easting_m", "northing_m", "kind", "peak_anomaly_nT", "snr"])


def run_stage(tmp_path, readings, picks, euler=None, **params):
    if euler is None:
        euler = pd.DataFrame(columns=["pick_id", "easting_m", "northing_m", "upward_m"])
    data = {"picking": {"picks": picks}, "euler": {"euler": euler}, "levelling": {"readings": readings}}
    return stage.run(data, params, context(tmp_path))


def test_recovers_forward_modelled_dipole(tmp_path):
    # an induced 4 A m^2 dipole 2.6 m below the sensors (buried 0.6 m below the seabed), 0.1 nT noise,
    # a regional plane of 0.05 nT/m; the pick is 0.7 m off and Euler failed (NaN)
    true = np.array([30.3, 10.4, -12.6])
    moment = induced(4.0)
    ds, _ = make_readings([true], [moment], noise=0.1, background=lambda e, n: 3.0 + 0.05 * e - 0.02 * n)
    picks = picks_table([[1, 30.9, 10.1, "point", 20.0, 50.0]])
    euler = pd.DataFrame({"pick_id": [1], "easting_m": [np.nan], "northing_m": [np.nan], "upward_m": [np.nan]})
    out = run_stage(tmp_path, ds, picks, euler).tables["dipoles"].iloc[0]
    assert out["ok"] and out["note"] == "fitted"
    # tolerances: the fit's own 1-sigma errors here are about 3 mm and 0.2 % (0.1 nT noise on a ~40 nT anomaly,
    # ~390 readings); 2 cm and 1 % are some 6 of those sigmas, and far tighter than the 0.7 m start offset
    assert abs(out["easting_m"] - true[0]) < 0.02 and abs(out["northing_m"] - true[1]) < 0.02
    sensor = np.median(ds["elevation"].values[np.hypot(ds.easting.values - 30.9, ds.northing.values - 10.1) <= 5.0])
    assert abs(out["depth_below_sensor_m"] - (sensor - true[2])) < 0.02
    assert abs(out["moment_Am2"] - 4.0) / 4.0 < 0.01
    assert out["fit_r2"] > 0.99  # noise variance 0.01 nT^2 against a signal variance of tens of nT^2
    assert 0.08 < out["fit_rms_nT"] < 0.12  # the residual RMS estimates the 0.1 nT noise (n ~ 390: one sd of the RMS is 1/sqrt(2n) = 3.6 %, the bounds are ~3 sd)
    assert 0.0 < out["position_sigma_m"] < 0.02 and 0.0 < out["depth_sigma_m"] < 0.02


def test_sigmas_are_honest_over_noisy_trials():
    """About 68 % of true values fall within the reported 1 sigma (normal errors, Press et al. 2007 ch. 15.5).

    100 independent trials: the count inside 1 sigma is binomial(100, 0.683), standard deviation 4.7;
    the bounds 54..82 are three of those either side (the chance that an honest sigma fails one of the
    four checks is about 1 %; the seed is fixed, so the test is repeatable).
    """
    rng = np.random.default_rng(42)
    e, n, _ = tracks(x0=20.0, x1=32.0, y0=5.0, n_tracks=11, spacing=1.0, step=0.2)
    true = np.array([26.2, 10.3, -12.8])
    moment = induced(3.0) + np.array([0.8, -0.5, 0.3])
    u = np.full(e.shape, SENSOR_UP)
    keep = np.hypot(e - 26.0, n - 10.0) <= 4.0
    obs = np.column_stack([e[keep], n[keep], u[keep]])
    clean = anomaly(obs[:, 0], obs[:, 1], obs[:, 2], [true], [moment])
    settings = stage.check_params({"radius_m": 4.0})
    size = np.linalg.norm(moment)
    hits = np.zeros(4)
    for _ in range(100):
        values = clean + rng.normal(0.0, 1.5, clean.size) + 0.7
        _, (row,) = fit_group(obs, values, F_HAT, np.array([[26.0, 10.0]]), [None], settings)
        hits += [
            abs(row["easting_m"] - true[0]) <= row["easting_sigma_m"],
            abs(row["northing_m"] - true[1]) <= row["northing_sigma_m"],
            abs(row["depth_below_sensor_m"] - (SENSOR_UP - true[2])) <= row["depth_sigma_m"],
            abs(row["moment_Am2"] - size) <= row["moment_sigma_Am2"],
        ]
    assert np.all((hits >= 54) & (hits <= 82)), hits


@pytest.mark.parametrize("kind, expected", [("induced", 0.0), ("perpendicular", 90.0)])
def test_remanence_angle(tmp_path, kind, expected):
    # a moment along the field (induced) gives 0 deg; one at right angles to it 90 deg (by construction).
    # tolerance 2 deg: the direction error of a 5 A m^2 moment fitted through 0.05 nT noise is well under 1 deg
    perp = np.cross(F_HAT, [1.0, 0.0, 0.0])
    moment = induced(5.0) if kind == "induced" else 5.0 * perp / np.linalg.norm(perp)
    ds, _ = make_readings([[30.0, 10.0, -12.5]], [moment])
    out = run_stage(tmp_path, ds, picks_table([[7, 30.2, 10.2, "point", 1.0, 1.0]])).tables["dipoles"].iloc[0]
    assert abs(out["remanence_angle_deg"] - expected) < 2.0
    if kind == "induced":  # an induced moment points along the field: inclination 68.7, declination 1.5 (grid)
        assert abs(out["moment_inclination_deg"] - INC) < 2.0 and abs(out["moment_declination_deg"] - DEC) < 2.0


def test_selection_reads_only_chunks_and_readings_near_picks(tmp_path):
    # residual blocks of tracks far (> 12 m) from every pick raise when computed: the stage must not read them
    # (tracks 1 m apart; readings are loaded out to twice the 5 m radius)
    far_rows = []

    def guard(residual, e, n):
        def block(b, block_info=None):
            lo, hi = block_info[0]["array-location"][0]
            if np.min(np.abs(n[lo:hi] - 10.0)) > 12.0:
                far_rows.append(lo)
                raise AssertionError("a chunk far from every pick was read")
            return b
        return residual.map_blocks(block, dtype=float)

    ds, (e, n, u, value) = make_readings([[30.0, 10.0, -12.5]], [induced(5.0)], n_tracks=40, residual_wrapper=guard)
    flags = np.zeros(e.size, np.uint32)
    spiked = np.flatnonzero(np.hypot(e - 30.0, n - 10.0) < 1.0)[::5]
    flags[spiked] = flag_mask("spike")  # spikes near the pick: left out of the fit and of the count
    ds = ds.assign(flags=("reading", da.from_array(flags, chunks=ds["residual"].chunks), flag_attrs()))
    ds = ds.assign(residual=ds["residual"].copy(data=ds["residual"].data + da.from_array(
        np.where(flags > 0, 500.0, 0.0), chunks=ds["residual"].chunks)))
    picks = picks_table([
        [1, 30.0, 10.0, "point", 30.0, 60.0],
        [2, 45.0, 12.0, "linear", 5.0, 10.0],      # not dipole-fitted
        [3, 80.0, 10.0, "point", 2.0, 5.0],        # beyond the end of the tracks: too few readings
        [4, 60.0, 10.0, "point", 2.0, 5.0],        # at the end of the tracks: a 5 m half-disc, ~190 readings, enough
    ])
    res = run_stage(tmp_path, ds, picks, radius_m=5.0, min_readings=150)
    table = res.tables["dipoles"].set_index("pick_id")
    near = lambda x, y, r=5.0: (np.hypot(e - x, n - y) <= r) & (flags == 0)  # noqa: E731
    # readings out to twice the radius are loaded (a window may be widened about an added source)
    expected = int((near(30.0, 10.0, 10.0) | near(80.0, 10.0, 10.0) | near(60.0, 10.0, 10.0)).sum())
    assert res.summary["readings_loaded"] == expected  # brute force over the in-memory test arrays
    assert res.summary["chunks_read"] == 21 and res.summary["chunks_total"] == 40  # tracks 0..20 only
    assert not far_rows
    assert table.loc[1, "ok"] and table.loc[1, "n_readings"] == int(near(30.0, 10.0).sum())
    assert abs(table.loc[1, "moment_Am2"] - 5.0) < 0.1  # the 500 nT spikes were left out
    assert table.loc[2, "note"] == "not a point source" and np.isnan(table.loc[2, "moment_Am2"])
    assert table.loc[3, "note"].startswith("too few readings") and np.isnan(table.loc[3, "easting_m"])
    assert table.loc[3, "n_readings"] == 0 and not table.loc[3, "ok"]
    assert np.isfinite(table.loc[4, "fit_r2"])


def test_close_sources_fitted_jointly(tmp_path):
    # two induced dipoles 2 m apart: one dipole cannot explain both, the joint fit recovers both
    src = np.array([[29.0, 10.0, -12.3], [31.0, 10.5, -12.3]])
    ds, _ = make_readings(src, [induced(3.0), induced(3.0)], noise=0.05)
    picks = picks_table([[1, 29.2, 10.0, "point", 1, 1], [2, 30.8, 10.4, "point", 1, 1]])
    single = run_stage(tmp_path, ds, picks, max_joint=1, add_sources=False).tables["dipoles"]
    joint = run_stage(tmp_path, ds, picks).tables["dipoles"]
    assert (single["fit_r2"] < 0.95).all()  # the threshold joint_r2_below must be crossed for this test to mean anything
    assert (joint["joint_group"] == 0).all() and joint["note"].str.startswith("fitted jointly").all()
    # 0.1 m and 5 %: the errors of two well-separated 3 A m^2 sources through 0.05 nT noise are ~1 cm (each true
    # source against the nearest fitted one: the joint fit may hand a pick's number to its neighbour's source)
    for s in src:
        d = np.hypot(joint["easting_m"] - s[0], joint["northing_m"] - s[1])
        row = joint.loc[d.idxmin()]
        assert d.min() < 0.1
        assert abs(row["elevation_m"] - s[2]) < 0.1
        assert abs(row["moment_Am2"] - 3.0) / 3.0 < 0.05
    assert joint["fit_r2"].min() > 0.99


def test_second_source_found_from_one_pick(tmp_path):
    # the same two dipoles 2 m apart but only one pick: the second-source trial finds the other (F test)
    src = np.array([[29.0, 10.0, -12.3], [31.0, 10.5, -12.3]])
    ds, _ = make_readings(src, [induced(3.0), induced(3.0)], noise=0.05)
    picks = picks_table([[1, 29.2, 10.0, "point", 1, 1]])
    out = run_stage(tmp_path, ds, picks).tables["dipoles"]
    assert len(out) == 2 and out["note"].str.contains("sources added where the fit left signal").all()
    # 0.1 m and 5 %: as for the joint fit above (the same readings and model)
    for s in src:
        d = np.hypot(out["easting_m"] - s[0], out["northing_m"] - s[1])
        row = out.loc[d.idxmin()]
        assert d.min() < 0.1 and abs(row["elevation_m"] - s[2]) < 0.1
        assert abs(row["moment_Am2"] - 3.0) / 3.0 < 0.05
    off = run_stage(tmp_path, ds, picks, add_sources=False).tables["dipoles"]
    assert len(off) == 1


def test_three_close_sources_resolved_from_one_pick(tmp_path):
    # three induced dipoles 1.8-4.2 m apart, 3.4-3.9 m below the sensors, one pick (a cluster the picking saw as
    # one; the third source 3.6 m from the pick, near the edge of its 5 m window): sources are added one at a
    # time where the fit leaves signal, and the window is widened about the one at its edge
    src = np.array([[29.0, 10.0, -13.4], [30.8, 10.2, -13.9], [31.7, 6.1, -13.7]])
    moments = [induced(0.9), induced(1.4), induced(0.8)]
    ds, _ = make_readings(src, moments, noise=0.05)
    picks = picks_table([[1, 29.5, 9.0, "point", 1, 1]])
    single = run_stage(tmp_path, ds, picks, add_sources=False).tables["dipoles"]
    assert len(single) == 1 and single["fit_rms_nT"].iloc[0] > 2.5 * 0.05  # one dipole leaves signal: the test means something
    # the gate at 1.5 x noise (the default 2.5 stops at two sources here: their misfit is 2.2 x noise)
    out = run_stage(tmp_path, ds, picks, add_rms_multiple=1.5).tables["dipoles"]
    assert len(out) == 3 and out["ok"].all()
    # 0.25 m and 25 %: close sources trade signal with each other; the errors seen here are 0.02-0.15 m and 2-15 %
    for s_xyz, m in zip(src, moments):
        d = np.hypot(out["easting_m"] - s_xyz[0], out["northing_m"] - s_xyz[1])
        row = out.loc[d.idxmin()]
        assert d.min() < 0.25
        assert abs(row["moment_Am2"] - np.linalg.norm(m)) / np.linalg.norm(m) < 0.25


def test_isolated_dipole_gets_no_added_source(tmp_path):
    # one dipole in white noise: the fit leaves nothing but noise, so nothing may be added, by the added-source\n    # step or the search of the residual (20 noise draws)
    added = 0
    for seed in range(20):
        ds, _ = make_readings([[30.0, 10.0, -12.8]], [induced(2.0)], noise=0.05, seed=seed)
        out = run_stage(tmp_path / str(seed), ds, picks_table([[1, 30.3, 10.2, "point", 1, 1]])).tables["dipoles"]
        added += len(out) - 1
    assert added == 0


def test_neighbour_tail_removed_before_fitting_a_weak_source(tmp_path):
    # a weak source (peak ~0.7 nT) 11 m from a strong one (~60 nT): the strong one's tail (~1 nT) biases the weak
    # fit unless the strong one's modelled field is removed from the weak one's window first
    src = np.array([[20.0, 10.0, -13.0], [31.0, 10.0, -13.0]])
    moments = [induced(25.0), induced(0.3)]
    ds, _ = make_readings(src, moments, noise=0.05)
    picks = picks_table([[1, 20.0, 10.0, "point", 1, 1], [2, 31.0, 10.0, "point", 1, 1]])
    off = run_stage(tmp_path / "off", ds, picks, neighbour_passes=0, add_sources=False).tables["dipoles"].set_index("pick_id")
    on = run_stage(tmp_path / "on", ds, picks, add_sources=False).tables["dipoles"].set_index("pick_id")
    err = lambda t: np.hypot(t.loc[2, "easting_m"] - 31.0, t.loc[2, "northing_m"] - 10.0)  # noqa: E731
    # the uncorrected fit is pulled towards the strong source; the corrected one lies within 0.2 m (the weak
    # source's own 1-sigma error through 0.05 nT noise is about 0.05 m)
    assert err(off) > 2 * err(on) and err(on) < 0.2
    assert abs(on.loc[2, "moment_Am2"] - 0.3) / 0.3 < 0.2


def test_source_beside_a_pick_found_in_the_residual(tmp_path):
    # a 0.5 A m^2 source (peak ~4.5 nT) 6.5 m from a 3 A m^2 one that has the only pick: it lies outside the pick's
    # 5 m window, so only the search of the residual of the fitted sources can find it (added sources are off here
    # so that the window-edge widening cannot find it first)
    src = np.array([[25.0, 10.0, -13.0], [31.5, 10.0, -12.8]])
    ds, _ = make_readings(src, [induced(3.0), induced(0.5)], noise=0.05)
    picks = picks_table([[1, 25.0, 10.0, "point", 1, 1]])
    off = run_stage(tmp_path / "off", ds, picks, add_sources=False, residual_sources=False).tables["dipoles"]
    assert len(off) == 1  # without the search the second source is missed: the test means something
    on = run_stage(tmp_path / "on", ds, picks, add_sources=False).tables["dipoles"]
    assert len(on) == 2
    new = on.iloc[1]
    assert new["note"] == "found in the residual of the fitted sources" and new["ok"]
    # 0.2 m, 0.2 m and 20 %: the weak source's 1-sigma errors through 0.05 nT noise are about 0.02 m and 2 %, and
    # the strong source's misfit outside its window biases it a little
    assert np.hypot(new["easting_m"] - 31.5, new["northing_m"] - 10.0) < 0.2
    assert abs(new["elevation_m"] + 12.8) < 0.2
    assert abs(new["moment_Am2"] - 0.5) / 0.5 < 0.2


def test_source_gradient_matches_differences_of_harmonica_field():
    """The closed-form derivative of a dipole's anomaly by its position (used as the fit's Jacobian)
    against central differences of harmonica's dipole field (reference library). Tolerance: central
    differences of 1 mm have a truncation error of order h^2 / r^2 ~ 1e-7 of the derivative here
    (r >= 2 m), and the round-off of a 1e-3 m difference of a field of ~10 nT is ~1e-12 nT;
    1e-5 of the largest derivative leaves room for both and still fails on any wrong term."""
    from lodeline.steps._dipole_model import source_gradient

    rng = np.random.default_rng(4)
    src = np.array([[3.0, -2.0, SENSOR_UP - 3.0], [-1.0, 4.0, SENSOR_UP - 2.0]])
    mom = np.array([[0.3, -1.2, 2.0], [-2.5, 0.4, -0.7]])
    obs = np.column_stack([rng.uniform(-8, 8, 400), rng.uniform(-8, 8, 400), SENSOR_UP + rng.uniform(-0.3, 0.3, 400)])
    got = source_gradient(obs, src, mom, F_HAT)
    h = 1e-3
    want = np.empty_like(got)
    for j in range(2):
        for c in range(3):
            step = np.zeros(3)
            step[c] = h
            plus = anomaly(obs[:, 0], obs[:, 1], obs[:, 2], [src[j] + step], [mom[j]])
            minus = anomaly(obs[:, 0], obs[:, 1], obs[:, 2], [src[j] - step], [mom[j]])
            want[:, 3 * j + c] = (plus - minus) / (2 * h)
    assert np.max(np.abs(got - want)) < 1e-5 * np.max(np.abs(want))


def test_noise_from_second_differences():
    # white noise of 0.05 nT along tracks: the estimate is within 5 % (about 6,000 differences, MAD efficiency 37 %:
    # standard error about 1.6 %)
    from lodeline.steps._dipole_refine import noise_from_readings

    e, n, _ = tracks(n_tracks=21)
    obs = np.column_stack([e, n, np.zeros(e.size)])
    values = np.random.default_rng(3).normal(0, 0.05, e.size) + 0.01 * e  # a slope has no second difference
    assert abs(noise_from_readings(obs, values) - 0.05) / 0.05 < 0.05


def test_bad_input_is_refused(tmp_path):
    ds, _ = make_readings([[30.0, 10.0, -12.5]], [induced(5.0)], n_tracks=3)
    picks = picks_table([[1, 30.0, 10.0, "point", 1, 1]])
    with pytest.raises(DataError, match="main_field_inclination_deg"):
        run_stage(tmp_path, ds.drop_attrs(), picks)
    with pytest.raises(DataError, match="kind"):
        run_stage(tmp_path, ds, picks.drop(columns="kind"))
    with pytest.raises(ParameterError, match="dipole_fit.min_depth_m"):
        run_stage(tmp_path, ds, picks, min_depth_m=20.0)
    with pytest.raises(ParameterError, match="radius_mm"):
        run_stage(tmp_path, ds, picks, radius_mm=3.0)
    empty = run_stage(tmp_path, ds, picks.iloc[:0]).tables["dipoles"]
    assert len(empty) == 0 and "moment_Am2" in empty.columns
