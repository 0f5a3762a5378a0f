"""The by-hand comparison: what a capable user would write with the same libraries, used directly.

Run as its own process (so its peak memory is its own)::

    python tests/benchmarks/_bench_byhand.py DATA_FOLDER OUT_FOLDER

Steps, each the obvious call of a general-purpose library on the whole survey:

1. read every readings file and the base-station file with pandas, parse
   the times, project longitude/latitude to the survey CRS with pyproj;
2. move each reading from the antenna to its sensor: the course from the
   smoothed track of each line and sensor (pandas rolling mean), the known
   12 m layback along it and the sensor's cross offset across it (no time
   lag estimate: it is a 0.6 m along-track shift, inside the 1 m match
   radius);
3. subtract the base-station variation about its median (``numpy.interp``);
4. subtract the IGRF-14 total field at the survey centre (``ppigrf``, one
   evaluation; the residual gradient of the main field across a few km is
   removed with the levelling);
5. level each track (one line of one sensor) by subtracting its median
   (pandas ``groupby``): removes sensor offsets, heading error and most
   drift;
6. grid with verde's Delaunay-based cubic gridder (``verde.Cubic``, scipy's
   Clough-Tocher) over the whole survey at 0.25 m, blanking cells more than
   1.5 m from a reading (``verde.distance_mask``);
7. harmonica's FFT filters on the whole grid (blanks filled with zero, the
   mean removed first): upward, easting and northing derivatives, total
   gradient amplitude, upward continuation by 1 m and reduction to the
   pole;
8. scipy peak finding: local maxima of the total gradient amplitude
   (``scipy.ndimage.maximum_filter`` over 1.5 m) above 5 times its robust
   noise level (1.4826 x MAD of the filled cells);
9. harmonica's Euler deconvolution (structural index 3) in a 6 m window
   round each peak; the solution's position is the target.

It writes no GeoTIFF or picture (the pipeline writes both: this favours the
by-hand script) and prints a JSON line of per-step wall and CPU times.
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

CELL = 0.25
BLANK = 1.5
LAYBACK = 12.0
OFFSETS = {"S1": -2.0, "S2": -1.0, "S3": 0.0, "S4": 1.0, "S5": 2.0}
CRS = "EPSG:32631"


class Clock:
    def __init__(self):
        self.steps = {}
        self._t, self._c = time.perf_counter(), time.process_time()

    def tick(self, name):
        t, c = time.perf_counter(), time.process_time()
        self.steps[name] = {"wall_s": round(t - self._t, 3), "cpu_s": round(c - self._c, 3)}
        print(f"by hand: {name} {self.steps[name]}", file=sys.stderr, flush=True)
        self._t, self._c = t, c


def main(data: Path, out: Path) -> dict:
    import harmonica as hm
    import ppigrf
    import pyproj
    import scipy.ndimage as ndi
    import verde as vd
    import xarray as xr

    clock = Clock()
    df = pd.concat([pd.read_csv(p) for p in sorted(data.glob("readings_*.csv.gz"))], ignore_index=True)
    df["time"] = pd.to_datetime(df["time"], utc=True)
    base = pd.read_csv(data / "base_station.csv")
    base_t = pd.to_datetime(base["date"], utc=True) + pd.to_timedelta(base["seconds_of_day"], unit="s")
    proj = pyproj.Transformer.from_crs("EPSG:4326", CRS, always_xy=True)
    df["e"], df["n"] = proj.transform(df["lon"].to_numpy(), df["lat"].to_numpy())
    clock.tick("read")

    # Layback and cross offsets along the smoothed course of each track.
    df = df.sort_values(["line", "sensor", "time"], kind="stable").reset_index(drop=True)
    g = df.groupby(["line", "sensor"], sort=False)
    se = g["e"].transform(lambda s: s.rolling(51, center=True, min_periods=1).mean())
    sn = g["n"].transform(lambda s: s.rolling(51, center=True, min_periods=1).mean())
    de = se.groupby([df["line"], df["sensor"]]).diff().bfill()
    dn = sn.groupby([df["line"], df["sensor"]]).diff().bfill()
    norm = np.hypot(de, dn).replace(0, np.nan)
    ue, un = (de / norm).fillna(0.0), (dn / norm).fillna(0.0)
    across = df["sensor"].map(OFFSETS).to_numpy()
    df["e"] = df["e"] - LAYBACK * ue + across * un
    df["n"] = df["n"] - LAYBACK * un - across * ue
    clock.tick("positions")

    t_read = df["time"].astype("int64").to_numpy() / 1e9
    t_base = base_t.astype("int64").to_numpy() / 1e9
    variation = base["field_nT"].to_numpy() - np.median(base["field_nT"])
    df["field"] = df["field_nT"] - np.interp(t_read, t_base, variation)
    clock.tick("diurnal")

    lon, lat = pyproj.Transformer.from_crs(CRS, "EPSG:4326", always_xy=True).transform(df["e"].mean(), df["n"].mean())
    when = df["time"].iloc[len(df) // 2].to_pydatetime().replace(tzinfo=None)
    be, bn, bu = ppigrf.igrf(lon, lat, 0.0, when)
    df["field"] -= float(np.sqrt(be**2 + bn**2 + bu**2).ravel()[0])
    clock.tick("main_field")

    df = df[np.isfinite(df["field"])]
    df["resid"] = df["field"] - df.groupby(["line", "sensor"])["field"].transform("median")
    clock.tick("levelling")

    coords = (df["e"].to_numpy(), df["n"].to_numpy())
    region = vd.get_region(coords)
    region = (np.floor(region[0] / CELL) * CELL, np.ceil(region[1] / CELL) * CELL,
              np.floor(region[2] / CELL) * CELL, np.ceil(region[3] / CELL) * CELL)
    gridder = vd.Cubic().fit(coords, df["resid"].to_numpy())
    grid = gridder.grid(region=region, spacing=CELL, dims=("northing", "easting"), data_names="residual")
    grid = vd.distance_mask(coords, maxdist=BLANK, grid=grid)
    clock.tick("gridding")

    res = grid["residual"]
    valid = np.isfinite(res)
    mean = float(res.where(valid).mean())
    filled = (res - mean).fillna(0.0)
    up = hm.derivative_upward(filled)
    east = hm.derivative_easting(filled, method="fft")
    north = hm.derivative_northing(filled, method="fft")
    tga = np.sqrt(up**2 + east**2 + north**2)
    cont = hm.upward_continuation(filled, height_displacement=1.0) + mean
    inc, dec = 68.7, 2.1
    rtp = hm.reduction_to_pole(filled, inclination=inc, declination=dec) + mean
    tga, up, east, north = (x.where(valid) for x in (tga, up, east, north))
    _ = cont.where(valid), rtp.where(valid)
    clock.tick("enhancement")

    t = tga.to_numpy()
    finite = t[np.isfinite(t)]
    noise = 1.4826 * np.median(np.abs(finite - np.median(finite)))
    size = int(round(BLANK / CELL)) * 2 + 1
    filled_t = np.where(np.isfinite(t), t, 0.0)
    peaks = (filled_t == ndi.maximum_filter(filled_t, size=size)) & (filled_t > 5 * noise)
    jj, ii = np.nonzero(peaks)
    clock.tick("picking")

    half = int(round(3.0 / CELL))
    e_axis, n_axis = grid["easting"].to_numpy(), grid["northing"].to_numpy()
    rows = []
    ee, nn = np.meshgrid(e_axis, n_axis)
    elev = float(np.nanmedian(-df["depth_m"]))
    r, d_up, d_e, d_n = res.to_numpy(), up.to_numpy(), east.to_numpy(), north.to_numpy()
    for j, i in zip(jj, ii):
        sl = (slice(max(0, j - half), j + half + 1), slice(max(0, i - half), i + half + 1))
        ok = np.isfinite(r[sl]) & np.isfinite(d_up[sl])
        if ok.sum() < 20:
            continue
        euler = hm.EulerDeconvolution(structural_index=3)
        try:
            euler.fit((ee[sl][ok], nn[sl][ok], np.full(ok.sum(), elev)),
                      (r[sl][ok], d_e[sl][ok], d_n[sl][ok], d_up[sl][ok]))
        except np.linalg.LinAlgError:
            continue
        x, y, z = euler.location_
        if np.hypot(x - e_axis[i], y - n_axis[j]) > 3.0:
            x, y = e_axis[i], n_axis[j]
        rows.append({"kind": "point", "easting_m": x, "northing_m": y, "elevation_m": z,
                     "depth_below_sensor_m": elev - z, "pick_value": t[j, i]})
    clock.tick("euler")
    targets = pd.DataFrame(rows, columns=["kind", "easting_m", "northing_m", "elevation_m", "depth_below_sensor_m", "pick_value"])
    out.mkdir(parents=True, exist_ok=True)
    targets.to_csv(out / "targets.csv", index=False)
    return {"steps": clock.steps, "readings": int(len(df)), "cells": int(res.size), "filled_cells": int(valid.sum()),
            "peaks": int(jj.size), "targets": int(len(targets))}


if __name__ == "__main__":
    result = main(Path(sys.argv[1]), Path(sys.argv[2]))
    (Path(sys.argv[2]) / "result.json").write_text(json.dumps(result, indent=1) + "\n")
    print("RESULT " + json.dumps(result))
