"""Property-based tests (hypothesis) of the numerical core.

Each property holds for every input of its kind, not only for the
synthetic surveys of the stage tests; hypothesis draws the inputs (random
crossover layouts, random track layouts, random target tables) and shrinks
any counter-example to a small one.

* Tie-line levelling (``steps/_levelling_tie.py``, ``level``) removes a
  constant added to a survey segment exactly: the segment's correction
  grows by that constant and nothing else changes. Exact because both
  steps are linear least-squares problems whose design holds a constant
  column for every survey segment that has a crossover (and the tie step's
  datum rows hold only tie segments): the added constant is ``A x`` for
  ``x`` that constant on that column, so the least-squares solution moves
  by exactly ``x`` and every misfit (hence every rejection) is unchanged.
  The only error is LSQR's (run to ``atol = btol = 1e-14``, Paige &
  Saunders 1982), hence the tolerance of 1e-9 nT per nT of data.
* The along-line robust trend (``steps/_levelling_trend.py``,
  ``robust_trend``) also takes up a constant: B-splines sum to one at every
  point (de Boor 1978, A Practical Guide to Splines, ch. IX) and the
  second-difference penalty vanishes on a constant (Eilers & Marx 1996),
  and the biweight weights depend only on residuals. It is exact only to
  the stopping rule of its reweighting (a change below 1e-4 robust
  standard deviations ends the iterations, and the two runs may stop one
  iteration apart), so the tolerance is that, not rounding.
* Gridding (``steps/gridding.py`` with ``_gridding_tiles.py``,
  ``_gridding_lines.py``) never writes a value into a cell farther than
  ``blank_distance_m`` from every accepted reading, for random straight
  tracks, flags and tilings, by the line gridder and by the Delaunay
  reference; distances checked with ``scipy.spatial.cKDTree``.
* The target table's score (``steps/ranking.py``, ``score_rows``): ranks
  are a permutation of 1..n, scores lie in [0, 100], the score is
  non-decreasing in snr with the other terms fixed, and a higher score
  never ranks lower; merging (``_merge``) keeps no two targets within both
  merge distances and merges every pick into a kept target within them.

That the target table holds no target outside the gridded survey mask is
checked on whole runs (``tests/test_reliability.py`` on a small survey and
``tests/test_cli.py`` on the demo), where the mask and the table meet.

References: Paige, C. C. & Saunders, M. A. (1982), LSQR, ACM TOMS 8(1);
de Boor, C. (1978), A Practical Guide to Splines, Springer; Eilers, P. H. C.
& Marx, B. D. (1996), Flexible smoothing with B-splines and penalties,
Statistical Science 11(2).
"""

from __future__ import annotations

import dask.array as da
import numpy as np
import pandas as pd
import pytest
import xarray as xr
from hypothesis import HealthCheck, Phase, assume, example, given, settings
from hypothesis import strategies as st
from scipy.spatial import cKDTree

from lodeline.model import DataError, flag_attrs, flag_mask, segment_chunks, segments_dataset
from lodeline.params import validate_table
from lodeline.steps import enhancement, gridding, ranking
from lodeline.steps._levelling_tie import level
from lodeline.steps._levelling_trend import robust_trend

#: Modest example counts: the whole file runs in well under a minute on two cores.
FAST = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
SLOWER = settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])


# --------------------------------------------------------------------------
# Tie-line levelling: a constant on a survey segment is removed exactly
# --------------------------------------------------------------------------
@st.composite
def crossover_layouts(draw):
    """Survey segments crossing tie segments, with crossover differences (nT)."""
    n_survey = draw(st.integers(1, 7))
    n_tie = draw(st.integers(1, 4))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n_survey):
        # each survey segment crosses a non-empty subset of the tie segments
        crossed = [j for j in range(n_tie) if rng.random() < 0.7] or [int(rng.integers(n_tie))]
        rows += [(i, n_survey + j, j) for j in crossed]
    seg_line, seg_tie, tie_line = (np.array(c, dtype=np.int64) for c in zip(*rows))
    is_tie = np.r_[np.zeros(n_survey, bool), np.ones(n_tie, bool)]
    level_s = rng.normal(0, 5, n_survey + n_tie)  # invented segment levels, nT
    drift = rng.normal(0, 2, n_survey)  # and survey-segment drifts over their length, nT
    tau = rng.uniform(-1, 1, seg_line.size)
    noise = draw(st.sampled_from([0.0, 0.05, 0.5]))
    d = level_s[seg_line] + drift[seg_line] * tau - level_s[seg_tie] + rng.normal(0, noise, seg_line.size) if noise else \
        level_s[seg_line] + drift[seg_line] * tau - level_s[seg_tie]
    return seg_line, seg_tie, d, tau, tie_line, is_tie, n_survey


@FAST
@given(layout=crossover_layouts(), trend_order=st.sampled_from([0, 1, 2]), level_ties=st.booleans(),
       outlier_multiple=st.sampled_from([0.0, 4.0]), shift=st.lists(st.floats(-1e3, 1e3), min_size=7, max_size=7))
def test_tie_levelling_removes_a_survey_segment_constant_exactly(layout, trend_order, level_ties, outlier_multiple, shift):
    seg_line, seg_tie, d, tau, tie_line, is_tie, n_survey = layout
    c = np.r_[np.asarray(shift[:n_survey]), np.zeros(is_tie.sum())]
    kw = dict(trend_order=trend_order, level_ties=level_ties, outlier_multiple=outlier_multiple)
    base = level(seg_line, seg_tie, d, tau, tie_line, is_tie, **kw)
    moved = level(seg_line, seg_tie, d + c[seg_line], tau, tie_line, is_tie, **kw)
    # the same crossovers used and the same polynomial orders
    np.testing.assert_array_equal(moved.used, base.used)
    np.testing.assert_array_equal(moved.used_ties, base.used_ties)
    np.testing.assert_array_equal(moved.order, base.order)
    # every survey segment with a correction takes up its constant; the rest is unchanged
    # (tolerance: LSQR to 1e-14 relative, a 1e-9 nT per nT of data margin above it)
    tol = 1e-9 * (1.0 + np.abs(d).max() + np.abs(c).max())
    solved = base.order >= 0
    expected = base.coefficients.copy()
    expected[solved, 0] += c[solved]
    np.testing.assert_allclose(moved.coefficients, expected, rtol=0, atol=tol)
    # levelled crossover differences (difference minus the change levelling makes) are the same
    # on every segment levelled (a segment whose crossovers were all rejected gets no correction)
    on = solved[seg_line]
    np.testing.assert_allclose(((d + c[seg_line]) - moved.model)[on], (d - base.model)[on], rtol=0, atol=tol)


def test_single_tie_line_keeps_exactly_fitted_crossovers():
    """One tie line, so every survey segment has one crossover that its
    constant fits exactly: all misfits are rounding, and outlier rejection
    must not drop any of them (a dropped one leaves its line unlevelled)."""
    rng = np.random.default_rng(3)
    for _ in range(50):
        n = int(rng.integers(2, 8))
        seg_line, seg_tie = np.arange(n), np.full(n, n)
        is_tie = np.r_[np.zeros(n, bool), True]
        d = rng.normal(0, 5, n)
        sol = level(seg_line, seg_tie, d, rng.uniform(-1, 1, n), np.zeros(n, np.int64), is_tie,
                    trend_order=1, level_ties=True, outlier_multiple=4.0)
        assert sol.used.all() and (sol.order[:n] == 0).all()
        # every line levelled to the tie: the levelled differences vanish (to LSQR precision)
        np.testing.assert_allclose(d - sol.model, 0.0, atol=1e-9 * (1 + np.abs(d).max()))


# --------------------------------------------------------------------------
# Along-line robust trend: a constant goes into the trend
# --------------------------------------------------------------------------
@FAST
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(8, 400), knot=st.sampled_from([2.0, 5.0, 20.0]),
       shift=st.floats(-1e4, 1e4), bump=st.floats(0, 50))
def test_trend_takes_up_a_constant(seed, n, knot, shift, bump):
    rng = np.random.default_rng(seed)
    s = np.cumsum(rng.uniform(0.05, 0.5, n))
    v = 0.02 * s + np.sin(s / 7.0) + bump * np.exp(-((s - s[n // 2]) ** 2) / 2.0) + rng.normal(0, 0.05, n)
    base = robust_trend(s, v, knot)
    moved = robust_trend(s, v + shift, knot)
    r = v - base
    scale = 1.4826 * np.median(np.abs(r - np.median(r)))
    # tolerance: one reweighting step below the stopping rule (1e-4 robust sigma) plus rounding of |v| + |shift|
    tol = 1e-4 * max(scale, 1e-12) + 1e-10 * (np.abs(v).max() + abs(shift) + 1.0)
    np.testing.assert_allclose(moved - shift, base, rtol=0, atol=tol)


# --------------------------------------------------------------------------
# Gridding: no value in a blanked cell
# --------------------------------------------------------------------------
@st.composite
def track_layouts(draw):
    """Readings of a few straight tracks at random positions and directions,
    some flagged, as a readings dataset and its segments (model conventions)."""
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    n_tracks = draw(st.integers(1, 6))
    e, n, line = [], [], []
    for k in range(n_tracks):
        m = int(rng.integers(1, 120))
        x0, y0 = rng.uniform(0, 30, 2)
        ang = rng.uniform(0, 2 * np.pi)
        s = np.cumsum(rng.uniform(0.02, 0.6, m))
        e.append(500000.0 + x0 + s * np.cos(ang) + rng.normal(0, 0.05, m))
        n.append(6000000.0 + y0 + s * np.sin(ang) + rng.normal(0, 0.05, m))
        line.append(np.full(m, k))
    e, n, line = np.concatenate(e), np.concatenate(n), np.concatenate(line).astype(np.int32)
    size = e.size
    flags = np.where(rng.random(size) < draw(st.sampled_from([0.0, 0.1, 0.5])), flag_mask("spike"), 0).astype(np.uint32)
    value = np.sin(e / 3.0) + np.cos(n / 5.0)
    segs = segments_dataset(line, np.zeros(size, dtype=np.int16))
    t0 = np.datetime64("2026-05-14T08:00:00", "ns")
    ds = xr.Dataset(
        {"residual": ("reading", value, {"units": "nT"}), "flags": ("reading", flags, flag_attrs())},
        coords={
            "time": ("reading", t0 + (np.arange(size) * 100_000_000).astype("timedelta64[ns]")),
            "easting": ("reading", e), "northing": ("reading", n),
            "elevation": ("reading", np.zeros(size)), "altitude": ("reading", np.full(size, 2.5)),
            "line_index": ("reading", line), "sensor_index": ("reading", np.zeros(size, dtype=np.int16)),
        },
        attrs={"crs": "EPSG:32631", "crs_wkt": "EPSG:32631", "line_names": [f"L{i}" for i in range(n_tracks)],
               "line_kinds": ["survey"] * n_tracks},
    )
    lengths = (segs["stop"] - segs["start"]).values
    chunk = int(draw(st.sampled_from([size, 50, 200])))
    return ds.chunk({"reading": segment_chunks(lengths, chunk)}), segs


@SLOWER
@given(layout=track_layouts(), method=st.sampled_from(["lines", "linear"]), cell=st.sampled_from([0.2, 0.35, 0.5]),
       blank=st.floats(0.3, 3.0), tile_cells=st.sampled_from([8, 16, 512]))
def test_gridding_never_fills_a_blanked_cell(layout, method, cell, blank, tile_cells):
    readings, segments = layout
    p = validate_table(gridding.PARAMS, {"method": method, "cell_size_m": cell, "blank_distance_m": blank,
                                         "tile_cells": tile_cells, "geotiff": False, "quicklook": False}, "gridding")
    try:
        grid, _ = gridding.grid_readings(readings, segments, p)
    except DataError:
        # refused (no accepted reading): nothing is written at all
        ok = (readings["flags"].values & np.uint32(flag_mask(*p["exclude_flags"]))) == 0
        assert not ok.any()
        return
    values = grid["residual"].values
    ok = (readings["flags"].values & np.uint32(flag_mask(*p["exclude_flags"]))) == 0
    tree = cKDTree(np.column_stack([readings["easting"].values[ok], readings["northing"].values[ok]]))
    ge, gn = np.meshgrid(grid["easting"].values, grid["northing"].values)
    dist, _ = tree.query(np.column_stack([ge.ravel(), gn.ravel()]))
    dist = dist.reshape(ge.shape)
    # Tolerance: 1e-9 m, float rounding of coordinates near 5e5 m (a cell on the limit may go either way).
    assert not np.isfinite(values[dist > blank + 1e-9]).any()


# --------------------------------------------------------------------------
# Target table: score, rank and merging
# --------------------------------------------------------------------------
RANK_PARAMS = ranking.check_params({})


@st.composite
def target_tables(draw):
    n = draw(st.integers(1, 30))
    pos = st.floats(1e-3, 1e5, allow_nan=False)
    snr = draw(st.lists(st.one_of(pos, st.just(0.0), st.just(float("nan"))), min_size=n, max_size=n))
    r2 = draw(st.lists(st.one_of(st.floats(-1, 1.5), st.just(float("nan"))), min_size=n, max_size=n))
    mass = draw(st.lists(st.one_of(st.floats(0, 1e5), st.just(float("nan"))), min_size=n, max_size=n))
    kind = draw(st.lists(st.sampled_from(["point", "cluster", "linear", "extended"]), min_size=n, max_size=n))
    return pd.DataFrame({"snr": snr, "fit_r2": r2, "mass_max_kg": mass, "kind": kind})


@FAST
@given(table=target_tables(), weights=st.tuples(st.floats(0, 5), st.floats(0, 5), st.floats(0, 5)))
def test_score_and_rank(table, weights):
    assume(sum(weights) > 1e-6)
    s = {**RANK_PARAMS, "weight_snr": weights[0], "weight_fit": weights[1], "weight_mass": weights[2]}
    out = ranking.score_rows(table, s)
    n = len(table)
    assert sorted(out["rank"]) == list(range(1, n + 1))
    score = out["score"].to_numpy()
    assert np.isfinite(score).all() and (score >= 0).all() and (score <= 100 + 1e-9).all()
    # a higher score never ranks below a lower one
    order = np.argsort(out["rank"].to_numpy())
    assert (np.diff(score[order]) <= 1e-12).all()
    # raising one row's snr, the rest fixed, never lowers its score
    bigger = table.copy()
    bigger["snr"] = np.nan_to_num(table["snr"].to_numpy(float), nan=0.0) * 2 + 1.0
    raised = ranking.score_rows(bigger, s)["score"].to_numpy()
    assert (raised >= score - 1e-9).all()


@FAST
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(1, 25), dist=st.floats(0, 3), depth=st.floats(0, 2))
def test_merge_keeps_no_two_targets_within_both_distances(seed, n, dist, depth):
    rng = np.random.default_rng(seed)
    fitted = pd.DataFrame({
        "pick_id": np.arange(1, n + 1),
        "easting_m": rng.uniform(0, 6, n), "northing_m": rng.uniform(0, 6, n), "elevation_m": rng.uniform(-3, -1, n),
        "position_sigma_m": rng.uniform(0.01, 1, n),
    }, index=rng.permutation(n) + 100)
    s = {**RANK_PARAMS, "merge_distance_m": dist, "merge_depth_m": depth}
    kept, merged = ranking._merge(fitted, s)
    assert len(kept) + len(merged) == n
    xyz = kept[["easting_m", "northing_m", "elevation_m"]].to_numpy()
    for i in range(len(xyz)):
        for j in range(i + 1, len(xyz)):
            assert np.hypot(*(xyz[i, :2] - xyz[j, :2])) > dist or abs(xyz[i, 2] - xyz[j, 2]) > depth
    by_pick = fitted.set_index("pick_id")
    for _, m in merged.iterrows():
        assert m["into_pick_id"] in set(kept["pick_id"])
        a, b = by_pick.loc[m["pick_id"]], by_pick.loc[m["into_pick_id"]]
        assert np.hypot(a.easting_m - b.easting_m, a.northing_m - b.northing_m) <= dist
        assert abs(a.elevation_m - b.elevation_m) <= depth
        # the kept row is the better-placed one
        assert b.position_sigma_m <= a.position_sigma_m


# --------------------------------------------------------------------------
# Enhancement tiling: each store chunk written by one tile
# --------------------------------------------------------------------------
@settings(max_examples=40, deadline=None, phases=[Phase.explicit, Phase.reuse, Phase.generate])  # no shrinking
@example(ny=20, nx=540, tile=512, halo=64)  # the defaults (tile_cells 512, halo_cells 64), a 540-cell axis
@example(ny=38, nx=109, tile=16, halo=16)  # the grid of tests/_reliability_survey.py with a 16-cell halo
@given(ny=st.integers(1, 150), nx=st.integers(1, 150), tile=st.integers(8, 64), halo=st.integers(0, 80))
def test_enhancement_tiles_never_share_a_store_chunk(ny, nx, tile, halo):
    """The tiles the enhancement stage filters are written into a zarr store
    chunked like the input grid (``tile`` cells) without a lock, so every
    tile must start and end on that chunk grid (or the grid's edge), and the
    tiles must cover the grid once."""
    residual = da.from_array(np.random.default_rng(0).normal(size=(ny, nx)), chunks=(tile, tile))
    _, found = enhancement.enhance(residual, (0.5, 0.5), ("derivative_upward",), halo, 0.25, 1.0, (68.0, 1.0), 20.0,
                                   16, details=True)
    cover = np.zeros((ny, nx), dtype=int)
    for ys, xs, _ in found["tiles"]:
        cover[ys, xs] += 1
        for sl, n in ((ys, ny), (xs, nx)):
            assert sl.start % tile == 0 and (sl.stop % tile == 0 or sl.stop == n), (sl, n, tile, halo)
    assert (cover == 1).all()
