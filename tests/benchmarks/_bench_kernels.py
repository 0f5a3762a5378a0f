"""Kernel measurements of the benchmark: memory bandwidth, per-reading stages, gridding, lattice, FFT filters.

Each figure is taken in this process, with wall and CPU time:

* memory bandwidth: ``numpy.copyto`` of a 512 MB float64 array, bytes read
  plus written per second (best of three), with two threads copying halves
  at once as the two-core figure;
* per-reading stages (diurnal, main_field, heading, levelling): readings
  times the bytes a stage reads and writes per reading (all variables of
  its input and output readings stores), over the stage's wall time in the
  benchmark run, as a fraction of the two-thread copy bandwidth;
* gridding: the stage's line gridder (``grid_readings`` computed on the
  threaded scheduler) on the benchmark survey's levelled readings, accepted
  readings per second; accuracy against Delaunay cubic (Clough-Tocher,
  scipy) on the closed-form dipole synthetic of ``tests/_gridding_synth.py``
  (harmonica's dipole field) with tracks 1 m apart;
* IGRF lattice: interpolation per reading against the direct model per
  reading (``ppigrf``), single thread;
* FFT filters: the stage's tiled filters (all seven products, 512-cell tiles,
  64-cell halo, two threads) against harmonica's FFT transforms on the whole
  grid (upward, easting and northing derivatives, upward continuation,
  reduction to the pole, then the total gradient amplitude and tilt with
  numpy), cells per second, on a NaN-free 4096 x 4096 synthetic grid; and
  the temporaries of one tile (``tracemalloc`` peak inside
  ``filter_tile`` less its input and output) in units of the tile with its
  halo and of the padded tile.
"""

from __future__ import annotations

import threading
import time
import tracemalloc
from pathlib import Path

import numpy as np


class Timer:
    def __enter__(self):
        self.w, self.c = time.perf_counter(), time.process_time()
        return self

    def __exit__(self, *exc):
        self.wall = time.perf_counter() - self.w
        self.cpu = time.process_time() - self.c


def bandwidth(size_mb: int = 512) -> dict:
    """Copy bandwidth, GB/s (read + write), one thread and two threads."""
    n = size_mb * (1 << 20) // 8
    src = np.random.default_rng(0).random(n)
    dst = np.empty_like(src)
    np.copyto(dst, src)
    best1 = min(_timed(lambda: np.copyto(dst, src)) for _ in range(3))
    half = n // 2

    def two():
        ts = [threading.Thread(target=np.copyto, args=(dst[s], src[s])) for s in (slice(0, half), slice(half, n))]
        for t in ts:
            t.start()
        for t in ts:
            t.join()

    best2 = min(_timed(two) for _ in range(3))
    return {"copy_GB_s_1_thread": round(2 * src.nbytes / best1 / 1e9, 2),
            "copy_GB_s_2_threads": round(2 * src.nbytes / best2 / 1e9, 2)}


def _timed(fn) -> float:
    t = time.perf_counter()
    fn()
    return time.perf_counter() - t


def _reading_bytes(store: Path) -> int:
    import xarray as xr

    ds = xr.open_zarr(store, consolidated=True, zarr_format=2)
    return int(sum(v.dtype.itemsize for v in ds.variables.values() if v.dims == ("reading",)))


def reading_stages(run: Path, stages: dict, copy_GB_s: float) -> dict:
    """Effective bandwidth of the per-reading stages against the copy bandwidth."""
    chain = {"diurnal": "positions", "main_field": "diurnal", "heading": "main_field", "levelling": "heading"}
    out = {}
    for name, up in chain.items():
        rec = stages.get(name) or {}
        if not rec.get("wall_s"):
            continue
        n = rec.get("ledger_in") or 0
        per = _reading_bytes(run / up / "readings.zarr") + _reading_bytes(run / name / "readings.zarr")
        gbs = n * per / rec["wall_s"] / 1e9
        out[name] = {"bytes_per_reading": per, "readings": n, "wall_s": rec["wall_s"], "cpu_s": rec["cpu_s"],
                     "effective_GB_s": round(gbs, 3), "fraction_of_copy": round(gbs / copy_GB_s, 4),
                     "readings_per_s": round(n / rec["wall_s"])}
    return out


def gridding(run: Path) -> dict:
    """Line-gridder throughput on the survey, and accuracy against Delaunay cubic on the synthetic."""
    import sys

    import dask

    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
    import _gridding_synth as synth
    from lodeline.params import validate_table
    from lodeline.runner import load_stage_data
    from lodeline.steps import gridding as g

    data = load_stage_data((run / "levelling").resolve(), 1_000_000)
    params = validate_table(g.PARAMS, {}, "gridding")
    with dask.config.set(scheduler="threads"):
        grid, info = g.grid_readings(data["readings"], data["segments"], params)
        grid["residual"].data[:8, :8].compute()  # compile / load the kernels first
        grid, info = g.grid_readings(data["readings"], data["segments"], params)
        with Timer() as t:
            filled = int(np.isfinite(grid["residual"].data).sum().compute())
    result = {"readings_used": info["readings_used"], "cells": info["cells"], "filled_cells": filled,
              "wall_s": round(t.wall, 3), "cpu_s": round(t.cpu, 3),
              "readings_per_s": round(info["readings_used"] / t.wall), "readings_per_cpu_s": round(info["readings_used"] / t.cpu)}
    readings, segments = synth.make_survey(n_tracks=20, spacing_m=1.0)
    rms = {}
    for method in ("lines", "cubic"):
        p = validate_table(g.PARAMS, {"method": method, "cell_size_m": 0.25, "blank_distance_m": 1.5}, "gridding")
        gg, _ = g.grid_readings(readings, segments, p)
        values = gg["residual"].values
        e, n = np.meshgrid(gg["easting"].values, gg["northing"].values)
        ux, uy = synth._frame(30.0)
        de, dn = e - synth.ORIGIN[0], n - synth.ORIGIN[1]
        a, c = de * ux + dn * uy, -de * uy + dn * ux
        inner = (a > 1) & (a < 55) & (c > 0.5) & (c < 18.5)
        rms[method] = (values, inner)
    truth = synth.field(e, n)
    ok = rms["lines"][1] & np.isfinite(rms["lines"][0]) & np.isfinite(rms["cubic"][0])
    result["accuracy_rms_nT"] = {m: round(float(np.sqrt(np.mean((v[ok] - truth[ok]) ** 2))), 4) for m, (v, _) in rms.items()}
    return result


def lattice() -> dict:
    """Per-reading cost of the lattice interpolation and of the direct model, single thread."""
    from pyproj import CRS

    from lodeline.steps import _main_field_lattice as lat

    wkt = CRS.from_epsg(32631).to_wkt()
    rng = np.random.default_rng(0)
    m = 2_000_000
    e = 480_000 + (np.cumsum(rng.normal(0.2, 0.02, m)) % 20_000)
    n = np.linspace(5_990_000, 6_005_000, m)
    z = rng.uniform(-15, -8, m)
    t = (np.datetime64("2026-05-14T07:00", "ns").astype(np.int64) + np.arange(m) * 100_000_000).astype("datetime64[ns]")
    bounds = {"easting": (e.min(), e.max()), "northing": (n.min(), n.max()), "elevation": (z.min(), z.max()),
              "time": (t.min(), t.max())}
    table = lat.build_lattice(bounds, wkt, 1000.0, 100.0, 24 * 3600 * 10**9, 0.0)
    lat.interpolate(e[:10], n[:10], z[:10], t[:10], lattice=table)
    best = []
    for _ in range(3):
        with Timer() as ti:
            lat.interpolate(e, n, z, t, lattice=table)
        best.append((ti.wall, ti.cpu))
    wall, cpu = min(best)
    k = 2000
    with Timer() as td:
        lat.direct_total_field(e[:k], n[:k], z[:k], t[:k], wkt, 0.0)
    return {"lattice_us_per_reading_wall": round(wall / m * 1e6, 4), "lattice_us_per_reading_cpu": round(cpu / m * 1e6, 4),
            "direct_us_per_reading_wall": round(td.wall / k * 1e6, 2), "direct_us_per_reading_cpu": round(td.cpu / k * 1e6, 2),
            "speedup_cpu": round((td.cpu / k) / (cpu / m)), "speedup_wall": round((td.wall / k) / (wall / m))}


def fft_filters(size: int = 4096) -> dict:
    """Tiled stage filters against harmonica's whole-grid FFT transforms; tile temporaries."""
    import dask
    import dask.array as da
    import harmonica as hm
    import xarray as xr

    from lodeline.steps import _enhancement_fft as fft
    from lodeline.steps import enhancement as enh

    rng = np.random.default_rng(1)
    y, x = np.mgrid[0:size, 0:size] * 0.25
    values = 5 * np.sin(x / 7.0) * np.cos(y / 11.0) + rng.normal(0, 0.05, (size, size))
    field = (68.7, 2.1)
    grid = xr.DataArray(values, dims=("northing", "easting"),
                        coords={"northing": np.arange(size) * 0.25, "easting": np.arange(size) * 0.25})
    with Timer() as th:
        up = hm.derivative_upward(grid)
        de = hm.derivative_easting(grid, method="fft")
        dn = hm.derivative_northing(grid, method="fft")
        hm.upward_continuation(grid, height_displacement=1.0)
        hm.reduction_to_pole(grid, inclination=field[0], declination=field[1])
        np.sqrt(up**2 + de**2 + dn**2)
        np.arctan2(up, np.hypot(de, dn))
    del up, de, dn
    pad = next(p.default for p in enh.PARAMS if p.name == "pad_fraction")  # the stage's default
    residual = da.from_array(values, chunks=(512, 512))
    with dask.config.set(scheduler="threads"):
        warm = enh.enhance(residual[:1024, :1024].rechunk(512), (0.25, 0.25), fft.PRODUCTS, 64, pad, 1.0, field, 20.0, 16)
        warm.compute()
        with Timer() as tl:
            stack = enh.enhance(residual, (0.25, 0.25), fft.PRODUCTS, 64, pad, 1.0, field, 20.0, 16)
            target = np.empty(stack.shape)
            da.store(stack, target, lock=False)
    # Temporaries of one tile with its halo (640 x 640), NaN blanks in it.
    tile = values[:640, :640].copy()
    tile[300:340, 100:500] = np.nan
    fft.filter_tile(tile, fft.PRODUCTS, (0.25, 0.25), pad, 1.0, field, None, 20.0, 16)
    tracemalloc.start()
    tracemalloc.reset_peak()
    base = tracemalloc.get_traced_memory()[0]
    out = fft.filter_tile(tile, fft.PRODUCTS, (0.25, 0.25), pad, 1.0, field, None, 20.0, 16)
    peak = tracemalloc.get_traced_memory()[1] - base
    tracemalloc.stop()
    padded = 1
    for n in tile.shape:
        import scipy.fft
        padded *= scipy.fft.next_fast_len(n + 2 * max(8, int(np.ceil(pad * n))), real=True)
    temporaries = peak - out.nbytes
    cells = size * size
    return {"grid_cells": cells, "harmonica_wall_s": round(th.wall, 2), "harmonica_cpu_s": round(th.cpu, 2),
            "tiled_wall_s": round(tl.wall, 2), "tiled_cpu_s": round(tl.cpu, 2),
            "harmonica_cells_per_s": round(cells / th.wall), "tiled_cells_per_s": round(cells / tl.wall),
            "throughput_ratio": round(th.wall / tl.wall, 2), "cpu_ratio": round(th.cpu / tl.cpu, 2),
            "tile_temporaries_MB": round(temporaries / 1e6, 1),
            "temporaries_over_tile_with_halo": round(temporaries / tile.nbytes, 2),
            "temporaries_over_padded_tile": round(temporaries / (padded * 8), 2), "pad_fraction": pad}


def all_kernels(toml: Path, stages: dict | None = None) -> dict:
    """Every kernel figure; the per-reading stage figures need the stage results of the run."""
    run = toml.parent / "run"
    out = {"bandwidth": bandwidth()}
    print(f"bandwidth {out['bandwidth']}", flush=True)
    if stages:
        out["reading_stages"] = reading_stages(run, stages, out["bandwidth"]["copy_GB_s_2_threads"])
        print(f"reading stages {out['reading_stages']}", flush=True)
    out["lattice"] = lattice()
    print(f"lattice {out['lattice']}", flush=True)
    out["gridding"] = gridding(run)
    print(f"gridding {out['gridding']}", flush=True)
    out["fft"] = fft_filters()
    print(f"fft {out['fft']}", flush=True)
    return out
