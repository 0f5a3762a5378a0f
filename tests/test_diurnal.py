"""Tests of the diurnal-correction stage (``lodeline.steps.diurnal``).

All data are invented: survey lines sampled at 10 Hz over a constant field,
a synthetic external field (a daily variation plus micropulsations) seen by
the readings and by a 1 Hz base station with its own level, white Gaussian
noise, and Gaussian bumps for anomalies. Every numerical check names its
outside source (numpy / scipy as reference implementations, closed-form
results) or says it is common practice.
"""

from __future__ import annotations

import logging
from pathlib import Path

import dask.array as da
import numpy as np
import pytest
import xarray as xr
from scipy.interpolate import interp1d

from lodeline.model import DataError, StageContext, flag_attrs, flag_mask, segment_chunks, segments_dataset, validate_readings
from lodeline.params import ParameterError
from lodeline.progress import make_progress
from lodeline.steps import diurnal as diurnal

GAP = flag_mask("base_station_gap")
RATE = flag_mask("diurnal_rate")
T0 = np.datetime64("2026-03-02T08:00:00", "ns")
LEVEL_NT = 49_900.0  # field level of the readings, nT
BASE_LEVEL_NT = 49_923.6  # field level of the base station, nT
DT_S = 0.1  # reading interval, s


# --------------------------------------------------------------------------
# Helpers: readings, base-station dataset, external field, context
# --------------------------------------------------------------------------


def at(seconds) -> np.ndarray:
    """Times ``seconds`` after T0 as datetime64[ns]."""
    return T0 + np.round(np.asarray(seconds, dtype=np.float64) * 1e9).astype("timedelta64[ns]")


def seconds_of(times) -> np.ndarray:
    """Seconds after T0 of datetime64 values."""
    return (np.asarray(times).astype("datetime64[ns]") - T0).astype(np.int64) / 1e9


def make_readings(segments, chunk_target=None):
    """A valid readings dataset from ``[(line, sensor, t_s, field_nT), ...]`` in storage order."""
    lines = [s[0] for s in segments]
    sensors = [s[1] for s in segments]
    lengths = [len(s[2]) for s in segments]
    n = sum(lengths)
    t = np.concatenate([at(s[2]) for s in segments])
    x = np.concatenate([np.asarray(s[3], dtype=np.float64) for s in segments])
    line_index = np.repeat(lines, lengths).astype(np.int32)
    sensor_index = np.repeat(sensors, lengths).astype(np.int16)
    chunks = (segment_chunks(lengths, chunk_target or max(n, 1)),)

    def lazy(values):
        return da.from_array(np.asarray(values), chunks=chunks)

    nlines, nsensors = max(lines) + 1, max(sensors) + 1
    ds = xr.Dataset(
        {
            "total_field": ("reading", lazy(x), {"units": "nT"}),
            "flags": ("reading", lazy(np.zeros(n, dtype=np.uint32)), flag_attrs()),
        },
        coords={
            "time": ("reading", lazy(t)),
            "easting": ("reading", lazy(500_000.0 + 4.0 * line_index), {"units": "m"}),
            "northing": ("reading", lazy(np.arange(n) * 0.2), {"units": "m"}),
            "elevation": ("reading", lazy(np.full(n, -20.0)), {"units": "m"}),
            "altitude": ("reading", lazy(np.full(n, 2.5)), {"units": "m"}),
            "line_index": ("reading", lazy(line_index)),
            "sensor_index": ("reading", lazy(sensor_index)),
            "source_file": ("reading", lazy(np.zeros(n, dtype=np.int16))),
            "source_row": ("reading", lazy(np.arange(1, n + 1, dtype=np.int64))),
        },
        attrs={
            "crs": "EPSG:32631",
            "crs_wkt": 'PROJCS["invented"]',
            "line_names": [f"L{i + 1:03d}" for i in range(nlines)],
            "line_kinds": ["survey"] * nlines,
            "sensor_names": [f"S{i + 1}" for i in range(nsensors)],
            "source_files": ["invented.csv"],
        },
    )
    segs = segments_dataset(line_index, sensor_index)
    validate_readings(ds, segs, where="test helper")
    return ds, segs


def make_base(files, flags=None):
    """A base-station dataset (ingest layout) from ``[(t_s, field_nT), ...]``, one pair per file."""
    t = np.concatenate([at(f[0]) for f in files])
    x = np.concatenate([np.asarray(f[1], dtype=np.float64) for f in files])
    src = np.concatenate([np.full(len(f[0]), i, dtype=np.int16) for i, f in enumerate(files)])
    row = np.concatenate([np.arange(1, len(f[0]) + 1) for f in files]).astype(np.int64)
    flags = np.zeros(t.size, np.uint32) if flags is None else np.asarray(flags, dtype=np.uint32)
    return xr.Dataset(
        {"total_field": ("base_reading", x, {"units": "nT"}), "flags": ("base_reading", flags, flag_attrs())},
        coords={"time": ("base_reading", t), "source_file": ("base_reading", src), "source_row": ("base_reading", row)},
        attrs={"source_files": [f"base_{i}.csv" for i in range(len(files))]},
    )


#: Micropulsations: (period s, amplitude nT, phase rad); RMS sqrt(sum A**2 / 2) = 1.2 nT.
MICRO = ((40.0, 0.5, 0.3), (75.0, 0.7, 1.1), (130.0, 0.8, 2.0), (250.0, 0.7, 4.0), (480.0, 0.6, 5.2))


def external(t_s):
    """Invented external field at ``t_s`` s after T0, nT: a daily variation plus micropulsations."""
    t_s = np.asarray(t_s, dtype=np.float64)
    daily = 18.0 * np.cos(2 * np.pi * (t_s + 8 * 3600.0 - 13 * 3600.0) / 86400.0)
    micro = sum(a * np.sin(2 * np.pi * t_s / p + ph) for p, a, ph in MICRO)
    return daily + micro


def make_context(tmp_path=Path(".")):
    return StageContext(
        survey={"crs": "EPSG:32631", "crs_wkt": 'PROJCS["invented"]', "name": "t"},
        inputs={},
        scratch=Path(tmp_path),
        log=logging.getLogger("lodeline.test.diurnal"),
        progress=make_progress(False),
    )


def run_stage(readings, segments, base, **params):
    ingest = {"readings": readings, "segments": segments}
    if base is not None:
        ingest["base_station"] = base
    return diurnal.run({"positions": {"readings": readings, "segments": segments}, "ingest": ingest}, params, make_context())


def outputs(result):
    r = result.datasets["readings"]
    return np.asarray(r["diurnal"].values), np.asarray(r["flags"].values), np.asarray(r["residual"].values)


def line_segments(n_lines=4, sensors=2, length_s=600.0, turn_s=60.0, start_s=0.0, field=lambda t: np.full(t.size, LEVEL_NT)):
    """Segments of back-to-back lines at 10 Hz, each sensor reading at the same times."""
    out = []
    for line in range(n_lines):
        t = start_s + line * (length_s + turn_s) + np.arange(int(round(length_s / DT_S))) * DT_S
        for s in range(sensors):
            out.append((line, s, t, field(t)))
    return out


# --------------------------------------------------------------------------
# Removal of a synthetic diurnal variation
# --------------------------------------------------------------------------


def test_synthetic_diurnal_removed_to_noise_level():
    """Residual minus the known anomaly is noise only.

    Readings: level + anomaly + external field + 0.05 nT noise; base station:
    its own level + the same external field + 0.08 nT noise at 1 Hz. With
    linear interpolation the base noise enters a reading with weights w and
    1 - w (w = position between the two base samples), so its variance is
    sigma_b**2 * mean(w**2 + (1 - w)**2) = 0.67 sigma_b**2 for readings at
    w = 0, 0.1 ... 0.9; the interpolation error of the micropulsations
    between 1 Hz samples is at most A (2 pi / P)**2 / 8 = 0.002 nT (linear
    interpolation error bound, Hildebrand 1974, for the 40 s, 0.5 nT
    component). The expected RMS is therefore sqrt(0.05**2 + 0.67 * 0.08**2)
    = 0.082 nT, below the 0.094 nT of the added noise; the 1.5x limit asked
    for leaves room for that while a wrong sign, a time shift of a second
    or a missing correction (micropulsations of 1.2 nT RMS, a daily
    variation of several nT) is 5-100 times larger.
    """
    rng = np.random.default_rng(1)
    sigma_s, sigma_b = 0.05, 0.08

    def anomaly(t):
        return sum(60.0 * np.exp(-0.5 * ((t - c) / 4.0) ** 2) for c in (150.0, 900.0, 1700.0, 2400.0))

    segs = line_segments(field=lambda t: LEVEL_NT + anomaly(t) + external(t))
    segs = [(l, s, t, f + rng.normal(0, sigma_s, t.size)) for l, s, t, f in segs]
    readings, segments = make_readings(segs, chunk_target=6000)
    tb = np.arange(-600.0, 3300.0, 1.0)
    vb = BASE_LEVEL_NT + external(tb) + rng.normal(0, sigma_b, tb.size)
    result = run_stage(readings, segments, make_base([(tb, vb)]))
    corr, flags, residual = outputs(result)
    t_all = np.concatenate([s[2] for s in segs])
    left = residual - anomaly(t_all)
    assert not np.any(flags & (GAP | RATE))
    # Datum: numpy.median of the base series (numpy as reference implementation).
    assert result.summary["datum_nT"] == pytest.approx(np.median(vb), abs=1e-9)
    # The constant left is level - base level + datum; its standard error is
    # about sigma_b / sqrt(number of base samples used), 0.002 nT: 0.02 nT is 10x that.
    assert np.mean(left) == pytest.approx(LEVEL_NT - BASE_LEVEL_NT + np.median(vb), abs=0.02)
    rms = np.sqrt(np.mean((left - np.mean(left)) ** 2))
    assert rms < 1.5 * np.hypot(sigma_s, sigma_b)
    # Against the predicted 0.082 nT: 5 % is about five times the sampling
    # error of this RMS (its base-noise part rests on only 3 900 independent
    # base samples: about 1 % on the RMS); a base clock wrong by 0.5 s adds
    # about 9 % here.
    w = np.arange(10) / 10.0
    predicted = np.sqrt(sigma_s**2 + sigma_b**2 * np.mean(w**2 + (1 - w) ** 2))
    assert rms == pytest.approx(predicted, rel=0.05)
    # The micropulsations were really there: the uncorrected field is far noisier.
    raw = np.concatenate([s[3] for s in segs]) - anomaly(t_all)
    assert np.std(raw - np.polyval(np.polyfit(t_all, raw, 2), t_all)) > 10 * rms


# --------------------------------------------------------------------------
# Interpolation against scipy / numpy, several files and sample rates
# --------------------------------------------------------------------------


def test_interpolation_matches_scipy_on_irregular_files_of_different_rates():
    """Two files, irregular ~1 Hz then irregular 0.2 Hz, against scipy.interpolate.interp1d (linear).

    Tolerance 1e-8 nT: both compute the same straight line between the same
    two samples; float64 round-off on 5e4 nT values is about 1e-11 nT and the
    stage works in seconds after its first sample, not in nanoseconds.
    """
    rng = np.random.default_rng(2)
    ta = -300.0 + np.cumsum(rng.uniform(0.5, 1.5, 1500))
    ta = ta[ta < 1200.0]
    tb = 1203.0 + np.arange(0, 1500, 5.0) + rng.uniform(-0.5, 0.5, 300)
    va = BASE_LEVEL_NT + external(ta) + rng.normal(0, 0.08, ta.size)
    vb = BASE_LEVEL_NT + external(tb) + rng.normal(0, 0.08, tb.size)
    segs = line_segments(n_lines=2, sensors=1, length_s=1000.0, turn_s=100.0, start_s=100.0)
    readings, segments = make_readings(segs)
    result = run_stage(readings, segments, make_base([(ta, va), (tb, vb)]))
    corr, flags, _ = outputs(result)
    t_all = np.concatenate([s[2] for s in segs])
    t_base, v_base = np.concatenate([ta, tb]), np.concatenate([va, vb])
    reference = interp1d(t_base, v_base, kind="linear")(t_all) - np.median(v_base)
    assert not np.any(flags & GAP)
    np.testing.assert_allclose(corr, reference, rtol=0, atol=1e-8)
    assert result.summary["base_readings_used"] == ta.size + tb.size


def test_overlapping_files_prefer_the_first_and_fill_its_gaps():
    """A 0.2 Hz second file covering the whole period: used only in the first file's long gap and after it.

    Reference: numpy.interp on the series built by the rule (first file, plus
    the second file's samples outside the first file's covered spans);
    tolerance as in the scipy check.
    """
    rng = np.random.default_rng(3)
    ta = np.arange(0.0, 1200.0, 1.0)
    ta = ta[(ta <= 400.0) | (ta >= 460.0)]  # a 60 s gap, longer than max_gap_s = 30
    tb = np.arange(2.5, 1500.0, 5.0)
    va = BASE_LEVEL_NT + external(ta) + rng.normal(0, 0.08, ta.size)
    vb = BASE_LEVEL_NT + 1.0 + external(tb) + rng.normal(0, 0.08, tb.size)
    segs = line_segments(n_lines=1, sensors=1, length_s=1400.0, start_s=50.0)
    readings, segments = make_readings(segs)
    result = run_stage(readings, segments, make_base([(ta, va), (tb, vb)]), max_gap_s=30.0)
    corr, flags, _ = outputs(result)
    use_b = ((tb > 400.0) & (tb < 460.0)) | (tb > 1199.0)
    t_ref = np.concatenate([ta, tb[use_b]])
    v_ref = np.concatenate([va, vb[use_b]])
    order = np.argsort(t_ref)
    t_ref, v_ref = t_ref[order], v_ref[order]
    t_all = segs[0][2]
    assert not np.any(flags & GAP)
    np.testing.assert_allclose(corr, np.interp(t_all, t_ref, v_ref) - np.median(v_ref), rtol=0, atol=1e-8)
    assert result.summary["base_left_out"]["overlap"] == int((~use_b).sum())


def test_nan_and_time_flagged_base_samples_are_left_out():
    """NaN fields and samples flagged time_duplicate/time_backwards are not interpolated through.

    The first sample of the second file carries the time_backwards bit that
    a file boundary gets from the ingest stage (it is compared with the
    previous file's last sample) and must still be used.
    """
    ta = np.arange(0.0, 600.0, 1.0)
    tb = np.arange(600.0, 1200.0, 1.0)
    va = BASE_LEVEL_NT + 0.01 * ta
    vb = BASE_LEVEL_NT + 0.01 * tb
    va[100] = np.nan
    va[200] = BASE_LEVEL_NT + 500.0  # a wrong value at a wrong time, flagged backwards
    flags = np.zeros(ta.size + tb.size, np.uint32)
    flags[200] = flag_mask("time_backwards")
    flags[300] = flag_mask("time_duplicate")
    va[300] = BASE_LEVEL_NT - 500.0
    flags[ta.size] = flag_mask("time_backwards")  # file boundary
    segs = line_segments(n_lines=1, sensors=1, length_s=1100.0, start_s=20.0)
    readings, segments = make_readings(segs)
    result = run_stage(readings, segments, make_base([(ta, va), (tb, vb)], flags=flags))
    corr, flags_out, _ = outputs(result)
    t_all = segs[0][2]
    # The base field is a straight line; the correction must be that line.
    expected = BASE_LEVEL_NT + 0.01 * t_all - result.summary["datum_nT"]
    np.testing.assert_allclose(corr, expected, rtol=0, atol=1e-8)
    left_out = result.summary["base_left_out"]
    assert (left_out["nan_field"], left_out["time_order"]) == (1, 2)
    assert result.summary["base_readings_used"] == ta.size + tb.size - 3


# --------------------------------------------------------------------------
# Gaps and the base-station period
# --------------------------------------------------------------------------


def test_gap_flags_exactly_the_readings_inside_and_outside_the_record():
    """A 100 s gap is flagged reading for reading; a 20 s gap and a 30 s gap are bridged; no extrapolation."""
    tb = np.arange(0.0, 1800.0 + 0.5, 1.0)
    tb = tb[~((tb > 600.0) & (tb < 700.0))]  # 100 s gap: last sample 600, next 700
    tb = tb[~((tb > 1000.0) & (tb < 1020.0))]  # 20 s gap
    tb = tb[~((tb > 1300.0) & (tb < 1330.0))]  # exactly max_gap_s: bridged
    vb = BASE_LEVEL_NT + 3.0 * np.sin(tb / 50.0)
    t = np.arange(-60.0, 1860.0, DT_S)
    readings, segments = make_readings([(0, 0, t, np.full(t.size, LEVEL_NT))])
    result = run_stage(readings, segments, make_base([(tb, vb)]), max_gap_s=30.0)
    corr, flags, residual = outputs(result)
    t = seconds_of(readings["time"].values)
    expected_gap = (t < 0.0) | (t > 1800.0) | ((t > 600.0) & (t < 700.0))
    np.testing.assert_array_equal((flags & GAP) != 0, expected_gap)
    assert np.all(np.isnan(corr[expected_gap])) and np.all(np.isnan(residual[expected_gap]))
    # Elsewhere (including inside the 20 s and 30 s gaps) the straight line
    # between the samples (numpy.interp as reference).
    ok = ~expected_gap
    np.testing.assert_allclose(corr[ok], np.interp(t[ok], tb, vb) - np.median(vb), rtol=0, atol=1e-8)
    gaps = result.tables["base_station_gaps"]
    assert len(gaps) == 1
    assert gaps["length_s"].iloc[0] == pytest.approx(100.0)
    assert gaps["readings_flagged"].iloc[0] == int(((t > 600.0) & (t < 700.0)).sum())
    assert gaps["lines"].iloc[0] == "L001"
    where = result.summary["base_station_gap_where"]
    assert (where["before_record"], where["after_record"]) == (int((t < 0).sum()), int((t > 1800.0).sum()))


def test_interpolation_error_inside_the_bridged_gap_limit():
    """The error of bridging a gap obeys the linear-interpolation bound behind the max_gap_s default.

    A 1.5 nT, 150 s sinusoid (a Pc5 micropulsation, Jacobs et al. 1964)
    with a 29 s gap centred on a crest: the interpolation error at the gap
    centre is A (1 - cos(pi L / P)) exactly (the chord between two points
    of a cosine symmetric about its crest) and never more than
    L**2 / 8 * A (2 pi / P)**2 (Hildebrand 1974). Tolerance 1e-6 nT on the
    closed form: only round-off separates them.
    """
    amp, period, gap = 1.5, 150.0, 29.0
    crest = 600.5  # samples at 586 and 615 bound the gap
    tb = np.arange(0.0, 1200.0, 1.0)
    tb = tb[np.abs(tb - crest) >= gap / 2.0]
    truth = lambda t: BASE_LEVEL_NT + amp * np.cos(2 * np.pi * (t - crest) / period)  # noqa: E731
    t = crest + np.arange(-14.0, 14.05, DT_S)
    readings, segments = make_readings([(0, 0, t, np.full(t.size, LEVEL_NT))])
    result = run_stage(readings, segments, make_base([(tb, truth(tb))]), datum="value", datum_nT=BASE_LEVEL_NT)
    corr, flags, _ = outputs(result)
    t = seconds_of(readings["time"].values)
    error = np.abs(corr + BASE_LEVEL_NT - truth(t))
    assert not np.any(flags & GAP)
    bound = gap**2 / 8.0 * amp * (2 * np.pi / period) ** 2
    assert error.max() <= bound
    centre = np.argmin(np.abs(t - crest))
    assert error[centre] == pytest.approx(amp * (1 - np.cos(np.pi * gap / period)), abs=1e-6)


def test_no_reading_inside_the_base_record_is_an_error():
    tb = np.arange(5000.0, 6000.0, 1.0)
    readings, segments = make_readings(line_segments(n_lines=1, sensors=1, length_s=100.0))
    with pytest.raises(DataError, match="does not overlap"):
        run_stage(readings, segments, make_base([(tb, np.full(tb.size, BASE_LEVEL_NT))]))


# --------------------------------------------------------------------------
# Rate of change
# --------------------------------------------------------------------------


@pytest.mark.parametrize("slope", [3.0, 1.5, -3.0])
def test_rate_flag_on_a_ramp_of_known_slope(slope):
    """A ramp of 3 nT/min is flagged against a 2 nT/min limit, 1.5 nT/min is not.

    The chord of w = 60 s centred at time t sees the ramp (from t1 to t2)
    over min(t + w/2, t2) - max(t - w/2, t1) seconds, so its rate is the
    slope times that overlap over w: above 2/3 of the slope inside
    [t1 + w/6, t2 - w/6] (closed form). A reading is flagged when either
    neighbouring base sample (1 s away at most) is: flagged readings lie
    within 1 s of that interval. Base noise 0.02 nT adds about
    sqrt(2) * 0.02 nT/min = 0.03 nT/min to the rate, far from the 1 nT/min
    margin.
    """
    rng = np.random.default_rng(4)
    t1, t2, w, limit = 1200.0, 2400.0, 60.0, 2.0
    tb = np.arange(0.0, 3600.0 + 0.5, 1.0)
    ramp = slope / 60.0 * (np.clip(tb, t1, t2) - t1)
    vb = BASE_LEVEL_NT + ramp + rng.normal(0, 0.02, tb.size)
    segs = line_segments(n_lines=1, sensors=1, length_s=3500.0, start_s=50.0)
    readings, segments = make_readings(segs)
    result = run_stage(readings, segments, make_base([(tb, vb)]), rate_limit_nT_per_min=limit, rate_window_s=w)
    _, flags, _ = outputs(result)
    t = segs[0][2]
    fast = (flags & RATE) != 0
    if abs(slope) > limit:
        inner = (t >= t1 + w / 6 + 1.0) & (t <= t2 - w / 6 - 1.0)
        outer = (t >= t1 + w / 6 - 1.0) & (t <= t2 - w / 6 + 1.0)
        assert np.all(fast[inner])
        assert not np.any(fast[~outer])
    else:
        assert not np.any(fast)
    # The decimated curve gives the slope in the middle of the ramp (0.1 nT/min: 3x the noise).
    curve = result.tables["diurnal_curve"]
    mid = (seconds_of(curve["time"].to_numpy()) > t1 + w) & (seconds_of(curve["time"].to_numpy()) < t2 - w)
    np.testing.assert_allclose(curve["rate_nT_per_min"].to_numpy()[mid], slope, atol=0.1)
    assert not np.any(flags & GAP)


# --------------------------------------------------------------------------
# Smoothing, clock offset, datum, parameters
# --------------------------------------------------------------------------


def test_smoothing_has_the_moving_average_gain():
    """A 2 nT, 60 s sinusoid through a 20 s running mean keeps sin(x)/x of its amplitude, x = pi W / P.

    Moving-average frequency response (Smith 1997, ch. 15): 0.827 for
    W = 20 s, zero for W = P. Tolerance 1 %: the running mean is taken over
    the linear interpolant of 1 Hz samples, which departs from the sinusoid
    by at most A (2 pi / P)**2 / 8 = 0.003 nT (Hildebrand 1974), 0.14 % of A.
    """
    amp, period = 2.0, 60.0
    tb = np.arange(0.0, 1800.0, 1.0)
    vb = BASE_LEVEL_NT + amp * np.sin(2 * np.pi * tb / period)
    segs = line_segments(n_lines=1, sensors=1, length_s=1200.0, start_s=300.0)
    readings, segments = make_readings(segs)
    t = segs[0][2]
    design = np.column_stack([np.sin(2 * np.pi * t / period), np.cos(2 * np.pi * t / period), np.ones(t.size)])
    for width, gain, tol in ((20.0, np.sin(np.pi / 3) / (np.pi / 3), 0.01 * amp), (60.0, 0.0, 0.01 * amp)):
        corr, _, _ = outputs(run_stage(readings, segments, make_base([(tb, vb)]), smoothing_s=width))
        coef = np.linalg.lstsq(design, corr, rcond=None)[0]
        assert np.hypot(coef[0], coef[1]) == pytest.approx(gain * amp, abs=tol)


def test_time_offset_shifts_the_base_clock():
    """Base times recorded 7 s late and time_offset_s = -7 give the correction of the true clock."""
    tb = np.arange(0.0, 1200.0, 1.0)
    vb = BASE_LEVEL_NT + external(tb)
    readings, segments = make_readings(line_segments(n_lines=1, sensors=1, length_s=1000.0, start_s=100.0))
    right, _, _ = outputs(run_stage(readings, segments, make_base([(tb, vb)])))
    shifted, _, _ = outputs(run_stage(readings, segments, make_base([(tb + 7.0, vb)]), time_offset_s=-7.0))
    unshifted, _, _ = outputs(run_stage(readings, segments, make_base([(tb + 7.0, vb)])))
    np.testing.assert_allclose(shifted, right, rtol=0, atol=1e-8)
    assert np.max(np.abs(unshifted - right)) > 0.1  # 7 s of 1 nT-class micropulsations do show


def test_datum_value_is_used_and_parameters_are_checked():
    tb = np.arange(0.0, 700.0, 1.0)
    vb = BASE_LEVEL_NT + 0.02 * tb
    segs = line_segments(n_lines=1, sensors=1, length_s=500.0, start_s=50.0)
    readings, segments = make_readings(segs)
    result = run_stage(readings, segments, make_base([(tb, vb)]), datum="value", datum_nT=49_000.0)
    corr, _, _ = outputs(result)
    np.testing.assert_allclose(corr, np.interp(segs[0][2], tb, vb) - 49_000.0, rtol=0, atol=1e-8)
    assert result.datasets["readings"]["diurnal"].attrs["datum_nT"] == 49_000.0
    for bad, match in (
        ({"datum": "value"}, "needs diurnal.datum_nT"),
        ({"datum_nT": 49_000.0}, "only used with datum = 'value'"),
        ({"max_gap": 30.0}, "did you mean 'max_gap_s'"),
        ({"max_gap_s": 0.0}, "out of range"),
    ):
        with pytest.raises(ParameterError, match=match):
            diurnal.check_params(bad)


# --------------------------------------------------------------------------
# No base station, chunking, conventions
# --------------------------------------------------------------------------


def test_no_base_station_warns_and_passes_readings_through(caplog):
    readings, segments = make_readings(line_segments(n_lines=2, sensors=1, length_s=100.0))
    with caplog.at_level(logging.WARNING, logger="lodeline.test.diurnal"):
        result = run_stage(readings, segments, None)
    assert any(r.levelno == logging.WARNING and "no base station" in r.getMessage() for r in caplog.records)
    out = result.datasets["readings"]
    xr.testing.assert_identical(out, readings)
    assert "diurnal" not in out and "residual" not in out
    assert result.summary["skipped"] is True


def test_results_do_not_depend_on_chunking():
    rng = np.random.default_rng(5)
    tb = np.arange(0.0, 3000.0, 1.0)
    tb = tb[~((tb > 1000.0) & (tb < 1100.0))]
    vb = BASE_LEVEL_NT + 4.0 * external(tb) + rng.normal(0, 0.08, tb.size)
    segs = line_segments(n_lines=4, sensors=3, length_s=500.0, turn_s=100.0, start_s=60.0)
    base = make_base([(tb, vb)])
    one = run_stage(*make_readings(segs), base)
    many = run_stage(*make_readings(segs, chunk_target=5000), base)
    assert len(many.datasets["readings"]["flags"].chunks[0]) > 1
    for a, b in zip(outputs(one), outputs(many)):
        np.testing.assert_array_equal(a, b)
    assert one.summary == many.summary
    assert one.tables["diurnal_by_line"].equals(many.tables["diurnal_by_line"])
    assert one.summary["flagged"]["base_station_gap"] > 0 and one.summary["flagged"]["diurnal_rate"] > 0


def test_output_follows_the_conventions():
    tb = np.arange(0.0, 700.0, 1.0)
    readings, segments = make_readings(line_segments(n_lines=2, sensors=2, length_s=300.0))
    result = run_stage(readings, segments, make_base([(tb, BASE_LEVEL_NT + external(tb))]))
    out = result.datasets["readings"]
    validate_readings(out, result.datasets["segments"], where="diurnal output")
    assert out["diurnal"].attrs["units"] == "nT" and out["diurnal"].attrs["role"] == "correction"
    assert isinstance(out["diurnal"].data, da.Array) and isinstance(out["flags"].data, da.Array)
    np.testing.assert_allclose(
        out["residual"].values, out["total_field"].values - out["diurnal"].values, rtol=0, atol=1e-9
    )
    assert result.rejected == {}
    curve = result.tables["diurnal_curve"]
    assert np.allclose(np.diff(seconds_of(curve["time"].to_numpy())), 10.0)
