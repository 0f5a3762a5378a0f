"""Generate the lodeline demo survey: a synthetic towed-array magnetometer survey.

Scenario (invented)
-------------------
"Tamsel Link" is a planned export-cable route across Tamsel Shoal, an
invented site in the southern North Sea (route start 54.10 N, 2.90 E, survey
CRS EPSG:32631, WGS 84 / UTM zone 31N). Before construction the survey
contractor runs an unexploded-ordnance (UXO) survey of a 600 m by 60 m
corridor in 8-15 m of water. The vessel tows a bar of five total-field
sensors (1 m apart across track, 12 m behind the GNSS antenna) about 2.5 m
above the seabed at about 2 m/s, 10 readings per second. Sixteen survey lines
4 m apart are run along the route in alternating directions, then four tie
lines across it. A base-station magnetometer on shore a few km away records
the external field at 1 Hz. Four of the buried items are QC seeds placed by
the contractor before the survey.

Physics of each reading
-----------------------
A reading recorded at time ``T`` was measured at ``t = T - lag`` at the true
sensor position (the point of the antenna's track ``layback`` metres behind
the antenna, where a towed bar follows, moved across that track's course by
the sensor offset), and is::

    field = |F(x, t) + b(x)| + G(x) + D(t) + a_i + b_i cos h + c_i sin h
            + o_i + r_i (t - t0) + noise + swell_i(t) (+ spikes, dropouts)

``F`` is the IGRF-14 main-field vector (IAGA Working Group V-MOD 2024),
``b`` the field of all buried items and of a deep basement body, modelled as
magnetic point dipoles (Blakely 1995), ``G`` a smooth regional geology field
(plane harmonic waves continued upward, Blakely 1995), ``D`` the external
(diurnal) variation, ``h`` the course heading, and the remaining terms the
per-sensor heading error, offset and linear drift; ``noise`` is white and
``swell_i`` an optional narrow-band (swell-like) noise of its own for each
sensor and line (``[sensors] swell_nT``, 0 by default; the noise figure of the
readings is then ``sqrt(noise_nT^2 + swell_nT^2)``). Induced moments follow the
permeable-sphere moment ``3 V B0 / mu0`` (Jackson 1999) times shape factors;
about 30 % of compact items carry remanence. Positions are recorded for the
antenna at the recorded time, depth and altitude at the recorded time.

References
----------
Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic Applications.
    Cambridge University Press.
Jackson, J. D. (1999). Classical Electrodynamics, 3rd ed. Wiley.
IAGA Working Group V-MOD (2024). International Geomagnetic Reference Field,
    14th generation (IGRF-14).

Outputs (in the output folder): ``readings_<line>.csv.gz`` (one per line),
``base_station.csv``, ``truth.csv``, ``seeds.csv`` and ``qc_events.csv``; see
``demo_survey/README.md`` for the columns. Helper modules: ``_geometry.py``
(route, lines, sensor positions), ``_physics.py`` (field models) and
``_targets.py`` (buried items).

Usage
-----
``python demo_survey/generate.py [--config demo_survey/generator.toml]
[--out demo_survey/data] [--scale 1.0]``. ``generate(config, out_dir, scale)``
does the same from Python; ``scale`` multiplies the route length (and with it
the number of tie lines, items and glitches), e.g. 36 gives about 10^7
readings. Lines are written block by block, so memory does not grow with the
scale.
"""

from __future__ import annotations

import argparse
import datetime as dt
import gzip
import io
import sys
import time
import tomllib
from pathlib import Path

import numpy as np
from pyproj import Transformer

if __package__:
    from . import _physics as phys
    from . import _targets as tgt
    from ._geometry import Array, Line, Route, World, seabed_at, sensor_positions
else:  # run as a script
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    import _physics as phys
    import _targets as tgt
    from _geometry import Array, Line, Route, World, seabed_at, sensor_positions

HERE = Path(__file__).resolve().parent
BLOCK_EPOCHS = 2000  # epochs computed and written at a time
READING_COLUMNS = "time,lon,lat,sensor,line,depth_m,altitude_m,field_nT"


# --------------------------------------------------------------------------
# Set-up
# --------------------------------------------------------------------------
def load_config(path):
    """Read the generator TOML file.

    Parameters
    ----------
    path : str or pathlib.Path

    Returns
    -------
    dict
    """
    with open(path, "rb") as fh:
        return tomllib.load(fh)


def make_world(cfg, scale):
    """Route, sensor bar, transformers and time origin from the config.

    Parameters
    ----------
    cfg : dict
        Parsed generator configuration.
    scale : float
        Multiplier of the route length.

    Returns
    -------
    World
        Without fields and sources (see :func:`build_fields`).
    """
    site, arr = cfg["site"], cfg["array"]
    to_grid = Transformer.from_crs("EPSG:4326", site["crs"], always_xy=True)
    to_lonlat = Transformer.from_crs(site["crs"], "EPSG:4326", always_xy=True)
    lon, lat = site["route_start_lon"], site["route_start_lat"]
    e0, n0 = to_grid.transform(lon, lat)
    e1, n1 = to_grid.transform(lon, lat + 0.001)
    route = Route(e0, n0, np.radians(site["route_azimuth_deg"]), site["route_length_m"] * scale,
                  site["corridor_width_m"] / 2.0)
    array = Array(list(arr["sensors"]), np.asarray(arr["cross_offsets_m"], dtype=float), arr["layback_m"],
                  arr["altitude_m"], float(arr["sample_rate_hz"]), float(arr["time_lag_s"]))
    first = dt.datetime.fromisoformat(cfg["scenario"]["first_line_start"].replace("Z", "+00:00"))
    t_first = first.hour * 3600 + first.minute * 60 + first.second + first.microsecond / 1e6
    return World(cfg, route, array, first.date(), t_first, to_lonlat, np.arctan2(e1 - e0, n1 - n0))


def make_line(world, rng, name, kind, index, u_v_start, azimuth, across, length, t_start):
    """Draw the speed and motion signals of one line.

    Parameters
    ----------
    world : World
    rng : numpy.random.Generator
    name, kind : str
        Line name and "survey" or "tie".
    index : int
        Position in the acquisition order.
    u_v_start : tuple of float
        Antenna start in route coordinates, m.
    azimuth : float
        Grid azimuth of travel, rad.
    across : float
        Nominal route ``v`` (survey line) or ``u`` (tie line), m.
    length : float
        Antenna run length, m.
    t_start : float
        Wanted start time, s of the survey date (rounded to the sample grid).

    Returns
    -------
    Line
    """
    v, a = world.cfg["vessel"], world.cfg["array"]
    speed = v["speed_m_s"] + rng.uniform(-1, 1) * v["speed_jitter_m_s"]
    rate = world.array.rate
    step_ms = int(round(1000 / rate))
    return Line(
        name, kind, index, world.route.to_en(*u_v_start), azimuth, across, speed,
        int(round(t_start * 1000 / step_ms)) * step_ms, int(length / speed * rate) + 1,
        phys.smooth_signal(rng, v["surge_rms_m"], v["surge_periods_s"]),
        phys.smooth_signal(rng, v["wander_rms_m"], v["wander_periods_s"]),
        phys.smooth_signal(rng, a["altitude_wander_m"], a["altitude_wander_periods_s"]),
        phys.smooth_signal(rng, a["heave_m"], a["heave_periods_s"]),
        phys.smooth_signal(rng, np.radians(a["roll_deg"]), a["roll_periods_s"]),
    )


def build_lines(world, rng):
    """Acquisition schedule: survey lines along the route, then tie lines.

    Survey lines are ``spacing_m`` apart across the corridor, acquired in
    order of ``v`` with alternating directions; tie lines cross the corridor
    at right angles, evenly spread along the route, also alternating.

    Returns
    -------
    list of Line
        In acquisition order.
    """
    cl, route, rate = world.cfg["lines"], world.route, world.array.rate
    L, hw, run = route.length, route.half_width, cl["run_in_m"]
    n_survey = int(round(2 * hw / cl["spacing_m"])) + 1
    forward_first = cl["first_direction"] == "forward"
    lines, t = [], world.t_first

    def turn():
        return cl["turn_time_s"] + rng.uniform(-1, 1) * cl["turn_time_jitter_s"]

    for i in range(n_survey):
        v = -hw + i * cl["spacing_m"]
        fwd = (i % 2 == 0) == forward_first
        u0 = -run if fwd else L + run
        az = route.azimuth + (0.0 if fwd else np.pi)
        line = make_line(world, rng, f"L{i + 1:03d}", "survey", len(lines), (u0, v), az, v, L + 2 * run, t)
        lines.append(line)
        t = line.t_end(rate) + turn()
    t += cl["transit_to_ties_s"] - cl["turn_time_s"]
    n_ties = max(1, int(round(L / cl["tie_spacing_m"])))
    half = hw + cl["tie_run_in_m"]
    for j in range(n_ties):
        u = (j + 0.5) * L / n_ties
        v0 = -half if j % 2 == 0 else half
        az = route.azimuth + (np.pi / 2 if j % 2 == 0 else -np.pi / 2)
        line = make_line(world, rng, f"T{j + 1:02d}", "tie", len(lines), (u, v0), az, u, 2 * half, t)
        lines.append(line)
        t = line.t_end(rate) + turn()
    return lines


def build_fields(world, lines, rng):
    """Attach the main-field lattice and the external-field model to ``world``.

    The lattice covers every line with a margin, from one hour before the
    first reading to one hour after the last.
    """
    cfg = world.cfg
    ends = [ln.antenna(np.array([ln.t_start, ln.t_end(world.array.rate)])) for ln in lines]
    es = np.concatenate([e for e, _ in ends])
    ns = np.concatenate([n for _, n in ends])
    pad = world.array.layback + 50.0
    bbox = (es.min() - pad, es.max() + pad, ns.min() - pad, ns.max() + pad)
    t_range = (world.t_first - 3600.0, lines[-1].t_end(world.array.rate) + 3600.0)
    world.main = phys.MainField(world.to_lonlat, bbox, t_range, world.date, world.grid_rotation, cfg["main_field"])
    world.diurnal = phys.make_diurnal(rng, cfg["diurnal"], cfg["site"]["route_start_lon"])


def deep_source(world):
    """The deep basement body as one dipole along the main field.

    Returns
    -------
    position : numpy.ndarray
        Easting, northing, elevation, m.
    moment : numpy.ndarray
        Moment east, north, up, A m^2.
    """
    g = world.cfg["geology"]
    e, n = world.route.to_en(g["deep_source_u_m"], g["deep_source_v_m"])
    z = g["deep_source_elevation_m"]
    f = world.main(e, n, z, world.t_first)
    return np.array([e, n, z]), f / np.linalg.norm(f) * g["deep_source_moment_Am2"]


# --------------------------------------------------------------------------
# Glitches
# --------------------------------------------------------------------------
def choose_glitches(world, lines, scale, rng):
    """Place spikes (any line) and dropouts (central survey lines).

    Spikes are single samples; they keep at least one second from each other
    and from dropouts on the same sensor.

    Returns
    -------
    list of dict
        Keys ``kind`` ("spike" or "dropout"), ``line`` (Line), ``sensor``
        (index), ``k0``, ``k1`` (epoch range, end exclusive), ``value_nT``.
    """
    g, rate = world.cfg["glitches"], world.array.rate
    n_sensors = len(world.array.names)
    survey = [ln for ln in lines if ln.kind == "survey"]
    events = []
    for _ in range(max(1, int(round(g["dropouts"] * scale)))):
        line = survey[rng.integers(len(survey) // 4, len(survey) - len(survey) // 4)]
        length = int(round(rng.uniform(*g["dropout_s"]) * rate))
        k0 = int(rng.integers(int(0.2 * line.n_epochs), int(0.8 * line.n_epochs) - length))
        events.append(dict(kind="dropout", line=line, sensor=int(rng.integers(n_sensors)), k0=k0, k1=k0 + length,
                           value_nT=np.nan))
    weights = np.array([ln.n_epochs for ln in lines], dtype=float)
    n_spikes = max(1, int(round(g["spikes"] * scale)))
    while sum(ev["kind"] == "spike" for ev in events) < n_spikes:
        line = lines[rng.choice(len(lines), p=weights / weights.sum())]
        k, s = int(rng.integers(10, line.n_epochs - 10)), int(rng.integers(n_sensors))
        clash = any(ev["line"] is line and ev["sensor"] == s and ev["k0"] - rate <= k < ev["k1"] + rate
                    for ev in events)
        if not clash:
            lo, hi = np.log(g["spike_nT"][0]), np.log(g["spike_nT"][1])
            value = float(np.exp(rng.uniform(lo, hi)) * rng.choice([-1.0, 1.0]))
            events.append(dict(kind="spike", line=line, sensor=s, k0=k, k1=k + 1, value_nT=round(value, 3)))
    return events


# --------------------------------------------------------------------------
# Readings
# --------------------------------------------------------------------------
def field_readings(world, line, t_true):
    """Noise-free total field of every sensor at true times ``t_true``, nT.

    Main field, buried items and deep source (exact total field), geology,
    external field, per-sensor offset, drift and heading error.

    Parameters
    ----------
    world : World
    line : Line
    t_true : numpy.ndarray
        True measurement times, s of the survey date, shape (N,).

    Returns
    -------
    numpy.ndarray
        Shape (len(t_true), n_sensors).
    """
    s = world.cfg["sensors"]
    e, n, z, h = sensor_positions(world, line, t_true)
    tt = np.broadcast_to(t_true[:, None], e.shape)
    total = np.linalg.norm(world.main(e, n, z, tt) + world.sources.field(e, n, z), axis=-1)
    total += phys.geology_waves(e, n, z, (world.route.e0, world.route.n0), world.cfg["geology"])
    total += world.diurnal(t_true)[:, None]
    hours = (t_true - world.t_first)[:, None] / 3600.0
    total += np.asarray(s["offset_nT"]) + np.asarray(s["drift_nT_per_h"]) * hours
    total += (np.asarray(s["heading_a_nT"]) + np.asarray(s["heading_b_nT"]) * np.cos(h)[:, None]
              + np.asarray(s["heading_c_nT"]) * np.sin(h)[:, None])
    return total


def iso_times(world, ms):
    """ISO 8601 UTC text with millisecond precision and a trailing Z.

    Parameters
    ----------
    world : World
    ms : numpy.ndarray of int
        Milliseconds since 00:00 UTC of the survey date.

    Returns
    -------
    list of str
    """
    stamps = np.datetime64(world.date, "ms") + ms.astype("timedelta64[ms]")
    return [s + "Z" for s in np.datetime_as_string(stamps, unit="ms")]


def format_rows(times, lon, lat, sensors, line_name, depth, alt, field):
    """CSV text of one block: one row per sensor per epoch, sensors adjacent.

    Parameters
    ----------
    times : list of str
        Recorded time of each epoch.
    lon, lat : numpy.ndarray
        Recorded antenna position of each epoch, degrees (8 decimals).
    sensors : list of str
    line_name : str
    depth, alt, field : numpy.ndarray
        Depth (m), altitude (m) and total field (nT, NaN written empty),
        shape (epochs, sensors), written with 3 decimals.
    """
    rows = []
    depth, alt, field = depth.tolist(), alt.tolist(), field.tolist()
    for i, (t, lo, la) in enumerate(zip(times, lon.tolist(), lat.tolist())):
        head = f"{t},{lo:.8f},{la:.8f},"
        for j, s in enumerate(sensors):
            f = field[i][j]
            rows.append(f"{head}{s},{line_name},{depth[i][j]:.3f},{alt[i][j]:.3f},{'' if f != f else f'{f:.3f}'}\n")
    return "".join(rows)


def write_line(world, line, events, path):
    """Compute and write one line's readings to a gzip CSV, block by block.

    Each block is evaluated at the true times (recorded time minus the lag)
    for the field and at the recorded times for antenna position, depth and
    altitude; noise comes from per-line generators, so a line's values do
    not depend on the block size or on the other lines.

    Parameters
    ----------
    world : World
    line : Line
    events : list of dict
        Glitches from :func:`choose_glitches`.
    path : pathlib.Path
        Output ``.csv.gz`` file.

    Returns
    -------
    int
        Number of readings written.
    """
    cfg, arr = world.cfg, world.array
    seeds = np.random.SeedSequence([cfg["scenario"]["seed"], 1000 + line.index]).spawn(4)
    r_field, r_depth, r_alt, r_gnss = (np.random.default_rng(s) for s in seeds)
    swell = swell_signals(world, line)
    step_ms = int(round(1000 / arr.rate))
    mine = [ev for ev in events if ev["line"] is line]
    with open(path, "wb") as raw, gzip.GzipFile(filename="", mode="wb", fileobj=raw, compresslevel=6,
                                                mtime=0) as gz, io.TextIOWrapper(gz, "ascii", newline="\n") as fh:
        fh.write(READING_COLUMNS + "\n")
        for k0 in range(0, line.n_epochs, BLOCK_EPOCHS):
            k = np.arange(k0, min(k0 + BLOCK_EPOCHS, line.n_epochs))
            ms = line.start_ms + k * step_ms
            t_rec = ms / 1000.0
            field = field_readings(world, line, t_rec - arr.lag)
            field += r_field.normal(0.0, cfg["sensors"]["noise_nT"], field.shape)
            for j, signal in enumerate(swell):
                field[:, j] += signal(t_rec - arr.lag - line.t_start)
            for ev in mine:
                lo, hi = max(ev["k0"] - k0, 0), min(ev["k1"] - k0, k.size)
                if lo < hi and ev["kind"] == "dropout":
                    field[lo:hi, ev["sensor"]] = np.nan
                elif lo < hi:
                    field[lo:hi, ev["sensor"]] += ev["value_nT"]
            e, n, z, _ = sensor_positions(world, line, t_rec)
            depth = -z + r_depth.normal(0.0, cfg["array"]["depth_noise_m"], z.shape)
            alt = z - seabed_at(world, e, n) + r_alt.normal(0.0, cfg["array"]["altitude_noise_m"], z.shape)
            ae, an = line.antenna(t_rec)
            gn = cfg["vessel"]["gnss_noise_m"]
            lon, lat = world.to_lonlat.transform(ae + r_gnss.normal(0, gn, k.size), an + r_gnss.normal(0, gn, k.size))
            fh.write(format_rows(iso_times(world, ms), lon, lat, arr.names, line.name, depth, alt, field))
    return line.n_epochs * len(arr.names)


def swell_signals(world, line):
    """Narrow-band (swell-like) noise signals of the sensors on one line.

    One independent signal per sensor (``_physics.narrow_band_noise``) with
    RMS ``[sensors] swell_nT`` and periods in ``swell_period_s``, drawn from a
    generator of its own for the line, so the other noise of the readings is
    the same with or without swell. None when ``swell_nT`` is 0 or absent.

    Returns
    -------
    list of _physics.SmoothSignal
        One per sensor (empty list without swell); each takes the time since
        the line's first epoch, s.
    """
    s = world.cfg["sensors"]
    rms = float(s.get("swell_nT", 0.0))
    if rms <= 0:
        return []
    rng = np.random.default_rng(np.random.SeedSequence([world.cfg["scenario"]["seed"], 3000 + line.index]))
    periods = s.get("swell_period_s", [6.0, 10.0])
    count = int(s.get("swell_components", 12))
    return [phys.narrow_band_noise(rng, rms, periods, count) for _ in world.array.names]


def noise_figure(cfg):
    """Noise figure of the readings, nT: ``sqrt(noise_nT^2 + swell_nT^2)`` (white and swell RMS)."""
    s = cfg["sensors"]
    return float(np.hypot(s["noise_nT"], s.get("swell_nT", 0.0)))


# --------------------------------------------------------------------------
# Base station and tables
# --------------------------------------------------------------------------
def gap_line(world, lines):
    """The survey line during which the base-station logger stops (a Line)."""
    name = world.cfg["base_station"]["gap_line"]
    survey = [ln for ln in lines if ln.kind == "survey"]
    if name == "middle":
        return survey[len(survey) // 2]
    return next(ln for ln in lines if ln.name == name)


def write_base_station(world, lines, path, rng):
    """Write the 1 Hz base-station record with its logger gap.

    The station sees the IGRF-14 field at its own position, its own constant
    crustal level, the same external field as the survey and its own noise.
    The gap starts ``gap_start_after_line_start_s`` after the first reading
    of the gap line and lasts ``gap_duration_s``.

    Parameters
    ----------
    world : World
    lines : list of Line
    path : pathlib.Path
        Output CSV file.
    rng : numpy.random.Generator
        For the station noise.

    Returns
    -------
    dict
        Record start/end and gap start/end (s of the survey date; the gap
        holds no sample in ``[gap_start, gap_end)``).
    """
    b, rate = world.cfg["base_station"], world.array.rate
    t0 = np.floor(world.t_first - b["margin_s"])
    t1 = np.ceil(lines[-1].t_end(rate) + b["margin_s"])
    t = np.arange(t0, t1 + 1.0)
    gl = gap_line(world, lines)
    g0 = np.round(gl.t_start + b["gap_start_after_line_start_s"])
    g1 = g0 + b["gap_duration_s"]
    t = t[(t < g0) | (t >= g1)]
    lon, lat = world.to_lonlat.transform(world.route.e0 + b["east_of_route_start_m"],
                                         world.route.n0 + b["north_of_route_start_m"])
    nodes = np.arange(t0 - 3600.0, t1 + 7200.0, 3600.0)
    main = np.linalg.norm(phys.point_main_field(lon, lat, b["height_m"], nodes, world.date, world.grid_rotation),
                          axis=-1)
    field = np.interp(t, nodes, main) + b["level_nT"] + world.diurnal(t) + rng.normal(0, b["noise_nT"], t.size)
    day = (t // 86400).astype(int)
    dates = [(world.date + dt.timedelta(days=int(d))).isoformat() for d in np.unique(day)]
    lookup = dict(zip(np.unique(day).tolist(), dates))
    fmt = f"{{:.{int(b['decimals'])}f}}"
    with open(path, "w", newline="\n") as fh:
        fh.write("date,seconds_of_day,field_nT\n")
        fh.writelines(f"{lookup[d]},{s:.1f},{fmt.format(f)}\n"
                      for d, s, f in zip(day.tolist(), (t % 86400).tolist(), field.tolist()))
    return dict(start=t0, end=t1, gap_start=g0, gap_end=g1, gap_line=gl.name, lon=lon, lat=lat, rows=t.size)


def clock(world, seconds):
    """ISO 8601 UTC text (ms precision) of a time in s of the survey date."""
    return iso_times(world, np.array([int(round(seconds * 1000))]))[0]


def write_events(world, events, base, path):
    """Write ``qc_events.csv``: spikes, dropouts and the base-station gap.

    Times are recorded times (as in the readings files); end times are
    inclusive.
    """
    rate = world.array.rate
    rows = ["event,line,sensor,start_time,end_time,value_nT,note\n"]
    for ev in sorted(events, key=lambda ev: (ev["line"].index, ev["k0"])):
        ln = ev["line"]
        t0 = ln.t_start + ev["k0"] / rate
        t1 = ln.t_start + (ev["k1"] - 1) / rate
        note = "field_nT empty" if ev["kind"] == "dropout" else "single-sample jump added"
        val = "" if ev["kind"] == "dropout" else f"{ev['value_nT']:.3f}"
        rows.append(f"{ev['kind']},{ln.name},{world.array.names[ev['sensor']]},{clock(world, t0)},"
                    f"{clock(world, t1)},{val},{note}\n")
    rows.append(f"base_gap,{base['gap_line']},,{clock(world, base['gap_start'])},"
                f"{clock(world, base['gap_end'] - 1.0)},,no base-station samples between these times (inclusive)\n")
    Path(path).write_text("".join(rows))


# --------------------------------------------------------------------------
# Driver
# --------------------------------------------------------------------------
def generate(config: dict, out_dir: Path, scale: float = 1.0) -> dict:
    """Generate the demo survey files.

    Parameters
    ----------
    config : dict
        Parsed ``generator.toml``.
    out_dir : pathlib.Path
        Output folder (created if needed).
    scale : float
        Multiplies the route length, hence the number of readings (about
        2.8e5 at scale 1), tie lines, items and glitches.

    Returns
    -------
    dict
        Summary: counts, time spans, base-station gap, glitches, files.
    """
    start = time.perf_counter()
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    for old in out_dir.glob("readings_*.csv.gz"):
        old.unlink()
    roles = np.random.SeedSequence(config["scenario"]["seed"]).spawn(6)
    r_lines, r_fields, r_targets, r_glitch, r_base, r_seeds = (np.random.default_rng(s) for s in roles)
    world = make_world(config, scale)
    lines = build_lines(world, r_lines)
    build_fields(world, lines, r_fields)
    targets = tgt.build_targets(world, scale, r_targets)
    deep_pos, deep_mom = deep_source(world)
    world.sources = tgt.sources_of(targets, config["targets"], extra=(deep_pos, deep_mom))
    events = choose_glitches(world, lines, scale, r_glitch)
    n_readings = 0
    for line in lines:
        n_readings += write_line(world, line, events, out_dir / f"readings_{line.name}.csv.gz")
    base = write_base_station(world, lines, out_dir / "base_station.csv", r_base)
    targets["predicted_peak_nT"] = tgt.predicted_peaks(world, targets, lines)
    seeds = tgt.choose_seeds(targets, config["targets"]["seeds"], world.route, r_seeds)
    tgt.write_truth(targets, out_dir / "truth.csv")
    tgt.write_seeds(seeds, out_dir / "seeds.csv")
    write_events(world, events, base, out_dir / "qc_events.csv")
    noise = noise_figure(config)
    compact = targets["kind"].isin(["point", "cluster_member"])
    rate = world.array.rate
    return dict(
        readings=n_readings,
        noise_nT=noise,
        lines=[ln.name for ln in lines],
        truth_rows=len(targets),
        compact_items=int(compact.sum()),
        compact_detectable=int((compact & (targets["predicted_peak_nT"] >= 10 * noise)).sum()),
        compact_below_noise=int((compact & (targets["predicted_peak_nT"] < noise)).sum()),
        all_detectable=int((targets["predicted_peak_nT"] >= 10 * noise).sum()),
        survey_start=clock(world, lines[0].t_start),
        survey_end=clock(world, lines[-1].t_end(rate)),
        line_times={ln.name: (clock(world, ln.t_start), clock(world, ln.t_end(rate))) for ln in lines},
        base_start=clock(world, base["start"]),
        base_end=clock(world, base["end"]),
        base_gap=(clock(world, base["gap_start"]), clock(world, base["gap_end"]), base["gap_line"]),
        base_position=(base["lon"], base["lat"]),
        glitches=[(ev["kind"], ev["line"].name, world.array.names[ev["sensor"]],
                   clock(world, ev["line"].t_start + ev["k0"] / rate), ev["k1"] - ev["k0"], ev["value_nT"])
                  for ev in events],
        seeds=seeds["seed_id"].tolist(),
        files={p.name: p.stat().st_size for p in sorted(out_dir.iterdir())},
        seconds=time.perf_counter() - start,
    )


def main(argv=None):
    """Command-line entry point."""
    parser = argparse.ArgumentParser(description="Generate the lodeline demo survey.")
    parser.add_argument("--config", type=Path, default=HERE / "generator.toml", help="generator TOML file")
    parser.add_argument("--out", type=Path, default=HERE / "data", help="output folder")
    parser.add_argument("--scale", type=float, default=1.0, help="multiplies the route length (default 1)")
    args = parser.parse_args(argv)
    s = generate(load_config(args.config), args.out, args.scale)
    noise = s["noise_nT"]
    print(f"readings: {s['readings']}  lines: {len(s['lines'])}  truth rows: {s['truth_rows']}")
    print(f"compact items: {s['compact_items']}  with predicted peak >= {10 * noise:g} nT (10 x noise): "
          f"{s['compact_detectable']}  below noise ({noise:g} nT): {s['compact_below_noise']}")
    print(f"all truth rows >= 10 x noise: {s['all_detectable']}")
    print(f"survey {s['survey_start']} .. {s['survey_end']}; base station {s['base_start']} .. {s['base_end']}")
    print(f"base-station gap {s['base_gap'][0]} .. {s['base_gap'][1]} (during {s['base_gap'][2]})")
    for g in s["glitches"]:
        print("  ", *g)
    print(f"seeds: {', '.join(s['seeds'])}")
    print(f"files: {len(s['files'])}, {sum(s['files'].values()) / 1e6:.2f} MB; run time {s['seconds']:.1f} s")


if __name__ == "__main__":
    main()
