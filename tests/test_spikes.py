"""Tests of the spike, dropout and time-gap stage (``lodeline.steps.spikes``).

All data are invented: straight survey lines over a constant 48 000 nT
field, white Gaussian noise, and the closed-form total-field anomaly of an
induced point dipole. Every numerical check names its outside source or
says it is common practice.
"""

from __future__ import annotations

import logging
from pathlib import Path

import dask.array as da
import numpy as np
import pytest
import xarray as xr
from scipy.special import erfc

from lodeline.model import (
    FLAGS,
    StageContext,
    flag_attrs,
    flag_mask,
    segment_chunks,
    segments_dataset,
    validate_readings,
)
from lodeline.params import ParameterError
from lodeline.steps import spikes

SPIKE = flag_mask("spike")
DROPOUT = flag_mask("dropout")
GAP = flag_mask("gap_before")
BASE_NT = 48_000.0
NOISE_NT = 0.05
STEP_M = 0.2  # along-line sampling, m
DT_S = 0.1  # time step, s (2 m/s at 0.2 m sampling)
T0 = np.datetime64("2024-05-01T08:00:00", "ns")


# --------------------------------------------------------------------------
# Helpers: a valid readings dataset, a context, a dipole anomaly
# --------------------------------------------------------------------------


def make_readings(
    fields,
    lines=None,
    sensors=None,
    times=None,
    flags=None,
    chunk_target=None,
):
    """Build a readings dataset and its segments that follow ``lodeline.model``.

    Parameters
    ----------
    fields : list of 1-D arrays
        Total field of each segment, nT, in storage order.
    lines, sensors : list of int, optional
        Line and sensor index of each segment (default: one line per segment,
        sensor 0). Consecutive segments must differ in (line, sensor).
    times : list of 1-D datetime64 arrays, optional
        Times of each segment (default: DT_S steps, segments one after another).
    flags : 1-D uint32 array, optional
        Existing flags (default: none).
    chunk_target : int, optional
        Wanted readings per dask chunk (default: one chunk).
    """
    lengths = [len(f) for f in fields]
    n = sum(lengths)
    nseg = len(fields)
    lines = list(range(nseg)) if lines is None else list(lines)
    sensors = [0] * nseg if sensors is None else list(sensors)
    if times is None:
        offsets = np.cumsum([0] + lengths[:-1])
        times = [
            T0 + ((o + np.arange(L)) * DT_S * 1e9).astype("timedelta64[ns]") for o, L in zip(offsets, lengths)
        ]
    x = np.concatenate(fields).astype(np.float64)
    line_index = np.repeat(lines, lengths).astype(np.int32)
    sensor_index = np.repeat(sensors, lengths).astype(np.int16)
    along = np.concatenate([np.arange(L) * STEP_M for L in lengths])
    chunks = (segment_chunks(lengths, chunk_target or max(n, 1)),)
    if flags is None:
        flags = np.zeros(n, dtype=np.uint32)

    def lazy(values):
        return da.from_array(np.asarray(values), chunks=chunks)

    nlines = max(lines) + 1
    nsensors = max(sensors) + 1
    ds = xr.Dataset(
        data_vars={
            "total_field": ("reading", lazy(x), {"units": "nT", "long_name": "total field"}),
            "flags": ("reading", lazy(np.asarray(flags, dtype=np.uint32)), flag_attrs()),
        },
        coords={
            "time": ("reading", lazy(np.concatenate(times).astype("datetime64[ns]"))),
            "easting": (
                "reading",
                lazy(500_000.0 + 25.0 * line_index),
                {"units": "m", "grid_mapping": "crs"},
            ),
            "northing": ("reading", lazy(5_600_000.0 + along), {"units": "m", "grid_mapping": "crs"}),
            "elevation": ("reading", lazy(np.full(n, -20.0)), {"units": "m"}),
            "altitude": ("reading", lazy(np.full(n, 2.5)), {"units": "m"}),
            "line_index": ("reading", lazy(line_index)),
            "sensor_index": ("reading", lazy(sensor_index)),
            "source_file": ("reading", lazy(np.zeros(n, dtype=np.int16))),
            "source_row": ("reading", lazy(np.arange(1, n + 1, dtype=np.int64))),
        },
        attrs={
            "crs_wkt": "PROJCS[\"invented\"]",
            "crs": "EPSG:32631",
            "line_names": [f"L{100 + i}" for i in range(nlines)],
            "line_kinds": ["survey"] * nlines,
            "sensor_names": [f"S{i + 1}" for i in range(nsensors)],
            "source_files": ["invented.csv"],
        },
    )
    segments = segments_dataset(line_index, sensor_index)
    validate_readings(ds, segments, where="test helper")
    return ds, segments


class _Silent:
    def update(self, n):
        pass

    def close(self):
        pass


def make_context(tmp_path=Path(".")):
    return StageContext(
        survey={"name": "invented"},
        inputs={},
        scratch=Path(tmp_path),
        log=logging.getLogger("lodeline.test.spikes"),
        progress=lambda total=None, desc="": _Silent(),
    )


def run_stage(ds, segments, **params):
    """Run the stage; return (flags as numpy, result)."""
    result = spikes.run({"ingest": {"readings": ds, "segments": segments}}, params, make_context())
    return np.asarray(result.datasets["readings"]["flags"].values), result


def dipole_total_field(along_m, centre_m, depth_m, peak_nT, inclination_deg=65.0):
    """Total-field anomaly along a magnetic-north profile over an induced point dipole, nT.

    ``B = (mu0 / 4 pi) m / r**3 * (3 (m.r) r - m)`` with unit vectors m and r
    (Blakely 1995, Potential Theory in Gravity and Magnetic Applications,
    Cambridge University Press; from memory), projected on the main-field
    direction, which is the total-field anomaly when the anomaly is small
    against the main field (same book, from memory). The moment is along
    the main field (induced) and scaled so that the positive peak is
    ``peak_nT``; the constant mu0 / 4 pi cancels in that scaling.
    """
    inc = np.radians(inclination_deg)
    unit = np.array([0.0, np.cos(inc), -np.sin(inc)])  # east, north, up
    r = np.stack([np.zeros_like(along_m), along_m - centre_m, np.full_like(along_m, depth_m)], axis=-1)
    dist = np.linalg.norm(r, axis=-1)
    cos_mr = (r @ unit) / dist
    shape = (3.0 * cos_mr**2 - 1.0) / dist**3  # unit . (3 (m.r) r - m) with m = unit
    return peak_nT * shape / shape.max()


def noisy_line(n, rng, noise=NOISE_NT):
    return BASE_NT + rng.normal(0.0, noise, n)


# Anomaly used throughout: 4 m from the sensor (2.5 m altitude + 1.5 m burial),
# 200 nT peak. Its half-width at half maximum is 10 samples of 0.2 m (checked
# in test_dipole_helper_half_width).
DEPTH_M = 4.0
PEAK_NT = 200.0


# --------------------------------------------------------------------------
# The synthetic anomaly itself
# --------------------------------------------------------------------------


def test_dipole_helper_half_width():
    along = np.arange(4000) * STEP_M
    anomaly = dipole_total_field(along, 400.0, DEPTH_M, PEAK_NT)
    above = np.flatnonzero(anomaly >= PEAK_NT / 2)
    # Half-width of the positive lobe, in samples: 10 +/- 1 is the design
    # case of steps/spikes.py; the value comes from the closed form above.
    assert abs((above[-1] - above[0]) / 2 - 10) <= 1
    assert anomaly.max() == pytest.approx(PEAK_NT, rel=1e-12)


@pytest.mark.slow  # a check of the test helper itself; numba compilation takes seconds
def test_dipole_helper_matches_harmonica():
    hm = pytest.importorskip("harmonica")
    along = np.arange(-200, 201) * STEP_M
    inc = 65.0
    m_e, m_n, m_u = hm.magnetic_angles_to_vec(1.0e3, inc, 0.0)
    b_e, b_n, b_u = hm.dipole_magnetic(
        (np.zeros_like(along), along, np.full_like(along, DEPTH_M)),
        (np.array([0.0]), np.array([0.0]), np.array([0.0])),
        (np.array([m_e]), np.array([m_n]), np.array([m_u])),
        field="b",
        parallel=False,
    )
    u_e, u_n, u_u = np.array(hm.magnetic_angles_to_vec(1.0, inc, 0.0))
    theirs = b_e * u_e + b_n * u_n + b_u * u_u
    ours = dipole_total_field(along, 0.0, DEPTH_M, 1.0, inc) * theirs.max()
    # Independent evaluation of the dipole field: harmonica 0.7
    # dipole_magnetic (Fatiando a Terra Project). Only the shape is compared
    # (ours is scaled to its peak); 1e-9 relative is double-precision
    # rounding with a wide margin.
    np.testing.assert_allclose(ours, theirs, rtol=1e-9, atol=1e-9 * theirs.max())


# --------------------------------------------------------------------------
# Spikes
# --------------------------------------------------------------------------


SPIKE_AT = np.array([150, 520, 890, 1260, 1630, 2380, 2750, 3120, 3490, 3860])
SPIKE_NT = np.geomspace(5.0, 500.0, 10) * np.array([1, -1] * 5)
ANOMALY_AT = 2000  # sample index of the anomaly centre
ANOMALY_REACH = 150  # samples each side; |anomaly| > 1 nT from -65 to +90 samples (closed form)


def _line_with_anomaly_and_spikes(rng):
    along = np.arange(4000) * STEP_M
    clean = BASE_NT + dipole_total_field(along, ANOMALY_AT * STEP_M, DEPTH_M, PEAK_NT)
    field = clean + rng.normal(0.0, NOISE_NT, clean.size)
    field[SPIKE_AT] += SPIKE_NT
    return field


def test_spikes_flagged_and_anomaly_kept():
    rng = np.random.default_rng(1)
    field = _line_with_anomaly_and_spikes(rng)
    ds, segments = make_readings([field])
    flags, result = run_stage(ds, segments)
    flagged = np.flatnonzero(flags & SPIKE)
    # Exactly the 10 injected spikes (5-500 nT) and nothing else: every
    # injected reading is far above the 1 nT floor and the 6-sigma limits
    # (~0.4 nT at 0.05 nT noise), and no neighbour of a spike is taken.
    np.testing.assert_array_equal(flagged, SPIKE_AT)
    window = slice(ANOMALY_AT - ANOMALY_REACH, ANOMALY_AT + ANOMALY_REACH)
    assert not np.any(flags[window] & (SPIKE | DROPOUT | GAP))
    assert result.summary["spikes"] == 10
    assert result.tables["spikes_by_line"]["spikes"].tolist() == [10]


def test_anomaly_peak_is_far_below_the_limit():
    # Why the anomaly is safe: the fourth-difference residual at its peak is
    # ~0.03 nT against the 1 nT floor (value computed from the closed form;
    # the fourth difference of a cubic is zero, Hildebrand 1974,
    # Introduction to Numerical Analysis, from memory).
    along = np.arange(4000) * STEP_M
    anomaly = dipole_total_field(along, ANOMALY_AT * STEP_M, DEPTH_M, PEAK_NT)
    start = np.zeros(anomaly.size, dtype=np.int64)
    stop = np.full(anomaly.size, anomaly.size)
    r4, _ = spikes.fourth_difference_residual(anomaly, start, stop)
    assert np.nanmax(np.abs(r4)) < 0.05  # 20x margin on the 1 nT floor


def test_spikes_on_the_steep_flank_are_flagged():
    # The flank of the anomaly changes by up to 18 nT per sample (closed
    # form): as much as the spike. The local cubics follow the slope, so the
    # spike is still found, and nothing else. Positions are integers: exact.
    rng = np.random.default_rng(2)
    along = np.arange(4000) * STEP_M
    anomaly = dipole_total_field(along, ANOMALY_AT * STEP_M, DEPTH_M, PEAK_NT)
    steepest = int(np.argmax(np.abs(np.diff(anomaly))))
    field = BASE_NT + anomaly + rng.normal(0.0, NOISE_NT, anomaly.size)
    at = np.array([steepest - 1, ANOMALY_AT + 25])
    field[at] += [20.0, -20.0]
    ds, segments = make_readings([field])
    flags, _ = run_stage(ds, segments)
    np.testing.assert_array_equal(np.flatnonzero(flags & SPIKE), at)


@pytest.mark.parametrize("size_nT", [20.0, -20.0, 500.0, -500.0])
@pytest.mark.parametrize("width", [1, 2])
def test_spike_on_the_anomaly_peak_flagged_alone(size_nT, width):
    # On the curved peak the running median is biased by several nT and the
    # neighbours of a spike depart from the local cubic (leak); only the
    # bridged confirmation tells them apart. Expected: exactly the spike.
    rng = np.random.default_rng(20)
    along = np.arange(4000) * STEP_M
    anomaly = dipole_total_field(along, ANOMALY_AT * STEP_M, DEPTH_M, PEAK_NT)
    peak = int(np.argmax(anomaly))
    field = BASE_NT + anomaly + rng.normal(0.0, NOISE_NT, anomaly.size)
    at = np.arange(peak, peak + width)
    field[at] += size_nT
    ds, segments = make_readings([field])
    flags, _ = run_stage(ds, segments)
    np.testing.assert_array_equal(np.flatnonzero(flags & SPIKE), at)


def test_spikes_a_few_readings_apart():
    rng = np.random.default_rng(21)
    along = np.arange(4000) * STEP_M
    anomaly = dipole_total_field(along, ANOMALY_AT * STEP_M, DEPTH_M, PEAK_NT)
    field = BASE_NT + anomaly + rng.normal(0.0, NOISE_NT, anomaly.size)
    # Quiet field: 6 apart, then a small spike two readings from a large one
    # (not "strong" next to it: pass 3 of the confirmation), then on the anomaly.
    at = np.array([500, 506, 800, 802, 1985, 1990, 1994])
    field[at] += [250.0, -80.0, 300.0, 80.0, -250.0, 80.0, 30.0]
    ds, segments = make_readings([field])
    flags, _ = run_stage(ds, segments)
    np.testing.assert_array_equal(np.flatnonzero(flags & SPIKE), at)


def test_short_segments_are_left_alone():
    rng = np.random.default_rng(22)
    short = noisy_line(4, rng)
    short[1] += 100.0  # fewer than five readings: not testable, not flagged
    single = noisy_line(1, rng)
    ds, segments = make_readings([noisy_line(500, rng), short, single], lines=[0, 1, 2])
    flags, result = run_stage(ds, segments)
    assert not np.any(flags & SPIKE)
    assert result.tables["spikes_by_line"]["readings"].tolist() == [500, 4, 1]
    assert np.isnan(result.tables["spikes_by_line"]["noise_nT"].iloc[2])


def test_two_sample_spike_flagged_without_neighbours():
    rng = np.random.default_rng(3)
    field = noisy_line(2000, rng)
    field[[700, 701]] += 20.0
    field[[1300, 1301]] -= 300.0
    ds, segments = make_readings([field])
    flags, _ = run_stage(ds, segments)
    np.testing.assert_array_equal(np.flatnonzero(flags & SPIKE), [700, 701, 1300, 1301])


def test_small_departure_below_floor_not_flagged():
    rng = np.random.default_rng(4)
    field = noisy_line(2000, rng)
    field[1000] += 0.8  # below threshold_nT = 1.0 (the floor decides at 0.05 nT noise)
    field[1500] += 1.5
    ds, segments = make_readings([field])
    flags, _ = run_stage(ds, segments)
    np.testing.assert_array_equal(np.flatnonzero(flags & SPIKE), [1500])


def test_false_flag_rate_on_pure_noise():
    rng = np.random.default_rng(5)
    fields = [noisy_line(50_000, rng) for _ in range(4)]
    ds, segments = make_readings(fields, chunk_target=100_000)
    n = 200_000

    # Defaults: the two-sided Gaussian tail beyond 6 sigma is erfc(6/sqrt 2)
    # = 1.97e-9 (Abramowitz & Stegun 1964, Handbook of Mathematical
    # Functions, ch. 26, from memory), so 2e5 readings expect 4e-4 false
    # flags (and the 1 nT floor is 20 noise sigmas): zero allowed.
    assert erfc(6 / np.sqrt(2)) == pytest.approx(1.97e-9, rel=0.01)
    flags, _ = run_stage(ds, segments)
    assert np.count_nonzero(flags & SPIKE) == 0

    # Without the floor and at 4 sigma, the rate must stay below the
    # Gaussian tail erfc(4/sqrt 2) = 6.3e-5 (same source): a spike must first
    # pass the fourth-difference test at 4 sigma and then be confirmed, so
    # the rate is at most that tail. A factor of 2 allows for the scatter of
    # the MAD-based sigma (asymptotic efficiency 37 %, Rousseeuw & Croux
    # 1993, JASA 88) and of the Poisson count.
    flags, _ = run_stage(ds, segments, threshold_nT=1e-6, noise_multiple=4.0)
    rate = np.count_nonzero(flags & SPIKE) / n
    assert rate < 2 * erfc(4 / np.sqrt(2))


def test_noise_estimate_in_table():
    rng = np.random.default_rng(6)
    ds, segments = make_readings([noisy_line(20_000, rng)])
    _, result = run_stage(ds, segments)
    noise = result.tables["spikes_by_line"]["noise_nT"].iloc[0]
    # Fourth-difference noise scaled by 6/sqrt(70) and 1.4826 MAD (Rousseeuw &
    # Croux 1993): unbiased for white Gaussian noise. Standard error of a MAD
    # scale ~1.17 sigma/sqrt(n) (same source, 37 % efficiency), ~1 % here,
    # doubled for overlapping stencils; 5 % tolerance is > 2.5 standard errors.
    assert noise == pytest.approx(NOISE_NT, rel=0.05)


# --------------------------------------------------------------------------
# Dropouts and stuck sensors
# --------------------------------------------------------------------------


def test_nan_run_is_dropout_and_neighbours_are_clean():
    rng = np.random.default_rng(7)
    field = noisy_line(3000, rng)
    field[1200:1207] = np.nan
    field[2000] = np.nan
    ds, segments = make_readings([field])
    flags, result = run_stage(ds, segments)
    expected = np.r_[np.arange(1200, 1207), 2000]
    np.testing.assert_array_equal(np.flatnonzero(flags & DROPOUT), expected)
    assert not np.any(flags & SPIKE)
    assert result.summary["dropouts_no_value"] == 8


def test_stuck_run_is_dropout():
    rng = np.random.default_rng(8)
    field = noisy_line(3000, rng)
    field[500:512] = field[499]  # stuck for 12 readings after reading 499 (13 equal)
    field[1500:1509] = 48_010.0  # 9 equal readings: below stuck_samples = 10
    field[2500:2530] = 47_950.0  # stuck at a wrong level for 30 readings
    ds, segments = make_readings([field])
    flags, result = run_stage(ds, segments)
    expected = np.r_[np.arange(499, 512), np.arange(2500, 2530)]
    np.testing.assert_array_equal(np.flatnonzero(flags & DROPOUT), expected)
    # The 9-reading plateau 10 nT off is no dropout, and no spike either: its
    # edges are level steps, and each edge reading agrees with its own side.
    assert not np.any(flags[1500:1509] & DROPOUT)
    assert result.summary["dropouts_stuck"] == 43
    flags, _ = run_stage(ds, segments, stuck_samples=9)
    assert np.all(flags[1500:1509] & DROPOUT)


# --------------------------------------------------------------------------
# Time gaps
# --------------------------------------------------------------------------


def _times(n, steps_s):
    return T0 + np.round(np.cumsum(np.r_[0.0, steps_s]) * 1e9).astype("timedelta64[ns]")[:n]


def test_gap_flagged_on_the_reading_after():
    rng = np.random.default_rng(9)
    n = 2000
    steps = np.full(n - 1, DT_S) + rng.uniform(-0.01, 0.01, n - 1)  # 10 % timestamp jitter
    steps[799] = 2.1  # reading 800 comes 2.1 s after reading 799: a gap
    steps[1199] = 0.25  # 2.5x the median step: below gap_factor = 3
    steps[1599] = 0.45  # 4.5x the median but below gap_min_s = 0.5 s
    ds, segments = make_readings([noisy_line(n, rng)], times=[_times(n, steps)])
    flags, result = run_stage(ds, segments)
    np.testing.assert_array_equal(np.flatnonzero(flags & GAP), [800])
    gaps = result.tables["gaps"]
    assert len(gaps) == 1
    assert gaps["duration_s"].iloc[0] == pytest.approx(2.1, abs=1e-9)  # ns rounding only
    assert gaps["source_row"].iloc[0] == 801  # 1-based data row of reading 800
    assert result.summary["longest_gap_s"] == pytest.approx(2.1, abs=1e-9)
    flags, _ = run_stage(ds, segments, gap_min_s=0.2)
    np.testing.assert_array_equal(np.flatnonzero(flags & GAP), [800, 1600])


def test_gap_splits_spike_test():
    # A field change across a gap is no spike: the runs either side of a gap
    # are tested apart (and a spike right after the gap is still found).
    rng = np.random.default_rng(10)
    n = 2000
    field = noisy_line(n, rng)
    field[1000:] += 40.0  # the sensor comes back 40 nT higher after the gap
    field[1000] += 25.0  # and its first reading is a spike
    steps = np.full(n - 1, DT_S)
    steps[999] = 5.0
    ds, segments = make_readings([field], times=[_times(n, steps)])
    flags, _ = run_stage(ds, segments)
    np.testing.assert_array_equal(np.flatnonzero(flags & GAP), [1000])
    np.testing.assert_array_equal(np.flatnonzero(flags & SPIKE), [1000])


# --------------------------------------------------------------------------
# Segments, chunks, existing flags
# --------------------------------------------------------------------------


def test_segments_are_independent():
    rng = np.random.default_rng(11)
    a = noisy_line(1000, rng)
    b = noisy_line(1000, rng) + 500.0  # the next sensor reads 500 nT higher
    c = noisy_line(1000, rng) - 300.0  # the next line another level
    a[-1] += 30.0  # spike on the last reading of a segment
    b[0] -= 30.0  # spike on the first reading of the next
    b[1] += 12.0  # and on the second
    c[0] += 8.0
    c[1] += 8.0  # two-sample spike at a segment start
    ds, segments = make_readings([a, b, c], lines=[0, 0, 1], sensors=[0, 1, 0])
    flags, result = run_stage(ds, segments)
    np.testing.assert_array_equal(np.flatnonzero(flags & SPIKE), [999, 1000, 1001, 2000, 2001])
    assert not np.any(flags & (DROPOUT | GAP))
    table = result.tables["spikes_by_line"]
    assert table[["line", "sensor"]].values.tolist() == [["L100", "S1"], ["L100", "S2"], ["L101", "S1"]]
    assert table["spikes"].tolist() == [1, 2, 2]


def test_level_step_inside_a_segment_is_not_a_spike():
    rng = np.random.default_rng(12)
    field = noisy_line(2000, rng)
    field[1000:] += 30.0
    ds, segments = make_readings([field])
    flags, _ = run_stage(ds, segments)
    assert not np.any(flags & SPIKE)


def _mixed_survey(rng, chunk_target):
    """Eight segments (four lines, two sensors) with spikes, a NaN run, a stuck
    run and a time gap each; returns the dataset, its segments and the
    indices of the injected spikes."""
    fields, times, spikes_at = [], [], []
    t = T0
    offset = 0
    for k in range(8):
        n = 900 + 150 * k
        f = noisy_line(n, rng) + 20.0 * k
        free = np.r_[10:90, 120:290, 330 : n // 2 - 10, n // 2 + 10 : n - 10]
        at = np.sort(rng.choice(free[::7], 5, replace=False))
        f[at] += rng.choice([-1, 1], 5) * rng.uniform(5, 200, 5)
        if k % 2:
            f[0] += 50.0  # a spike on the first reading of every second segment
            at = np.r_[0, at]
        f[100:104] = np.nan
        f[300:315] = f[299]
        steps = np.full(n - 1, DT_S)
        steps[n // 2] = 3.0
        times.append(t + np.round(np.cumsum(np.r_[0.0, steps]) * 1e9).astype("timedelta64[ns]"))
        t = times[-1][-1] + np.timedelta64(10, "s")
        fields.append(f)
        spikes_at.append(offset + at)
        offset += n
    ds, segments = make_readings(
        fields, lines=[0, 0, 1, 1, 2, 2, 3, 3], sensors=[0, 1] * 4, times=times, chunk_target=chunk_target
    )
    return ds, segments, np.concatenate(spikes_at)


def test_chunking_invariance():
    one, seg_one, expected = _mixed_survey(np.random.default_rng(13), chunk_target=None)
    many, seg_many, _ = _mixed_survey(np.random.default_rng(13), chunk_target=2500)
    assert one["total_field"].data.numblocks == (1,)
    assert many["total_field"].data.numblocks[0] >= 4
    flags_one, res_one = run_stage(one, seg_one)
    flags_many, res_many = run_stage(many, seg_many)
    # Identical bits, exactly: every computation is per segment.
    np.testing.assert_array_equal(flags_one, flags_many)
    assert res_one.summary == res_many.summary
    np.testing.assert_array_equal(np.flatnonzero(flags_one & SPIKE), expected)
    assert res_one.summary["gaps"] == 8


def test_existing_flags_and_values_kept():
    rng = np.random.default_rng(14)
    one, segments, _ = _mixed_survey(rng, chunk_target=3000)
    n = one.sizes["reading"]
    old = np.zeros(n, dtype=np.uint32)
    pick = rng.choice(n, 500, replace=False)
    kinds = [flag_mask("out_of_spec"), flag_mask("edge"), flag_mask("time_duplicate", "spike")]
    old[pick] = rng.choice(kinds, 500)
    ds, segments = make_readings(
        [one["total_field"].values[a:b] for a, b in zip(segments["start"].values, segments["stop"].values)],
        lines=segments["line_index"].values,
        sensors=segments["sensor_index"].values,
        times=[one["time"].values[a:b] for a, b in zip(segments["start"].values, segments["stop"].values)],
        flags=old,
        chunk_target=3000,
    )
    flags, result = run_stage(ds, segments)
    out = result.datasets["readings"]
    assert np.all((flags & old) == old)  # every existing bit is still set
    np.testing.assert_array_equal(out["total_field"].values, ds["total_field"].values)  # NaN == NaN here
    assert out.attrs == ds.attrs
    for name in ds.variables:
        assert out[name].attrs.keys() == ds[name].attrs.keys(), name
    assert out["flags"].dtype == np.uint32
    assert out is not ds
    validate_readings(out, result.datasets["segments"], where="spikes output")
    assert result.datasets["segments"].identical(segments)
    assert result.rejected == {}


def test_output_is_lazy_and_chunks_unchanged():
    one, segments, _ = _mixed_survey(np.random.default_rng(15), chunk_target=2500)
    _, result = run_stage(one, segments)
    out = result.datasets["readings"]["flags"]
    assert isinstance(out.data, da.Array)
    assert out.data.chunks == one["total_field"].data.chunks


def test_summary_matches_table():
    one, segments, _ = _mixed_survey(np.random.default_rng(16), chunk_target=2500)
    flags, result = run_stage(one, segments)
    table, summary = result.tables["spikes_by_line"], result.summary
    assert len(table) == segments.sizes["segment"]
    assert summary["readings"] == one.sizes["reading"] == table["readings"].sum()
    assert summary["spikes"] == np.count_nonzero(flags & SPIKE)
    assert summary["dropouts"] == np.count_nonzero(flags & DROPOUT) == 8 * (4 + 16)
    assert summary["gaps"] == np.count_nonzero(flags & GAP) == len(result.tables["gaps"])
    assert summary["lines"] == 4


# --------------------------------------------------------------------------
# Parameters and declaration
# --------------------------------------------------------------------------


def test_stage_declaration():
    assert spikes.STAGE.name == "spikes"
    assert spikes.STAGE.after == ("ingest",)
    assert spikes.STAGE.order == 10
    assert {p.name for p in spikes.PARAMS} == {
        "threshold_nT",
        "noise_multiple",
        "window_samples",
        "stuck_samples",
        "gap_factor",
        "gap_min_s",
    }
    assert set(FLAGS) >= {"spike", "dropout", "gap_before"}


@pytest.mark.parametrize(
    "bad",
    [
        {"window_samples": 10},
        {"window_samples": 3},
        {"threshold_nT": 0.0},
        {"noise_multiple": 0.5},
        {"stuck_samples": 2},
        {"gap_factor": 1.0},
        {"gap_min_s": -1.0},
        {"window_samples": 9.0},
        {"treshold_nT": 1.0},
    ],
)
def test_bad_parameters_refused(bad):
    with pytest.raises(ParameterError):
        spikes.check_params(bad)


def test_defaults():
    settings = spikes.check_params({})
    assert settings == {
        "threshold_nT": 1.0,
        "noise_multiple": 6.0,
        "window_samples": 9,
        "stuck_samples": 10,
        "gap_factor": 3.0,
        "gap_min_s": 0.5,
    }


def test_nan_median_rows():
    a = np.array([[1.0, np.nan, 3.0, 2.0], [np.nan] * 4, [4.0, 1.0, np.nan, np.nan]])
    # Reference values: numpy.nanmedian on the same rows.
    np.testing.assert_array_equal(spikes.nan_median_rows(a)[[0, 2]], np.nanmedian(a[[0, 2]], axis=1))
    assert np.isnan(spikes.nan_median_rows(a)[1])
