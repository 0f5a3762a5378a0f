"""Buried ferrous items of the demo survey.

Placement, magnetic moments, the predicted peak of each item alone, the QC
seeds, and the truth and seed tables. Every item is a magnetic point dipole
(Blakely 1995, Potential Theory in Gravity and Magnetic Applications):

* compact items (``point``, ``cluster_member``): induced moment of a
  permeable sphere ``3 V B0 / mu0`` (Jackson 1999, Classical
  Electrodynamics, ch. 5) with random shape factors along and across a random
  axis; a share of them carries remanence of random direction;
* a cable (``linear_segment``): dipoles every 0.5 m along a straight line
  crossing the corridor obliquely, all with the same induced shape factors
  along the cable axis;
* a wreck (``extended_part``): a grid of dipoles over the hull footprint,
  induced plus one remanent direction common to the whole hull.

Route coordinates: ``u`` along the route from KP 0, ``v`` across, m.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

if __package__:
    from . import _physics as phys
    from ._geometry import sensor_positions
else:  # imported by generate.py run as a script
    import _physics as phys
    from _geometry import sensor_positions

TRUTH_COLUMNS = [
    "item_id", "kind", "easting_m", "northing_m", "lon", "lat", "seabed_elevation_m", "burial_m",
    "elevation_m", "mass_kg", "moment_east_Am2", "moment_north_Am2", "moment_up_Am2", "moment_Am2",
    "remanent", "group", "predicted_peak_nT", "note",
]
SEED_COLUMNS = ["seed_id", "easting_m", "northing_m", "lon", "lat", "burial_m", "mass_kg", "description"]


def _log_uniform(rng, bounds, size=None):
    return np.exp(rng.uniform(np.log(bounds[0]), np.log(bounds[1]), size))


class _Placer:
    """Occupied positions in route coordinates, for keeping items apart."""

    def __init__(self):
        self.u = np.empty(0)
        self.v = np.empty(0)

    def add(self, u, v):
        """Mark positions as occupied."""
        self.u = np.append(self.u, u)
        self.v = np.append(self.v, v)

    def is_clear(self, u, v, distance):
        """Whether ``(u, v)`` is at least ``distance`` m from every occupied point."""
        return self.u.size == 0 or np.min(np.hypot(self.u - u, self.v - v)) >= distance

    def draw(self, rng, u_range, v_range, distance, tries=20000):
        """Uniform random free position in the given ranges."""
        for _ in range(tries):
            u, v = rng.uniform(*u_range), rng.uniform(*v_range)
            if self.is_clear(u, v, distance):
                return u, v
        raise RuntimeError("cannot place an item: corridor too crowded, lower min_separation_m")


def _rows(kind, group, note, u, v, burial, mass, axis, k_a, k_t, rem_ratio, rem_dir):
    """One group of rows as a dict of arrays."""
    n = np.size(u)
    return dict(kind=np.full(n, kind, dtype=object), group=np.full(n, group, dtype=object),
                note=np.full(n, note, dtype=object), u=np.asarray(u, float), v=np.asarray(v, float),
                burial=np.broadcast_to(burial, n).astype(float), mass=np.broadcast_to(mass, n).astype(float),
                axis=np.broadcast_to(axis, (n, 3)).copy(), k_a=np.broadcast_to(k_a, n).astype(float),
                k_t=np.broadcast_to(k_t, n).astype(float), rem_ratio=np.broadcast_to(rem_ratio, n).astype(float),
                rem_dir=np.broadcast_to(rem_dir, (n, 3)).copy())


def _compact_rows(rng, kind, group, spec, u, v, tcfg):
    """Compact items with random mass, burial, axis, shape and remanence."""
    n = np.size(u)
    remanent = rng.random(n) < tcfg["remanent_fraction"]
    ratio = np.where(remanent, rng.uniform(*tcfg["remanence_ratio"], n), 0.0)
    return _rows(kind, group, spec["note"], u, v, rng.uniform(*spec["burial_m"], n),
                 _log_uniform(rng, spec["mass_kg"], n), phys.random_unit_vectors(rng, n, spec["max_plunge_deg"]),
                 rng.uniform(*spec["axial_factor"], n), rng.uniform(*spec["transverse_factor"], n), ratio,
                 phys.random_unit_vectors(rng, n))


def _wreck_rows(rng, cfg, route, u_c, v_c, group):
    """Grid of dipoles over the hull footprint, burial rising bow to stern."""
    x = np.arange(-cfg["length_m"] / 2, cfg["length_m"] / 2 + 1e-9, cfg["spacing_m"])
    y = np.arange(-cfg["width_m"] / 2, cfg["width_m"] / 2 + 1e-9, cfg["spacing_m"])
    xx, yy = (a.ravel() for a in np.meshgrid(x, y))
    ang = np.radians(cfg["heading_from_route_deg"])
    u = u_c + xx * np.cos(ang) - yy * np.sin(ang)
    v = v_c + xx * np.sin(ang) + yy * np.cos(ang)
    frac = (xx - x[0]) / (x[-1] - x[0])
    burial = cfg["burial_m"][0] + frac * (cfg["burial_m"][1] - cfg["burial_m"][0]) + rng.uniform(-0.1, 0.1, xx.size)
    mass = 1.0 + rng.uniform(-1, 1, xx.size) * cfg["mass_variation"]
    mass *= cfg["mass_t"] * 1000.0 / mass.sum()
    rem_dir = phys.random_unit_vectors(rng, 1)[0]
    return _rows("extended_part", group, cfg["note"], u, v, np.clip(burial, 0.0, None), mass, [1.0, 0.0, 0.0],
                 cfg["factor"], cfg["factor"], cfg["remanence_ratio"], rem_dir)


def _cable_rows(rng, cfg, route, u_c, group):
    """Dipoles every ``spacing_m`` along an oblique straight cable."""
    ang = np.radians(cfg["angle_deg"])
    half = cfg["extends_across_m"] / np.sin(ang)
    s = np.arange(-half, half + 1e-9, cfg["spacing_m"])
    u, v = u_c + s * np.cos(ang), s * np.sin(ang)
    b = cfg["burial_m"]
    burial = (b[0] + b[1]) / 2 + (b[1] - b[0]) / 2 * np.sin(2 * np.pi * s / cfg["burial_wavelength_m"]
                                                             + rng.uniform(0, 2 * np.pi))
    az = route.azimuth + np.arctan2(np.sin(ang), np.cos(ang))  # grid azimuth of the cable (v is to starboard)
    axis = [np.sin(az), np.cos(az), 0.0]
    return _rows("linear_segment", group, cfg["note"], u, v, burial, cfg["mass_per_m_kg"] * cfg["spacing_m"], axis,
                 cfg["axial_factor"], cfg["transverse_factor"], 0.0, [0.0, 0.0, 1.0])


def build_targets(world, scale, rng):
    """Place every buried item and compute its moment.

    One wreck and one cable per route section of the configured length;
    clusters and isolated items in numbers multiplied by ``scale``.

    Returns
    -------
    pandas.DataFrame
        Truth columns (without ``item_id``, ``predicted_peak_nT``) plus the
        route coordinates ``u``, ``v``.
    """
    tcfg, route = world.cfg["targets"], world.route
    n_sec = max(1, int(round(scale)))
    sec = route.length / n_sec
    u_rng = (tcfg["end_margin_m"], route.length - tcfg["end_margin_m"])
    v_rng = (-route.half_width + tcfg["edge_margin_m"], route.half_width - tcfg["edge_margin_m"])
    sep, placer, groups = tcfg["min_separation_m"], _Placer(), []
    for i in range(n_sec):
        w, c = tcfg["wreck"], tcfg["cable"]
        groups.append(_wreck_rows(rng, w, route, (i + w["along_fraction"]) * sec, w["across_m"], f"wreck_{i + 1:02d}"))
        groups.append(_cable_rows(rng, c, route, (i + c["crossing_along_fraction"]) * sec, f"cable_{i + 1:02d}"))
    for g in groups:
        placer.add(g["u"], g["v"])
    cl = tcfg["clusters"]
    for i in range(int(round(cl["count"] * scale))):
        r = cl["radius_m"]
        uc, vc = placer.draw(rng, (u_rng[0] + r, u_rng[1] - r), (v_rng[0] + r, v_rng[1] - r), sep + r)
        members = _Placer()
        for _ in range(int(rng.integers(cl["members"][0], cl["members"][1] + 1))):
            for _ in range(1000):
                rad, ang = r * np.sqrt(rng.random()), rng.uniform(0, 2 * np.pi)
                if members.is_clear(uc + rad * np.cos(ang), vc + rad * np.sin(ang), cl["member_spacing_m"]):
                    members.add(uc + rad * np.cos(ang), vc + rad * np.sin(ang))
                    break
        groups.append(_compact_rows(rng, "cluster_member", f"cluster_{i + 1:02d}", cl, members.u, members.v, tcfg))
        placer.add(members.u, members.v)
    for spec in tcfg["class"]:
        n = int(round(spec["count"] * scale))
        uv = np.empty((n, 2))
        for k in range(n):  # register one by one so items of a class also keep apart
            uv[k] = placer.draw(rng, u_rng, v_rng, sep)
            placer.add(*uv[k])
        groups.append(_compact_rows(rng, "point", "", spec, uv[:, 0], uv[:, 1], tcfg))
    return _finish(world, groups, tcfg)


def _finish(world, groups, tcfg):
    """Positions, seabed, moments and ordering of all rows."""
    cat = {k: np.concatenate([g[k] for g in groups]) for k in groups[0]}
    e, n = world.route.to_en(cat["u"], cat["v"])
    bed = phys.seabed_elevation(cat["u"], cat["v"], world.cfg["seabed"])
    z = bed - cat["burial"]
    main = world.main(e, n, z, world.t_first)
    ind = phys.induced_moment(cat["mass"], main, cat["axis"], cat["k_a"], cat["k_t"], tcfg["iron_density_kg_m3"])
    mom = ind + (cat["rem_ratio"] * np.linalg.norm(ind, axis=1))[:, None] * cat["rem_dir"]
    lon, lat = world.to_lonlat.transform(e, n)
    df = pd.DataFrame(dict(
        kind=cat["kind"], easting_m=e, northing_m=n, lon=lon, lat=lat, seabed_elevation_m=bed,
        burial_m=cat["burial"], elevation_m=z, mass_kg=cat["mass"], moment_east_Am2=mom[:, 0],
        moment_north_Am2=mom[:, 1], moment_up_Am2=mom[:, 2], moment_Am2=np.linalg.norm(mom, axis=1),
        remanent=cat["rem_ratio"] > 0, group=cat["group"], note=cat["note"], u=cat["u"], v=cat["v"]))
    compact = df["kind"].isin(["point", "cluster_member"]).to_numpy()
    df["_k1"] = np.where(compact, 0, np.where(df["kind"] == "linear_segment", 1, 2))
    df["_k2"] = np.where(compact, "", df["group"])
    df["_k3"] = np.where(compact, df["u"], np.arange(len(df)))
    df = df.sort_values(["_k1", "_k2", "_k3"], kind="stable").drop(columns=["_k1", "_k2", "_k3"])
    df = df.reset_index(drop=True)
    width = max(4, len(str(len(df))))
    df.insert(0, "item_id", [f"I{i + 1:0{width}d}" for i in range(len(df))])
    return df


def sources_of(targets, tcfg, extra=None):
    """Dipole sources of all items (plus optional extra dipoles, always included).

    The influence radius of an item follows the summed moment of its group
    (the whole cable, wreck or cluster) so that a group is never cut off
    before its combined field drops below ``influence_tolerance_nT``.

    Parameters
    ----------
    targets : pandas.DataFrame
    tcfg : dict
        The ``[targets]`` table.
    extra : tuple of numpy.ndarray, optional
        ``(position (3,), moment (3,))`` of a further dipole.

    Returns
    -------
    _physics.Sources
    """
    pos = targets[["easting_m", "northing_m", "elevation_m"]].to_numpy()
    mom = targets[["moment_east_Am2", "moment_north_Am2", "moment_up_Am2"]].to_numpy()
    size = targets["moment_Am2"].to_numpy().copy()
    grouped = targets["group"] != ""
    size[grouped.to_numpy()] = targets[grouped].groupby("group")["moment_Am2"].transform("sum").to_numpy()
    radius = phys.influence_radius(size, tcfg["influence_tolerance_nT"], tcfg["min_influence_radius_m"])
    if extra is not None:
        pos = np.vstack([pos, extra[0]])
        mom = np.vstack([mom, extra[1]])
        radius = np.append(radius, np.inf)
    return phys.Sources(pos, mom, radius)


def predicted_peaks(world, targets, lines):
    """Peak absolute anomaly of each item alone at its nearest sensor track, nT.

    For every item, the survey-line sensor track passing horizontally
    closest to it (at the time the bar passes the item) is followed over
    ``+-profile_half_length_m`` at ``profile_step_m`` spacing, with the true
    sensor positions and elevations (wander, flight height, heave and roll
    included), and the exact total-field anomaly of the item's dipole alone
    is evaluated there (Blakely 1995). Tie lines are not used.

    Returns
    -------
    numpy.ndarray
        One value per row of ``targets``.
    """
    tcfg, arr = world.cfg["targets"], world.array
    survey = [ln for ln in lines if ln.kind == "survey"]
    across = np.array([ln.across for ln in survey])
    reach = np.abs(arr.offsets).max() + world.cfg["lines"]["spacing_m"]
    pos = targets[["easting_m", "northing_m", "elevation_m"]].to_numpy()
    mom = targets[["moment_east_Am2", "moment_north_Am2", "moment_up_Am2"]].to_numpy()
    steps = np.arange(-tcfg["profile_half_length_m"], tcfg["profile_half_length_m"] + 1e-9, tcfg["profile_step_m"])
    peaks = np.full(len(targets), np.nan)
    for i, v in enumerate(targets["v"].to_numpy()):
        best = None
        near = np.flatnonzero(np.abs(across - v) <= reach)
        if near.size == 0:  # outside the surveyed width (cable ends): nearest line only
            near = [int(np.argmin(np.abs(across - v)))]
        for ln in (survey[k] for k in near):
            goal = ((pos[i, 0] - ln.start[0]) * np.sin(ln.azimuth) + (pos[i, 1] - ln.start[1]) * np.cos(ln.azimuth)
                    + arr.layback)
            tau = goal / ln.speed
            for _ in range(4):  # Newton on along(t) = goal
                tau -= (ln.speed * tau + ln.surge(tau) - goal) / (ln.speed + ln.surge.rate(tau))
            t = ln.t_start + tau
            e, n, _, _ = sensor_positions(world, ln, np.array([t]))
            d = np.hypot(e[0] - pos[i, 0], n[0] - pos[i, 1])
            if best is None or d.min() < best[0]:
                best = (d.min(), ln, int(np.argmin(d)), t)
        _, ln, j, t = best
        e, n, z, _ = sensor_positions(world, ln, t + steps / ln.speed)
        one = phys.Sources(pos[i:i + 1], mom[i:i + 1], np.array([np.inf]))
        b = one.field(e[:, j], n[:, j], z[:, j])
        main = world.main(pos[i, 0], pos[i, 1], pos[i, 2], t)
        peaks[i] = np.abs(phys.total_field_anomaly(main, b)).max()
    return peaks


def choose_seeds(targets, cfg, route, rng):
    """Mark QC seeds: isolated, induced-only point items of mid size, well detectable.

    One seed is drawn in each of ``count`` equal parts of the route where
    possible, further ones as far along the route from the others as
    possible. The truth ``note`` of a seed becomes ``QC seed <id>: ...``.

    Returns
    -------
    pandas.DataFrame
        Seed table.
    """
    xy = targets[["easting_m", "northing_m"]].to_numpy()
    nearest = cKDTree(xy).query(xy, k=2)[0][:, 1]
    ok = ((targets["kind"] == "point") & ~targets["remanent"] & targets["mass_kg"].between(*cfg["mass_kg"])
          & (targets["predicted_peak_nT"] >= cfg["min_peak_nT"]) & (nearest >= cfg["isolation_m"])).to_numpy()
    u = targets["u"].to_numpy()
    edges = np.linspace(0.0, route.length, cfg["count"] + 1)
    chosen = []
    for lo, hi in zip(edges[:-1], edges[1:]):
        pool = np.flatnonzero(ok & (u >= lo) & (u < hi))
        if pool.size:
            chosen.append(int(rng.choice(pool)))
    spare = [int(k) for k in np.flatnonzero(ok) if k not in chosen]
    while len(chosen) < cfg["count"] and spare:  # fill up far (along the route) from the seeds so far
        gaps = [np.min(np.abs(u[chosen] - u[k])) if chosen else 0.0 for k in spare]
        chosen.append(spare.pop(int(np.argmax(gaps))))
    chosen = sorted(chosen, key=lambda k: u[k])
    rows = []
    for k, idx in enumerate(chosen):
        sid = f"SD{k + 1}"
        t = targets.loc[idx]
        targets.loc[idx, "note"] = f"QC seed {sid}: steel test item placed before the survey"
        rows.append(dict(seed_id=sid, easting_m=t["easting_m"], northing_m=t["northing_m"], lon=t["lon"],
                         lat=t["lat"], burial_m=t["burial_m"], mass_kg=t["mass_kg"],
                         description=f"steel QC seed of {t['mass_kg']:.0f} kg buried {t['burial_m']:.1f} m "
                                     f"below the seabed, placed by the survey contractor before the survey "
                                     f"(truth item {t['item_id']})"))
    return pd.DataFrame(rows, columns=SEED_COLUMNS)


_DECIMALS = dict(easting_m=3, northing_m=3, lon=8, lat=8, seabed_elevation_m=3, burial_m=3, elevation_m=3,
                 mass_kg=3, moment_east_Am2=6, moment_north_Am2=6, moment_up_Am2=6, moment_Am2=6,
                 predicted_peak_nT=4)


def write_truth(targets, path):
    """Write ``truth.csv`` (columns :data:`TRUTH_COLUMNS`)."""
    targets[TRUTH_COLUMNS].round(_DECIMALS).to_csv(path, index=False, lineterminator="\n")


def write_seeds(seeds, path):
    """Write ``seeds.csv`` (columns :data:`SEED_COLUMNS`)."""
    seeds.round(_DECIMALS).to_csv(path, index=False, lineterminator="\n")
