"""Tests of the heading-error stage (``lodeline.steps.heading`` and its helpers).

All data are invented: straight lines over a smooth regional field, per
sensor offsets, drifts and heading errors ``a + b cos(h) + c sin(h)``, white
Gaussian noise and a few compact anomalies. Every numerical check names its
outside source or says it is common practice.
"""

from __future__ import annotations

import logging
from pathlib import Path

import dask.array as da
import numpy as np
import pytest
import scipy.interpolate
import scipy.sparse as sp
import xarray as xr

from lodeline.model import DataError, StageContext, flag_attrs, segment_chunks, segments_dataset, validate_readings
from lodeline.params import ParameterError
from lodeline.progress import make_progress
from lodeline.steps import _heading_bins as hbins
from lodeline.steps import _heading_fit as hfit
from lodeline.steps import _heading_table as htable
from lodeline.steps import heading as heading

T0 = np.datetime64("2026-05-14T07:40:00", "ns")
MAIN_NT = 49_900.0
SENSORS = ("S1", "S2", "S3", "S4", "S5")
CROSS_M = (-2.0, -1.0, 0.0, 1.0, 2.0)  # positive to starboard
# Per-sensor values of the invented survey (same sizes as the demo survey's).
OFFSET_NT = (3.2, -1.8, 0.9, -2.6, 1.5)
DRIFT_NT_H = (0.8, -1.4, 0.6, 1.9, -1.1)
A_NT = (0.6, -0.4, 0.3, -0.7, 0.5)
B_NT = (1.8, -1.2, 2.4, 0.9, -1.6)
C_NT = (-0.9, 2.1, 0.7, -1.8, 1.3)


# --------------------------------------------------------------------------
# Synthetic survey builder
# --------------------------------------------------------------------------


def regional(u, v):
    """Smooth invented regional field, nT: two long waves and a gentle slope."""
    return (
        10.0 * np.sin(2 * np.pi * (0.8 * u + 0.6 * v) / 900.0 + 0.4)
        + 4.0 * np.cos(2 * np.pi * (0.3 * u - 0.95 * v) / 500.0 + 1.1)
        + 0.01 * u
    )


def build_survey(
    *,
    n_along=16,
    along_length_m=300.0,
    spacing_m=4.0,
    n_cross=4,
    cross_run_m=10.0,
    theta_deg=58.0,
    noise_nT=0.2,
    step_m=0.2,
    speed_m_s=2.0,
    anomalies=(),
    spikes=0,
    drop=None,
    chunk_target=None,
    seed=1,
):
    """Readings (model conventions, plus ``residual`` and ``heading``) and segments of an invented survey.

    Survey lines along the route axis ``theta_deg`` at ``v = k * spacing_m``,
    alternating direction, then ``n_cross`` tie lines across the route at
    even spacing along it, alternating too. Sensors sit ``CROSS_M`` to
    starboard of the course. ``anomalies`` are (u, v, peak nT, half-width m)
    Gaussian bumps standing for targets; ``drop`` is a function
    ``(line_kind, forward, sensor) -> bool`` giving segments whose residual
    is NaN (sensor off).
    """
    rng = np.random.default_rng(seed)
    th = np.radians(theta_deg)
    lines = []  # (name, kind, u array, v array (line centre), course rad, forward)
    v_max = (n_along - 1) * spacing_m
    for k in range(n_along):
        s = np.arange(0.0, along_length_m + 1e-9, step_m)
        fwd = k % 2 == 0
        u = s if fwd else along_length_m - s
        lines.append((f"L{k + 1:03d}", "survey", u, np.full(s.size, k * spacing_m), th if fwd else th + np.pi, fwd))
    for m in range(n_cross):
        s = np.arange(0.0, v_max + 2 * cross_run_m + 1e-9, step_m)
        fwd = m % 2 == 0
        v = -cross_run_m + (s if fwd else s[::-1])
        u_line = (m + 0.5) * along_length_m / n_cross
        lines.append((f"T{m + 1:02d}", "tie", np.full(s.size, u_line), v, th + (np.pi / 2 if fwd else -np.pi / 2), fwd))

    parts = {k: [] for k in ("e", "n", "t", "f", "h", "line", "sensor")}
    t_start = 0.0
    for li, (name, kind, u_c, v_c, course, fwd) in enumerate(lines):
        t = t_start + np.arange(u_c.size) * step_m / speed_m_s
        t_start = t[-1] + 120.0
        # starboard of the course, in (u, v): course direction (cos(course-th), sin(course-th)) rotated by +90 deg
        du, dv = np.cos(course - th), np.sin(course - th)
        su, sv = -dv, du
        for j in range(len(SENSORS)):
            u = u_c + CROSS_M[j] * su
            v = v_c + CROSS_M[j] * sv
            e = 500_000.0 + u * np.sin(th) + v * np.cos(th)
            n = 6_000_000.0 + u * np.cos(th) - v * np.sin(th)
            h = np.full(u.size, np.degrees(course) % 360.0)
            hr = np.radians(h)
            f = (
                regional(u, v)
                + OFFSET_NT[j]
                + DRIFT_NT_H[j] * t / 3600.0
                + A_NT[j]
                + B_NT[j] * np.cos(hr)
                + C_NT[j] * np.sin(hr)
                + rng.normal(0.0, noise_nT, u.size)
            )
            for au, av, peak, width in anomalies:
                f += peak * np.exp(-((u - au) ** 2 + (v - av) ** 2) / (2 * width**2))
            if spikes:
                at = rng.integers(0, u.size, spikes)
                f[at] += rng.choice([-1, 1], spikes) * rng.uniform(20, 200, spikes)
            if drop is not None and drop(kind, fwd, j):
                f[:] = np.nan
            for key, val in (("e", e), ("n", n), ("t", t), ("f", f), ("h", h)):
                parts[key].append(val)
            parts["line"].append(np.full(u.size, li, dtype=np.int32))
            parts["sensor"].append(np.full(u.size, j, dtype=np.int16))
    cat = {k: np.concatenate(v) for k, v in parts.items()}
    n_read = cat["f"].size
    segs = segments_dataset(cat["line"], cat["sensor"])
    time = T0 + (cat["t"] * 1e9).astype("timedelta64[ns]")
    ds = xr.Dataset(
        {
            "total_field": ("reading", cat["f"] + MAIN_NT, {"units": "nT"}),
            "flags": ("reading", np.zeros(n_read, dtype=np.uint32), flag_attrs()),
            "residual": ("reading", cat["f"], {"units": "nT", "long_name": "residual"}),
        },
        coords={
            "time": ("reading", time),
            "easting": ("reading", cat["e"], {"units": "m"}),
            "northing": ("reading", cat["n"], {"units": "m"}),
            "elevation": ("reading", np.full(n_read, -10.0), {"units": "m"}),
            "altitude": ("reading", np.full(n_read, 2.5), {"units": "m"}),
            "line_index": ("reading", cat["line"]),
            "sensor_index": ("reading", cat["sensor"]),
            "source_file": ("reading", np.zeros(n_read, dtype=np.int16)),
            "source_row": ("reading", np.arange(1, n_read + 1, dtype=np.int64)),
            "heading": ("reading", cat["h"], {"units": "degree"}),
        },
        attrs={
            "crs": "EPSG:32631",
            "crs_wkt": "WKT",
            "line_names": [ln[0] for ln in lines],
            "line_kinds": [ln[1] for ln in lines],
            "sensor_names": list(SENSORS),
            "source_files": ["synthetic"],
        },
    )
    lengths = (segs["stop"] - segs["start"]).values
    target = chunk_target or n_read
    ds = ds.chunk({"reading": segment_chunks(lengths, target)})
    validate_readings(ds, segs, where="test")
    return ds, segs


def context(tmp_path: Path) -> StageContext:
    return StageContext(
        survey={"crs": "EPSG:32631", "crs_wkt": "WKT", "name": "t"},
        inputs={},
        scratch=tmp_path,
        log=logging.getLogger("test"),
        progress=make_progress(False),
    )


def run_stage(readings, segments, params, tmp_path):
    return heading.run({"main_field": {"readings": readings, "segments": segments}}, params, context(tmp_path))


def true_along_across(theta_deg):
    """Heading coefficients rotated to the line axis: A = b cos(theta) + c sin(theta), C = -b sin + c cos."""
    th = np.radians(theta_deg)
    b, c = np.asarray(B_NT), np.asarray(C_NT)
    return b * np.cos(th) + c * np.sin(th), -b * np.sin(th) + c * np.cos(th)


# --------------------------------------------------------------------------
# Helpers checked against general-purpose libraries
# --------------------------------------------------------------------------


def test_cubic_bspline_matches_scipy():
    """Outside reference: scipy.interpolate.BSpline.design_matrix (de Boor's recursion) on the same knots.

    Tolerance 1e-12: both evaluate the same cubic polynomials in double precision.
    """
    spacing, x0, intervals = 20.0, -13.0, 7
    x = np.random.default_rng(3).uniform(x0, x0 + intervals * spacing, 400)
    idx, w = hfit.cubic_bspline(x, x0, spacing, intervals)
    mine = np.zeros((x.size, intervals + 3))
    np.put_along_axis(mine, idx, w, axis=1)
    knots = x0 + spacing * np.arange(-3, intervals + 4)
    ref = scipy.interpolate.BSpline.design_matrix(x, knots, 3).toarray()
    np.testing.assert_allclose(mine, ref, rtol=0, atol=1e-12)


def test_group_median_matches_numpy():
    """Outside reference: numpy.median of each group (odd and even sizes); exact equality expected."""
    rng = np.random.default_rng(4)
    key = rng.integers(0, 30, 1000)
    value = rng.normal(size=1000)
    keys, med, counts = hbins.group_median(key, value)
    for k, m, c in zip(keys, med, counts):
        assert c == np.sum(key == k)
        assert m == np.median(value[key == k])


def test_course_axis_is_undirected():
    """Courses 58 and 238 degrees share the axis 58 degrees (by construction of the doubled angle)."""
    h = np.radians([58.0, 238.0, 238.0, 58.0, 60.0])
    assert np.degrees(hfit.course_axis(np.cos(h), np.sin(h))) == pytest.approx(58.4, abs=0.05)


# --------------------------------------------------------------------------
# Estimate: recovery against least-squares theory and numpy.linalg.lstsq
# --------------------------------------------------------------------------


def test_estimate_balanced_grid_matches_lstsq_and_theory(tmp_path):
    """Known b, c recovered within 3 standard errors of least-squares theory; solution equals numpy's lstsq.

    A square block flown both ways in both directions (25 lines along the
    axis, 25 across, alternating), so that for each sensor the regressor
    cos(h - theta) is +-1 on the bins of the lines along and 0 on the
    others, and sin(h - theta) the other way round. For a linear
    least-squares fit with independent errors of standard deviation sigma,
    a coefficient whose regressor takes the values +-1 on N/2 of the N bins
    of its sensor (and is nearly orthogonal to the other columns) has the
    standard error sigma / sqrt(N / 2) (Draper & Smith 1998, Applied
    Regression Analysis, ch. 5, var(beta) = sigma**2 (X'X)^-1; from memory),
    and since b = A cos(theta) - C sin(theta) with A and C independent and
    of that error, b and c have it too. With the bin mean as the level and
    25 readings per 5 m bin, sigma = noise / sqrt(25).
    """
    noise = 0.3
    readings, segments = build_survey(
        n_along=25, along_length_m=100.0, n_cross=25, cross_run_m=2.0, theta_deg=30.0, noise_nT=noise, seed=11
    )
    params = {"level_statistic": "mean", "robust": False}
    out = run_stage(readings, segments, params, tmp_path)
    table = out.tables["heading_coefficients"].set_index("sensor")

    settings = heading.check_params(params)
    chunks = readings["residual"].chunks
    bins = heading.level_bins(readings, segments, chunks, settings)
    counts = bins.groupby("sensor")["count"]
    assert counts.median().min() == 25  # 5 m at 0.2 m steps
    sigma_bin = noise / np.sqrt(25.0)
    for j, name in enumerate(SENSORS):
        n_bins = int(counts.size()[j])
        se = sigma_bin / np.sqrt(n_bins / 2.0)
        row = table.loc[name]
        assert row["estimated"] == "along and across"
        assert abs(row["b_nT"] - B_NT[j]) < 3 * se, (name, row["b_nT"], se)
        assert abs(row["c_nT"] - C_NT[j]) < 3 * se, (name, row["c_nT"], se)
        # The reported error treating bins as independent follows the same theory: within 15 % (the spline and
        # drift columns take a few degrees of freedom and the bins are not all exactly 25 readings).
        assert row["b_se_bins_nT"] == pytest.approx(se, rel=0.15)
        assert row["c_se_bins_nT"] == pytest.approx(se, rel=0.15)
        # Clustered by line (50 clusters): its own sampling error is about 1/sqrt(2 * 50) = 10 %, so within 35 %.
        assert row["b_se_lines_nT"] == pytest.approx(se, rel=0.35)
        assert row["b_se_nT"] == max(row["b_se_lines_nT"], row["b_se_bins_nT"])

    # The same design solved by numpy.linalg.lstsq (general-purpose reference, LAPACK gelsd) on the
    # augmented system [X; P] beta = [y; 0]. Tolerance 1e-8 nT: two exact solvers of a well-conditioned
    # system differ by rounding only.
    survey = bins[bins["kind"] == "survey"]
    theta = hfit.course_axis(survey["cos"], survey["sin"], survey["count"])  # the line axis, as the stage takes it
    assert np.degrees(theta) == pytest.approx(out.summary["line_axis_deg"], abs=1e-9)
    fs = heading._fit_settings(settings)
    design = hfit.build_design(bins, theta, list(range(5)), list(range(5)), fs)
    beta, _ = hfit.solve(design, np.ones(design.y.size))
    A = sp.vstack([design.X, design.P]).toarray()
    rhs = np.r_[design.y, np.zeros(design.P.shape[0])]
    ref = np.linalg.lstsq(A, rhs, rcond=None)[0]
    cols = [c for j in range(5) for c in design.heading[j]]
    np.testing.assert_allclose(beta[cols], ref[cols], rtol=0, atol=1e-8)
    ct, st = np.cos(theta), np.sin(theta)
    for j, name in enumerate(SENSORS):
        a_ref, c_ref = ref[design.heading[j][0]], ref[design.heading[j][1]]
        assert table.loc[name, "b_nT"] == pytest.approx(a_ref * ct - c_ref * st, abs=1e-8)
        assert table.loc[name, "c_nT"] == pytest.approx(a_ref * st + c_ref * ct, abs=1e-8)


def test_estimate_demo_like_survey_robust(tmp_path):
    """Demo-like survey (16 alternating lines 4 m apart, 4 ties, targets, spikes): b, c within 3 reported errors.

    Default parameters (bin medians, robust weights). The tolerance is
    three of the reported standard errors (the larger of the line-clustered
    and the independent-bin estimates); those errors
    must themselves be small, below 0.05 nT: with 0.2 nT noise a 25-reading
    bin median has sigma = 1.2533 * 0.2 / 5 = 0.05 nT (large-sample
    variance of the median, pi sigma**2 / (2 n); Kendall & Stuart 1977,
    The Advanced Theory of Statistics, vol. 1, from memory), and each
    sensor has hundreds of survey-line bins and dozens of tie-line bins.
    The along-axis error, from the ~960 survey bins of a sensor alone,
    follows sigma / sqrt(N): checked within a factor 0.5-2 (robust weights
    and line clustering change it by tens of per cent).
    """
    anomalies = [
        (40.0, 10.0, 150.0, 2.0), (120.0, 33.0, -80.0, 3.0), (210.0, 50.0, 300.0, 2.5), (75.0, 22.0, 60.0, 1.5)
    ]
    readings, segments = build_survey(noise_nT=0.2, anomalies=anomalies, spikes=3, seed=5)
    out = run_stage(readings, segments, {}, tmp_path)
    table = out.tables["heading_coefficients"].set_index("sensor")
    by_line = out.tables["heading_by_line"]
    along_true, _ = true_along_across(58.0)
    for j, name in enumerate(SENSORS):
        row = table.loc[name]
        assert row["estimated"] == "along and across"
        assert row["b_se_nT"] < 0.05 and row["c_se_nT"] < 0.05
        assert abs(row["b_nT"] - B_NT[j]) < 3 * row["b_se_nT"], (name, row["b_nT"], row["b_se_nT"])
        assert abs(row["c_nT"] - C_NT[j]) < 3 * row["c_se_nT"], (name, row["c_nT"], row["c_se_nT"])
        n_survey = int(by_line[(by_line["sensor"] == name) & (by_line["kind"] == "survey")]["bins"].sum())
        theory = 1.2533 * 0.2 / 5.0 / np.sqrt(n_survey)
        assert 0.5 * theory < row["along_se_nT"] < 2.0 * theory
        assert abs(row["along_nT"] - along_true[j]) < 3 * row["along_se_nT"]
        # The fitted drift is the generator's, to within the noise (the drift of a sensor is seen over
        # 20 lines and 2.7 h: 0.05 nT/h is well above its standard error, a few thousandths).
        assert row["drift_nT_per_h"] == pytest.approx(DRIFT_NT_H[j], abs=0.05)
    # Levels hold offset + a (a is not separable from the offset) at the middle time of the survey, about
    # their mean; 0.05 nT as for the drift.
    t = (readings["time"].values - T0).astype(np.float64) / 3.6e12
    t_mid = 0.5 * (t.min() + t.max())
    level_true = np.asarray(OFFSET_NT) + np.asarray(A_NT) + np.asarray(DRIFT_NT_H) * t_mid
    np.testing.assert_allclose(table["level_nT"].to_numpy(), level_true - level_true.mean(), atol=0.05)

    # The correction removed from each reading is b cos(h) + c sin(h) with the fitted b, c.
    r = out.datasets["readings"]
    assert isinstance(r["heading_error"].data, da.Array)
    sel = r.isel(reading=slice(0, None, 997)).compute()
    s = sel["sensor_index"].values
    hr = np.radians(sel["heading"].values)
    expect = table["b_nT"].to_numpy()[s] * np.cos(hr) + table["c_nT"].to_numpy()[s] * np.sin(hr)
    np.testing.assert_allclose(sel["heading_error"].values, expect, rtol=0, atol=1e-12)
    np.testing.assert_allclose(
        sel["residual"].values, readings["residual"].values[::997] - expect, rtol=0, atol=1e-9
    )
    assert r["heading_error"].attrs["units"] == "nT" and r["heading_error"].attrs["role"] == "correction"


def test_estimate_chunking_invariant(tmp_path):
    """The estimate and the correction do not depend on how whole segments are grouped into chunks (exact)."""
    one, segs = build_survey(n_along=6, along_length_m=120.0, n_cross=2, seed=8)
    many, _ = build_survey(n_along=6, along_length_m=120.0, n_cross=2, seed=8, chunk_target=700)
    assert len(many["residual"].chunks[0]) > 10 and len(one["residual"].chunks[0]) == 1
    out1 = run_stage(one, segs, {}, tmp_path)
    out2 = run_stage(many, segs, {}, tmp_path)
    cols = ["b_nT", "c_nT", "b_se_nT", "c_se_nT", "level_nT"]
    t1, t2 = out1.tables["heading_coefficients"], out2.tables["heading_coefficients"]
    np.testing.assert_allclose(t1[cols].to_numpy(float), t2[cols].to_numpy(float), rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(
        out1.datasets["readings"]["heading_error"].values, out2.datasets["readings"]["heading_error"].values
    )


def test_sensor_with_one_heading_gets_warning_and_zero(tmp_path, caplog):
    """S2 recorded only on the lines flown one way: a warning naming it, 'none', and a zero correction."""
    readings, segments = build_survey(
        n_along=8, along_length_m=150.0, n_cross=2, seed=9,
        drop=lambda kind, fwd, j: j == 1 and not (kind == "survey" and fwd),
    )
    with caplog.at_level(logging.WARNING, logger="test"):
        out = run_stage(readings, segments, {}, tmp_path)
    table = out.tables["heading_coefficients"].set_index("sensor")
    assert table.loc["S2", "estimated"] == "none"
    assert table.loc["S2", "b_nT"] == 0.0 and table.loc["S2", "c_nT"] == 0.0
    assert any("sensor S2" in rec.message and "correction is 0" in rec.message for rec in caplog.records)
    r = out.datasets["readings"]
    corr = r["heading_error"].values[r["sensor_index"].values == 1]
    assert np.all(corr == 0.0)
    assert table.loc["S1", "estimated"] == "along and across"
    assert out.summary["sensors_corrected"] == 4


def test_no_usable_readings_gives_zero_correction(tmp_path, caplog):
    """Every reading flagged as a dropout: one warning per sensor, zero correction, no crash."""
    readings, segments = build_survey(n_along=4, along_length_m=60.0, n_cross=0, seed=4)
    readings = readings.assign(flags=readings["flags"] | np.uint32(2))  # bit 1 = dropout
    with caplog.at_level(logging.WARNING, logger="test"):
        out = run_stage(readings, segments, {}, tmp_path)
    assert sum("correction is 0" in rec.message for rec in caplog.records) == 5
    assert float(abs(out.datasets["readings"]["heading_error"]).max()) == 0.0
    assert (out.tables["heading_coefficients"]["estimated"] == "none").all()


def test_no_tie_lines_estimates_along_axis_only(tmp_path, caplog):
    """Without tie lines only A = b cos(theta) + c sin(theta) is identifiable (lines at theta and theta + 180).

    The across term is set to 0 with a warning; A is recovered within three
    reported standard errors (as above).
    """
    readings, segments = build_survey(n_cross=0, noise_nT=0.2, seed=6)
    with caplog.at_level(logging.WARNING, logger="test"):
        out = run_stage(readings, segments, {}, tmp_path)
    table = out.tables["heading_coefficients"].set_index("sensor")
    along_true, _ = true_along_across(58.0)
    th = np.radians(58.0)
    for j, name in enumerate(SENSORS):
        row = table.loc[name]
        assert row["estimated"] == "along only" and row["across_nT"] == 0.0
        assert abs(row["along_nT"] - along_true[j]) < 3 * row["along_se_nT"]
        assert row["b_nT"] == pytest.approx(row["along_nT"] * np.cos(th), abs=1e-12)
    assert sum("only the along-axis term" in rec.message for rec in caplog.records) == 5


def test_unknown_course_gives_nan_correction(tmp_path):
    """A reading with NaN heading gets a NaN correction (and residual), counted in the summary."""
    readings, segments = build_survey(n_along=6, along_length_m=120.0, n_cross=2, seed=2)
    h = readings["heading"].values.copy()
    h[[10, 11, 5000]] = np.nan
    readings = readings.assign_coords(heading=("reading", h, {"units": "degree"}))
    out = run_stage(readings, segments, {}, tmp_path)
    assert out.summary["readings_without_heading"] == 3
    corr = out.datasets["readings"]["heading_error"].values
    assert np.isnan(corr[[10, 11, 5000]]).all() and np.isfinite(np.delete(corr, [10, 11, 5000])).all()


# --------------------------------------------------------------------------
# Table method
# --------------------------------------------------------------------------


def test_table_interpolation_by_hand():
    """Periodic linear interpolation of a heading-test table, values worked out by hand.

    Table (unsorted on purpose): 0 -> 2, 90 -> -1, 180 -> -3, 270 -> 1 nT.
    45: halfway 0..90 -> (2 - 1) / 2 = 0.5. 135: halfway 90..180 -> -2.
    315: halfway 270..360, and 360 is 0 -> (1 + 2) / 2 = 1.5.
    350: 80/90 of the way from 270 to 360 -> 1 + (80/90) * 1 = 1.8889.
    -10 is 350; 720 is 0 -> 2. Tolerance 1e-12 (exact arithmetic up to rounding).
    """
    model = htable.parse_table(
        {"S1": {"heading_deg": [180, 0, 270, 90], "correction_nT": [-3.0, 2.0, 1.0, -1.0]}}, ["S1"]
    )[0]
    got = htable.evaluate(model, [45.0, 135.0, 315.0, 350.0, -10.0, 720.0, 90.0, np.nan])
    want = [0.5, -2.0, 1.5, 1.0 + 80.0 / 90.0, 1.0 + 80.0 / 90.0, 2.0, -1.0]
    np.testing.assert_allclose(got[:-1], want, rtol=0, atol=1e-12)
    assert np.isnan(got[-1])


def test_table_method_applies_table_and_coefficients(tmp_path):
    """Method 'table': a heading-test table for S1 and coefficients for the others, removed as given.

    Coefficients by hand at course 58 deg: cos 58 = 0.529919, sin 58 = 0.848048
    (Abramowitz & Stegun 1964, table 4.10, to 6 figures, from memory), so
    S2 = {a 0.5, b 1, c -2} gives 0.5 + 0.529919 - 1.696096 = -0.666177 nT;
    tolerance 1e-6 nT for the six figures.
    """
    readings, segments = build_survey(n_along=2, along_length_m=40.0, n_cross=0, seed=3)
    table = {
        "S1": {"heading_deg": [58.0, 238.0], "correction_nT": [1.25, -0.75]},
        "S2": {"a_nT": 0.5, "b_nT": 1.0, "c_nT": -2.0},
        "S3": {"b_nT": 0.0},
        "S4": {"c_nT": 1.0},
        "S5": {"heading_deg": [0.0, 180.0], "correction_nT": [1.0, -1.0]},
    }
    out = run_stage(readings, segments, {"method": "table", "table": table}, tmp_path)
    r = out.datasets["readings"].compute()
    h = r["heading"].values
    s = r["sensor_index"].values
    corr = r["heading_error"].values
    fwd = np.isclose(h, 58.0)
    assert np.allclose(corr[(s == 0) & fwd], 1.25) and np.allclose(corr[(s == 0) & ~fwd], -0.75)
    assert corr[(s == 1) & fwd] == pytest.approx(np.full(np.sum((s == 1) & fwd), -0.666177), abs=1e-6)
    assert np.all(corr[s == 2] == 0.0)
    assert corr[(s == 3) & fwd] == pytest.approx(np.full(np.sum((s == 3) & fwd), 0.848048), abs=1e-6)
    # S5: 58 deg lies 58/180 of the way from 0 (1 nT) to 180 (-1 nT): 1 - 2 * 58 / 180.
    assert corr[(s == 4) & fwd] == pytest.approx(np.full(np.sum((s == 4) & fwd), 1 - 2 * 58 / 180), abs=1e-12)
    np.testing.assert_allclose(r["residual"].values, readings["residual"].values - corr, rtol=0, atol=1e-9)
    assert out.tables["heading_coefficients"].set_index("sensor").loc["S2", "a_nT"] == 0.5


def test_method_none_adds_zero_correction(tmp_path):
    readings, segments = build_survey(n_along=2, along_length_m=40.0, n_cross=0, seed=3)
    out = run_stage(readings, segments, {"method": "none"}, tmp_path)
    r = out.datasets["readings"]
    assert float(abs(r["heading_error"]).max()) == 0.0
    np.testing.assert_array_equal(r["residual"].values, readings["residual"].values)


# --------------------------------------------------------------------------
# Bad input: one-line errors naming the key
# --------------------------------------------------------------------------


@pytest.mark.parametrize(
    "params, words",
    [
        ({"method": "table"}, "needs heading.table"),
        ({"method": "tabel"}, "did you mean 'table'"),
        ({"bin_m": 0.0}, "heading.bin_m"),
        ({"knot_spacing": 20.0}, "did you mean 'knot_spacing_m'"),
        ({"exclude_flags": ["spike", "spikes"]}, "heading.exclude_flags[1]"),
    ],
)
def test_bad_parameters(params, words):
    with pytest.raises(ParameterError, match=None) as err:
        heading.check_params(params)
    assert words in str(err.value) and "\n" not in str(err.value)


@pytest.mark.parametrize(
    "table, words",
    [
        ({"S1": {"heading_deg": [0, 90]}}, "correction_nT is missing"),
        ({"S1": {"heading_deg": [0, 90], "correction_nT": [1.0]}}, "one correction per heading"),
        ({"S1": {"heading_deg": [0, 360], "correction_nT": [1.0, 2.0]}}, "two different headings"),
        ({"S1": {"b_nT": 1.0, "heading_deg": [0, 90]}}, "not both"),
        ({"S1": {"b_nt": 1.0}}, "did you mean 'b_nT'"),
        ({"S1": {"b_nT": "x"}}, "heading.table.S1.b_nT"),
        ({"S1": {"b_nT": 1.0}, "S9": {"b_nT": 1.0}}, "heading.table.S9"),
        ({"S2": {"b_nT": 1.0}}, "no entry for sensor S1"),
    ],
)
def test_bad_tables(table, words):
    with pytest.raises(ParameterError) as err:
        htable.parse_table(table, ["S1", "S2"] if "S2" in table else ["S1"])
    assert words in str(err.value) and "\n" not in str(err.value)


def test_missing_heading_is_a_data_error(tmp_path):
    readings, segments = build_survey(n_along=2, along_length_m=40.0, n_cross=0, seed=3)
    with pytest.raises(DataError, match="positions stage"):
        run_stage(readings.drop_vars("heading"), segments, {}, tmp_path)


def test_stage_declaration():
    st = heading.STAGE
    assert st.name == "heading" and st.after == ("main_field",) and st.order == 50
    assert {p.name for p in st.params} >= {"method", "table", "min_lines", "level_statistic"}
