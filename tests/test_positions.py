"""Tests of the sensor-positions stage (``lodeline.steps.positions``).

All data are invented: straight lines and a circular arc of antenna
positions, and survey lines over closed-form point dipoles. Every numerical
check names its outside source (hand geometry, kinematics, a textbook
formula) or says it is common practice.
"""

from __future__ import annotations

import logging
from pathlib import Path

import dask.array as da
import numpy as np
import pytest
import xarray as xr

from lodeline.model import DataError, StageContext, flag_attrs, segment_chunks, segments_dataset, validate_readings
from lodeline.params import ParameterError
from lodeline.progress import make_progress
from lodeline.steps import positions as positions
from lodeline.steps._positions_lag import combine

T0 = np.datetime64("2026-03-02T09:00:00", "ns")
DT_S = 0.1  # 10 Hz
E0, N0 = 493_000.0, 5_994_000.0
AZ_DEG = 58.0
SIN, COS = np.sin(np.radians(AZ_DEG)), np.cos(np.radians(AZ_DEG))
FORWARD = np.array([SIN, COS])  # unit vector of grid azimuth 058 (east, north)
STARBOARD = np.array([COS, -SIN])  # 90 degrees clockwise of it
MU0_4PI = 1e-7  # T m / A


# --------------------------------------------------------------------------
# Helpers
# --------------------------------------------------------------------------


def make_readings(segs, chunk_target=None, line_kinds=None):
    """A readings dataset following ``lodeline.model`` from a list of segments.

    Each segment is a dict with ``line`` and ``sensor`` (indices), ``t``
    (datetime64), ``e``, ``n`` (antenna, m), ``field`` (nT) and optional
    ``z`` (elevation, m). ``chunk_target``: readings per dask chunk
    (default one chunk).
    """
    lengths = [len(s["t"]) for s in segs]
    n = sum(lengths)
    cat = lambda key, default=None: np.concatenate(  # noqa: E731
        [s[key] if key in s else np.full(len(s["t"]), default) for s in segs]
    )
    line = np.repeat([s["line"] for s in segs], lengths).astype(np.int32)
    sensor = np.repeat([s["sensor"] for s in segs], lengths).astype(np.int16)
    chunks = (segment_chunks(lengths, chunk_target or n),)

    def lazy(values):
        return da.from_array(np.asarray(values), chunks=chunks)

    nlines = int(line.max()) + 1
    nsensors = int(sensor.max()) + 1
    ds = xr.Dataset(
        {
            "total_field": ("reading", lazy(cat("field").astype(float)), {"units": "nT"}),
            "flags": ("reading", lazy(np.zeros(n, dtype=np.uint32)), flag_attrs()),
        },
        coords={
            "time": ("reading", lazy(cat("t").astype("datetime64[ns]"))),
            "easting": ("reading", lazy(cat("e").astype(float)), {"units": "m", "grid_mapping": "crs"}),
            "northing": ("reading", lazy(cat("n").astype(float)), {"units": "m", "grid_mapping": "crs"}),
            "elevation": ("reading", lazy(cat("z", -10.0).astype(float)), {"units": "m"}),
            "altitude": ("reading", lazy(np.full(n, 2.5)), {"units": "m"}),
            "line_index": ("reading", lazy(line)),
            "sensor_index": ("reading", lazy(sensor)),
            "source_file": ("reading", lazy(np.zeros(n, dtype=np.int16))),
            "source_row": ("reading", lazy(np.arange(1, n + 1, dtype=np.int64))),
        },
        attrs={
            "crs": "EPSG:32631",
            "crs_wkt": 'PROJCS["invented"]',
            "line_names": [f"L{i + 1:02d}" for i in range(nlines)],
            "line_kinds": line_kinds or ["survey"] * nlines,
            "sensor_names": [f"S{i + 1}" for i in range(nsensors)],
            "source_files": ["invented.csv"],
        },
    )
    segments = segments_dataset(line, sensor)
    validate_readings(ds, segments, where="test helper")
    return ds, segments


def make_context(tmp_path=Path(".")):
    return StageContext(
        survey={"crs": "EPSG:32631", "crs_wkt": 'PROJCS["invented"]', "name": "t"},
        inputs={},
        scratch=Path(tmp_path),
        log=logging.getLogger("lodeline.test.positions"),
        progress=make_progress(False),
    )


def run_stage(ds, segments, **params):
    return positions.run({"spikes": {"readings": ds, "segments": segments}}, params, make_context())


def times(n, start_s=0.0):
    return T0 + ((start_s + np.arange(n) * DT_S) * 1e9).astype("timedelta64[ns]")


def dipole_total_field(e, n, z, sources):
    """Total-field anomaly of point dipoles, nT.

    ``B = (mu0 / 4 pi) (3 (m . r^) r^ - m) / r**3`` (Blakely 1995, Potential
    Theory in Gravity and Magnetic Applications, ch. 4, field of a dipole;
    from memory), projected on the main-field direction, which is the
    total-field anomaly when the anomaly is small against the main field
    (Blakely 1995, ch. 12; from memory). ``sources``: rows of (east, north,
    up, m_east, m_north, m_up), m and A m**2.
    """
    inc = np.radians(68.0)
    f_hat = np.array([0.0, np.cos(inc), -np.sin(inc)])
    obs = np.stack([e, n, z], axis=-1)
    total = np.zeros(len(e))
    for src in sources:
        r = obs - src[:3]
        dist = np.linalg.norm(r, axis=-1)
        m = np.asarray(src[3:])
        mr = (r @ m) / dist
        b = MU0_4PI * (3.0 * mr[:, None] * r / dist[:, None] - m[None, :]) / dist[:, None] ** 3
        total += 1e9 * (b @ f_hat)
    return total


def induced(east, north, up, moment):
    """A dipole source row with its moment along the main field (68 deg down to grid north)."""
    inc = np.radians(68.0)
    return (east, north, up, 0.0, moment * np.cos(inc), -moment * np.sin(inc))


def route(u, v):
    """Route coordinates (along 058, across to starboard) to easting, northing."""
    return E0 + u * FORWARD[0] + v * STARBOARD[0], N0 + u * FORWARD[1] + v * STARBOARD[1]


# --------------------------------------------------------------------------
# A zig-zag survey over dipoles (built once)
# --------------------------------------------------------------------------

LAG_TRUE_S = 0.25
LAYBACK_M = 6.0
ACROSS = (-1.0, 0.0, 1.0)
SPACING_M = 2.0  # line spacing: S3 of a line and of the next share a track, then S1, ...
LENGTH_M = 160.0
RUN_IN_M = 20.0
SENSOR_Z = -10.0
STRONG = (80.0, 1.0)  # (u, v) of the isolated strong dipole: under S3 of lines 1 and 2


def zigzag_segments(lag_s=LAG_TRUE_S, n_lines=8, seed=7):
    """Segments of a survey of alternating lines along 058 over invented dipoles.

    The field of a reading stamped ``T`` is that at the true sensor position
    at ``T - lag_s`` (towed ``LAYBACK_M`` behind the antenna, offset across
    by ``ACROSS``); the recorded position is the antenna's at ``T`` plus
    0.02 m noise. Field noise 0.05 nT. Returns (segments, sources).
    """
    rng = np.random.default_rng(seed)
    sources = [induced(*route(*STRONG), SENSOR_Z - 3.0, 8.0)]
    while len(sources) < 30:
        u, v = rng.uniform(5.0, LENGTH_M - 5.0), rng.uniform(-2.0, 2.0 * n_lines)
        if abs(u - STRONG[0]) < 15.0:
            continue
        sources.append(induced(*route(u, v), SENSOR_Z - rng.uniform(2.5, 4.0), rng.uniform(0.5, 5.0)))
    sources = np.array(sources)
    segs = []
    start_s = 0.0
    for k in range(n_lines):
        forward = k % 2 == 0
        d = 1.0 if forward else -1.0
        speed = 2.0 + rng.uniform(-0.1, 0.1)
        count = int((LENGTH_M + 2 * RUN_IN_M) / speed / DT_S) + 1
        tt = np.arange(count) * DT_S
        u0 = -RUN_IN_M if forward else LENGTH_M + RUN_IN_M
        v_line = k * SPACING_M

        def antenna_u(t):
            return u0 + d * speed * t

        ae, an = route(antenna_u(tt), np.full(count, v_line))
        ae = ae + rng.normal(0.0, 0.02, count)
        an = an + rng.normal(0.0, 0.02, count)
        for s, across in enumerate(ACROSS):
            true_u = antenna_u(tt - lag_s) - d * LAYBACK_M
            se, sn = route(true_u, np.full(count, v_line + d * across))
            field = 50_000.0 + dipole_total_field(se, sn, np.full(count, SENSOR_Z), sources)
            field += rng.normal(0.0, 0.05, count)
            segs.append({"line": k, "sensor": s, "t": times(count, start_s), "e": ae, "n": an,
                         "field": field, "z": np.full(count, SENSOR_Z)})
        start_s += tt[-1] + 60.0
    return segs, sources


@pytest.fixture(scope="module")
def survey():
    return zigzag_segments()


def offsets_table(**extra):
    return {f"S{i + 1}": {"across_m": a, **extra} for i, a in enumerate(ACROSS)}


@pytest.fixture(scope="module")
def estimated(survey):
    segs, _ = survey
    ds, seg = make_readings(segs)
    return ds, seg, run_stage(ds, seg, sensors=offsets_table(), layback_m=LAYBACK_M)


def peak_along(readings, line, sensor, near_u, half_m=10.0, use_antenna=False):
    """Along-route position (u, m) of the field peak of one segment near ``near_u``.

    Three-point parabolic interpolation of the largest reading (common
    practice, no published source).
    """
    r = readings.compute()
    m = (r["line_index"].values == line) & (r["sensor_index"].values == sensor)
    e = (r["antenna_easting"] if use_antenna else r["easting"]).values[m]
    n = (r["antenna_northing"] if use_antenna else r["northing"]).values[m]
    f = r["total_field"].values[m]
    u = (e - E0) * FORWARD[0] + (n - N0) * FORWARD[1]
    order = np.argsort(u)
    u, f = u[order], f[order]
    window = np.flatnonzero(np.abs(u - near_u) <= half_m)
    j = window[np.argmax(f[window])]
    y0, y1, y2 = f[j - 1 : j + 2]
    frac = 0.5 * (y0 - y2) / (y0 - 2 * y1 + y2)
    return u[j] + frac * 0.5 * (u[j + 1] - u[j - 1])


# --------------------------------------------------------------------------
# Geometry by hand
# --------------------------------------------------------------------------


def test_straight_line_058_hand_computed():
    # Antenna from (E0, N0) along grid azimuth 058 at 2 m/s, no noise.
    # Sensor: across -2 m (port), along +0.5 m, layback 12.1 m, up +0.3 m.
    # By hand, with sin 58 = 0.848048, cos 58 = 0.529919 (trigonometric
    # tables): at T = 30 s the antenna has run s = 60 m; the towed point is
    # at 60 - 12.1 = 47.9 m, the sensor at 47.9 + 0.5 = 48.4 m along and 2 m
    # to port, i.e. E = E0 + 48.4 sin58 - 2 cos58 = E0 + 41.0455 - 1.0598
    # = E0 + 39.9857 m, N = N0 + 48.4 cos58 + 2 sin58 = N0 + 25.6481 + 1.6961
    # = N0 + 27.3442 m. At T = 2 s (s = 4 m, inside the layback) the track is
    # extrapolated straight back: along = 4 - 12.1 + 0.5 = -7.6 m.
    count = 1001
    t = np.arange(count) * DT_S
    seg = {"line": 0, "sensor": 0, "t": times(count), "e": E0 + 2.0 * t * SIN, "n": N0 + 2.0 * t * COS,
           "field": np.full(count, 50_000.0)}
    ds, segments = make_readings([seg])
    result = run_stage(ds, segments, sensors={"S1": {"across_m": -2.0, "along_m": 0.5, "up_m": 0.3}},
                       layback_m=12.1, lag_s=0.0)
    out = result.datasets["readings"].compute()
    validate_readings(out, segments, where="positions output")
    e, n = out["easting"].values, out["northing"].values
    # Straight line and constant speed: the fit and the interpolation are
    # exact, so only rounding remains (1e-6 m).
    assert e[300] - E0 == pytest.approx(39.9857, abs=1e-4)  # 4 decimals of the hand calculation
    assert n[300] - N0 == pytest.approx(27.3442, abs=1e-4)
    along = 2.0 * t - 12.1 + 0.5
    np.testing.assert_allclose(e - E0, along * SIN - 2.0 * COS, atol=1e-6)
    np.testing.assert_allclose(n - N0, along * COS + 2.0 * SIN, atol=1e-6)
    np.testing.assert_allclose(out["heading"].values, AZ_DEG, atol=1e-6)
    np.testing.assert_allclose(out["elevation"].values, -10.0 + 0.3, atol=1e-12)
    np.testing.assert_array_equal(out["antenna_easting"].values, seg["e"])
    assert out["heading"].attrs["units"] == "degree"
    assert out["antenna_northing"].attrs["units"] == "m"
    # Readings with s < 12.1 m, i.e. T <= 6.0 s: 61 of them.
    table = result.tables["positions_by_segment"]
    assert int(table["extrapolated"].iloc[0]) == 61
    assert table["max_extrapolated_m"].iloc[0] == pytest.approx(12.1, abs=1e-6)


def test_circular_arc_hand_computed():
    # Antenna on a circle of radius R = 30 m about (E0, N0), clockwise at
    # 2 m/s (turning to starboard), at azimuth phi from the centre (course
    # phi + 90 deg). A towed point with layback L follows the circle: it is
    # at phi - L / R (arc length = R * angle). Starboard points to the
    # centre, so an across offset d puts the sensor on radius R - d, and an
    # along offset a moves it along the course (cos phi', -sin phi').
    # By hand for phi = 90 deg (antenna due east of the centre, heading 180),
    # L = 12 m, d = +1.5 m, a = +0.5 m: phi' = 90 - (12/30 rad = 22.918 deg)
    # = 67.082 deg, sin = 0.92106, cos = 0.38942; sensor =
    # 28.5 (0.92106, 0.38942) + 0.5 (0.38942, -0.92106)
    # = (26.2502 + 0.1947, 11.0985 - 0.4605) = (26.445, 10.638) m from the
    # centre; course 157.082 deg.
    R, v = 30.0, 2.0
    count = 1201
    t = np.arange(count) * DT_S
    phi0 = np.radians(90.0) - v * 60.0 / R  # phi = 90 deg at t = 60 s
    phi = phi0 + v * t / R
    seg = {"line": 0, "sensor": 0, "t": times(count), "e": E0 + R * np.sin(phi), "n": N0 + R * np.cos(phi),
           "field": np.full(count, 50_000.0)}
    ds, segments = make_readings([seg])
    out = run_stage(ds, segments, sensors={"S1": {"across_m": 1.5, "along_m": 0.5}}, layback_m=12.0,
                    lag_s=0.0).datasets["readings"].compute()
    e, n, h = out["easting"].values - E0, out["northing"].values - N0, out["heading"].values
    # Tolerance 1 mm: the linear interpolation between track points 0.2 m
    # apart cuts the arc by at most the sagitta c**2 / (8 R) = 0.17 mm, and
    # the local quadratic fit's error on a circle is smaller still.
    assert e[600] == pytest.approx(26.445, abs=1e-3)
    assert n[600] == pytest.approx(10.638, abs=1e-3)
    assert h[600] == pytest.approx(157.082, abs=0.01)  # 0.01 deg: 3 decimals of the hand value
    inside = slice(100, count - 30)  # past the first layback (extrapolated) and the end window
    p = phi[inside] - 12.0 / R
    np.testing.assert_allclose(e[inside], 28.5 * np.sin(p) + 0.5 * np.cos(p), atol=1e-3)
    np.testing.assert_allclose(n[inside], 28.5 * np.cos(p) - 0.5 * np.sin(p), atol=1e-3)
    np.testing.assert_allclose(h[inside], np.mod(np.degrees(p) + 90.0, 360.0), atol=0.01)


def test_course_noise_matches_least_squares_slope_error():
    # 2 cm white noise on each antenna coordinate, straight line at 0.2 m
    # spacing, 10 m smoothing window (51 readings, x = -5..5 m). The course
    # error is the error of the fitted cross-track slope; for a symmetric
    # window the quadratic fit's slope is the straight-line slope, whose
    # standard error is sigma / sqrt(sum x**2) (least squares, e.g. Press
    # et al. 2007, Numerical Recipes, ch. 15.2; from memory):
    # sum x**2 = 2 * 0.04 * (25 * 26 * 51 / 6) = 442 m**2, so
    # 0.02 / sqrt(442) = 9.51e-4 rad = 0.0545 deg.
    rng = np.random.default_rng(3)
    count = 20_001
    t = np.arange(count) * DT_S
    seg = {"line": 0, "sensor": 0, "t": times(count), "e": E0 + 2.0 * t * SIN + rng.normal(0, 0.02, count),
           "n": N0 + 2.0 * t * COS + rng.normal(0, 0.02, count), "field": np.full(count, 50_000.0)}
    ds, segments = make_readings([seg])
    out = run_stage(ds, segments, course_smoothing_m=10.0, lag_s=0.0).datasets["readings"]
    h = out["heading"].values[100:-100]
    # The errors of readings within a window are correlated (about 400
    # independent windows here), so the sample deviation is good to about
    # 1 / sqrt(2 * 400) = 4 %; 15 % tolerance.
    assert np.std(h - AZ_DEG) == pytest.approx(0.0545, rel=0.15)


# --------------------------------------------------------------------------
# Time lag
# --------------------------------------------------------------------------


def test_given_lag_moves_positions_back_by_lag_times_speed():
    # Kinematics: a reading measured lag seconds before its time stamp was
    # taken lag * speed metres back along the course (0.3 s * 2 m/s = 0.6 m).
    # The field is a dipole measured at the true position; with the lag
    # applied the profile peak moves back by the same 0.6 m.
    count = 1001
    t = np.arange(count) * DT_S
    src = [induced(*route(100.0, 0.0), SENSOR_Z - 3.0, 8.0)]
    true_u = 2.0 * (t - 0.3)
    field = 50_000.0 + dipole_total_field(*route(true_u, np.zeros(count)), np.full(count, SENSOR_Z), src)
    ae, an = route(2.0 * t, np.zeros(count))
    segs = [{"line": 0, "sensor": 0, "t": times(count), "e": ae, "n": an, "field": field}]
    ds, segments = make_readings(segs)
    plain = run_stage(ds, segments, lag_s=0.0).datasets["readings"]
    lagged = run_stage(ds, segments, lag_s=0.3).datasets["readings"]
    de = plain["easting"].values - lagged["easting"].values
    dn = plain["northing"].values - lagged["northing"].values
    # Exact on a straight line at constant speed: 1e-6 m covers rounding.
    np.testing.assert_allclose(de[10:], 0.6 * SIN, atol=1e-6)
    np.testing.assert_allclose(dn[10:], 0.6 * COS, atol=1e-6)
    shift = peak_along(plain, 0, 0, 100.0) - peak_along(lagged, 0, 0, 100.0)
    assert shift == pytest.approx(0.6, abs=1e-6)
    # The peak of the corrected profile is where the noise-free field peaks
    # on the true track (same parabolic interpolation of the true profile).
    u_fine = np.arange(90.0, 110.0, 0.001)
    f_fine = dipole_total_field(*route(u_fine, np.zeros(u_fine.size)), np.full(u_fine.size, SENSOR_Z), src)
    # 2 cm: the three-point parabola on 0.2 m samples of a peak about 2 m
    # wide (common practice, no published source).
    assert peak_along(lagged, 0, 0, 100.0) == pytest.approx(u_fine[np.argmax(f_fine)], abs=0.02)


def test_sensor_lag_overrides_stage_lag():
    count = 501
    t = np.arange(count) * DT_S
    ae, an = route(2.0 * t, np.zeros(count))
    segs = [{"line": 0, "sensor": s, "t": times(count), "e": ae, "n": an, "field": np.full(count, 5e4)}
            for s in range(2)]
    ds, segments = make_readings(segs)
    result = run_stage(ds, segments, lag_s=0.2, sensors={"S1": {"lag_s": 0.5}, "S2": {}})
    out = result.datasets["readings"]
    u = (out["easting"].values - E0) * SIN + (out["northing"].values - N0) * COS
    # Kinematics: 0.5 s and 0.2 s at 2 m/s put the sensors 1.0 m and 0.4 m
    # behind the antenna (exact on a straight line).
    np.testing.assert_allclose(u[:count][20:], 2.0 * t[20:] - 1.0, atol=1e-6)
    np.testing.assert_allclose(u[count:][20:], 2.0 * t[20:] - 0.4, atol=1e-6)
    assert result.summary["lag_s_S1"] == 0.5 and result.summary["lag_s_S2"] == 0.2
    assert len(result.tables["lag_estimate"]) == 0


def test_zigzag_lag_recovered_within_uncertainty(estimated):
    _, _, result = estimated
    est, unc = result.summary["lag_estimate_s"], result.summary["lag_uncertainty_s"]
    table = result.tables["lag_estimate"]
    # Seven line pairs, each with one shared track (S3, S1, S3, ...).
    assert int(table["used"].sum()) == 7
    assert set(table["sensor_a"]) == {"S1", "S3"}
    assert (table["sensor_a"] == table["sensor_b"]).all()
    # Within three standard errors (a 0.3 % chance of failing for a correct
    # Gaussian error); the uncertainty itself must be small enough to mean
    # something: 0.02 s is a 0.08 m shift between opposite lines at 2 m/s.
    assert abs(est - LAG_TRUE_S) <= 3.0 * unc
    assert 0.0 < unc < 0.02
    assert all(result.summary[f"lag_s_S{i}"] == est for i in (1, 2, 3))


def test_dipole_peaks_of_opposite_lines_agree_after_correction(estimated):
    ds, _, result = estimated
    out = result.datasets["readings"]
    # The strong dipole lies under S3 (index 2) of lines 1 and 2 (indices 0,
    # 1), run in opposite directions. On the same track the field of a
    # point dipole (Blakely 1995, closed form) peaks at one along-track
    # place whatever the direction, so after the lag, layback and offsets
    # are applied the two peaks must coincide; 0.1 m is the requirement of
    # the stage (2 * speed * lag error, i.e. 0.025 s of lag at 2 m/s).
    forward = peak_along(out, 0, 2, STRONG[0])
    backward = peak_along(out, 1, 2, STRONG[0])
    assert abs(forward - backward) < 0.1
    # Before correction (antenna positions at the time stamps) they are
    # 2 * (layback + lag * speed), about 13 m apart: the check can fail.
    raw_f = peak_along(out, 0, 2, STRONG[0] + 6.5, use_antenna=True)
    raw_b = peak_along(out, 1, 2, STRONG[0] - 6.5, use_antenna=True)
    assert abs(raw_f - raw_b) > 10.0


def test_chunking_does_not_change_the_result(survey, estimated):
    segs, _ = survey
    _, _, one = estimated
    ds, seg = make_readings(segs, chunk_target=len(segs[0]["t"]))
    assert ds["total_field"].data.numblocks[0] == len(segs)
    many = run_stage(ds, seg, sensors=offsets_table(), layback_m=LAYBACK_M)
    assert many.summary == one.summary
    a, b = one.datasets["readings"].compute(), many.datasets["readings"].compute()
    for name in ("easting", "northing", "heading", "elevation"):
        np.testing.assert_array_equal(a[name].values, b[name].values)


def test_median_standard_error_matches_monte_carlo():
    # The sample median of n Gaussian values has standard error
    # sqrt(pi / 2) sigma / sqrt(n) for large n (Stuart & Ord 1994, Kendall's
    # Advanced Theory of Statistics; from memory); combine() estimates sigma
    # from the MAD (Rousseeuw & Croux 1993). Over 4000 trials of 15 values
    # (sigma 0.05 s) the mean estimate must match the spread of the medians
    # within 15 % (the asymptotic formula is a few % off at n = 15, and the
    # MAD is biased low by a few % at that size).
    rng = np.random.default_rng(11)
    samples = rng.normal(0.3, 0.05, (4000, 15))
    medians = np.median(samples, axis=1)
    estimates = [combine(s, np.zeros(15))["se_scatter_s"] for s in samples[:500]]
    assert np.mean(estimates) == pytest.approx(np.std(medians), rel=0.15)
    assert combine([0.3], [0.01])["uncertainty_s"] == pytest.approx(np.sqrt(np.pi / 2) * 0.01)


# --------------------------------------------------------------------------
# Parameters and bad input
# --------------------------------------------------------------------------


def small_survey():
    count = 201
    t = np.arange(count) * DT_S
    ae, an = route(2.0 * t, np.zeros(count))
    segs = [{"line": 0, "sensor": s, "t": times(count), "e": ae, "n": an, "field": np.full(count, 5e4)}
            for s in range(2)]
    return make_readings(segs)


def test_unknown_sensor_in_table_is_a_one_line_error():
    ds, seg = small_survey()
    with pytest.raises(ParameterError) as err:
        run_stage(ds, seg, lag_s=0.0, sensors={"S9": {"across_m": 1.0}})
    message = str(err.value)
    assert "positions.sensors.S9" in message and "S1, S2" in message and "\n" not in message


@pytest.mark.parametrize(
    "sensors, words",
    [
        ({"S1": 2.0}, "must be a table"),
        ({"S1": {"acros_m": 1.0}}, "across_m"),
        ({"S1": {"across_m": "port"}}, "wrong type"),
        ({"S1": {"layback_m": -1.0}}, "out of range"),
    ],
)
def test_bad_sensor_entries(sensors, words):
    ds, seg = small_survey()
    with pytest.raises(ParameterError, match=words):
        run_stage(ds, seg, lag_s=0.0, sensors=sensors)


def test_sensor_missing_from_table_warns_and_gets_zero_offsets(caplog):
    ds, seg = small_survey()
    with caplog.at_level(logging.WARNING, logger="lodeline.test.positions"):
        out = run_stage(ds, seg, lag_s=0.0, sensors={"S1": {"across_m": 2.0}}).datasets["readings"]
    assert any("S2" in r.getMessage() and "zero offsets" in r.getMessage() for r in caplog.records)
    # S2 keeps the (smoothed, noise-free, so exact) antenna track: 1e-6 m.
    e = out["easting"].values
    np.testing.assert_allclose(e[201:], ds["easting"].values[201:], atol=1e-6)
    np.testing.assert_allclose(e[:201] - ds["easting"].values[:201], 2.0 * COS, atol=1e-6)


def test_no_opposite_lines_means_lag_must_be_given():
    ds, seg = small_survey()
    with pytest.raises(DataError, match="positions.lag_s"):
        run_stage(ds, seg)


def test_lag_per_sensor(survey):
    # Each of S1 and S3 has its own opposite-direction passes; S2 has none
    # and is given the lag. Tolerance: three of the reported standard errors.
    segs, _ = survey
    ds, seg = make_readings(segs)
    table = offsets_table()
    table["S2"]["lag_s"] = 0.1
    result = run_stage(ds, seg, sensors=table, layback_m=LAYBACK_M, lag_per_sensor=True)
    s = result.summary
    for name in ("S1", "S3"):
        assert abs(s[f"lag_estimate_s_{name}"] - LAG_TRUE_S) <= 3.0 * s[f"lag_uncertainty_s_{name}"]
        assert s[f"lag_s_{name}"] == s[f"lag_estimate_s_{name}"]
    assert s["lag_s_S2"] == 0.1 and "lag_estimate_s_S2" not in s
    # Without the given lag S2 cannot be estimated on its own.
    del table["S2"]["lag_s"]
    with pytest.raises(DataError, match="sensor S2"):
        run_stage(ds, seg, sensors=table, layback_m=LAYBACK_M, lag_per_sensor=True)
