"""Figures of the run report (matplotlib, Agg canvas, PNG).

Plain plotting, no method of its own. Grids are read as a strided
subsample (every ``step``-th cell in each direction, dask reading one tile
at a time), so memory is bounded by the figure size, not the grid's.
Text that comes from input files is drawn literally: matplotlib's math
mode is switched off for it by escaping ``$`` (:func:`plain`).
"""

from __future__ import annotations

import io
import math
from pathlib import Path

import numpy as np
import pandas as pd
import shapely
from matplotlib import colors
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

__all__ = ["plain", "grid_image", "new_figure", "save", "map_figure", "diurnal_figure", "crossover_figure",
           "removal_figure", "noise_figure", "profile_figure"]

KIND_MARKERS = {"point": "o", "cluster": "s", "linear": "^", "extended": "D"}


def plain(text) -> str:
    """``text`` as a string that matplotlib draws literally (no math mode)."""
    return str(text).replace("$", r"\$")


def new_figure(width_in: float, height_in: float) -> Figure:
    fig = Figure(figsize=(width_in, height_in), layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def save(fig: Figure, path: Path, dpi: int) -> Path:
    """Write ``fig`` as PNG to ``path``; returns the path."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    Path(path).write_bytes(buf.getvalue())
    return Path(path)


def grid_image(var, max_pixels: int) -> tuple[np.ndarray, tuple, int]:
    """A strided subsample of a grid variable for a figure.

    Parameters
    ----------
    var : xarray.DataArray
        On ``("northing", "easting")``, dask-backed or in memory.
    max_pixels : int
        Most cells kept along the longer side.

    Returns
    -------
    image : ndarray (rows, cols)
        Rows in increasing northing.
    extent : tuple
        (W, E, S, N) of the cells kept, m (cell edges).
    step : int
        The stride.
    """
    ny, nx = var.sizes["northing"], var.sizes["easting"]
    step = max(1, math.ceil(max(ny, nx) / max_pixels))
    sub = var.isel(northing=slice(None, None, step), easting=slice(None, None, step))
    image = np.asarray(sub.values, dtype=float)
    e, n = np.asarray(sub["easting"].values), np.asarray(sub["northing"].values)
    if n.size > 1 and n[1] < n[0]:
        image, n = image[::-1], n[::-1]
    de = (e[1] - e[0]) if e.size > 1 else 1.0
    dn = (n[1] - n[0]) if n.size > 1 else 1.0
    return image, (e[0] - de / 2, e[-1] + de / 2, n[0] - dn / 2, n[-1] + dn / 2), step


def _draw_targets(ax, targets: pd.DataFrame | None, label_n: int, ink: str = "k"):
    if targets is None or not len(targets):
        return
    for text in targets.get("geometry_wkt", pd.Series(dtype=object)).dropna():
        if isinstance(text, str) and text.strip():
            try:
                geom = shapely.from_wkt(text)
            except shapely.errors.GEOSException:
                continue
            for part in getattr(geom, "geoms", [geom]):
                ring = part.exterior if hasattr(part, "exterior") else part
                xy = np.asarray(ring.coords)
                ax.plot(xy[:, 0], xy[:, 1], color=ink, lw=0.8)
    for kind, marker in KIND_MARKERS.items():
        sel = targets[targets["kind"].astype(str) == kind]
        if len(sel):
            ax.scatter(sel["easting_m"], sel["northing_m"], s=22, marker=marker, facecolors="none",
                       edgecolors=ink, linewidths=0.9, label=f"{kind} ({len(sel)})")
    top = targets.sort_values("rank").head(label_n)
    for _, row in top.iterrows():
        if np.isfinite(row["easting_m"]) and np.isfinite(row["northing_m"]):
            ax.annotate(plain(row["target_id"]), (row["easting_m"], row["northing_m"]), xytext=(4, 4),
                        textcoords="offset points", fontsize=7, color=ink)
    ax.legend(loc="upper left", fontsize=7, framealpha=0.8)


def map_figure(image, extent, *, title: str, units: str, targets=None, label_n: int = 15, scale: str = "diverging",
               route_xy=None, circles=None, noise_level=None, overlay=None, ink: str = "k",
               outline=None, points=None) -> Figure:
    """A map of a grid with the targets (and optionally the route and search circles).

    ``scale``: ``"diverging"`` (symmetric about 0 at the 99th percentile of
    |value|), ``"log"`` (from half the noise level or the 1st percentile to
    the 99.9th percentile) or ``"linear"`` (1st to 99th percentile).
    ``overlay`` draws extra outlines: a list of (x, y) arrays. ``ink`` is
    the colour of the target markers and labels. ``outline`` is an array of
    the image's shape whose 0.5 contour is drawn in red (the edge of a 0/1
    map); ``points`` a list of (x, y, label) drawn as red labelled crosses.
    """
    width = extent[1] - extent[0]
    height = extent[3] - extent[2]
    aspect = height / width if width > 0 else 1.0
    fig = new_figure(10, max(3.0, min(10.0, 8.2 * aspect + 0.9)))
    ax = fig.add_subplot()
    finite = image[np.isfinite(image)]
    kwargs = {"cmap": "viridis"}
    if finite.size:
        if scale == "diverging":
            top = float(np.percentile(np.abs(finite), 99)) or 1.0
            kwargs = {"cmap": "RdBu_r", "vmin": -top, "vmax": top}
        elif scale == "log":
            low = float(np.percentile(finite[finite > 0], 1)) if (finite > 0).any() else 1e-3
            if noise_level:
                low = max(low, noise_level / 2)
            high = max(float(np.percentile(finite, 99.9)), low * 10)
            kwargs = {"cmap": "magma", "norm": colors.LogNorm(vmin=low, vmax=high)}
        else:
            kwargs = {"cmap": "viridis", "vmin": float(np.percentile(finite, 1)), "vmax": float(np.percentile(finite, 99))}
    im = ax.imshow(image, origin="lower", extent=extent, interpolation="nearest", **kwargs)
    fig.colorbar(im, ax=ax, shrink=0.8, label=plain(units))
    if outline is not None and np.isfinite(outline).any() and np.nanmin(outline) < 0.5 < np.nanmax(outline):
        ax.contour(np.nan_to_num(outline, nan=1.0), levels=[0.5], colors="tab:red", linewidths=0.9,
                   origin="lower", extent=extent)
    for x, y, label in points or []:
        ax.plot([x], [y], "x", color="tab:red", ms=7)
        ax.annotate(plain(label), (x, y), xytext=(4, -10), textcoords="offset points", fontsize=8, color="tab:red")
    for xy in overlay or []:
        xy = np.asarray(xy)
        ax.plot(xy[:, 0], xy[:, 1], color="tab:red", lw=0.9)
    if route_xy is not None and len(route_xy) >= 2:
        ax.plot(route_xy[:, 0], route_xy[:, 1], color="tab:orange", lw=1.2, label="route")
        ax.plot(route_xy[:1, 0], route_xy[:1, 1], "*", color="tab:orange", ms=12)
    if circles is not None:
        t = np.linspace(0, 2 * np.pi, 49)
        for x, y, r in circles:
            ax.plot(x + r * np.cos(t), y + r * np.sin(t), color="tab:green", lw=0.7)
    _draw_targets(ax, targets, label_n, ink)
    ax.set_xlim(extent[0], extent[1])
    ax.set_ylim(extent[2], extent[3])
    ax.set_aspect("equal")
    ax.set_xlabel("easting (m)")
    ax.set_ylabel("northing (m)")
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.set_title(plain(title))
    return fig


def diurnal_figure(curve: pd.DataFrame, rate_limit: float | None, gaps: pd.DataFrame | None = None) -> Figure:
    """External-field variation (nT) and its rate (nT/min) against time, with the rate limit."""
    fig = new_figure(10, 5.5)
    ax1, ax2 = fig.subplots(2, 1, sharex=True)
    t = pd.to_datetime(curve["time"])
    ax1.plot(t, curve["variation_nT"], lw=0.8, color="tab:blue")
    ax1.set_ylabel("variation about datum (nT)")
    rate = curve["rate_nT_per_min"].to_numpy(float)
    ax2.plot(t, rate, lw=0.6, color="tab:gray", label="rate")
    if "too_fast" in curve:
        fast = curve["too_fast"].astype(str).str.lower().isin(["true", "1"]).to_numpy()
        ax2.plot(t[fast], rate[fast], ".", ms=3, color="tab:red", label=f"faster than the limit ({int(fast.sum())})")
    if rate_limit is not None:
        for sign in (1, -1):
            ax2.axhline(sign * rate_limit, color="tab:red", lw=1, ls="--")
        ax2.plot([], [], color="tab:red", ls="--", label=f"rate limit +-{rate_limit:g} nT/min")
    if gaps is not None and len(gaps):
        for _, g in gaps.iterrows():
            for ax in (ax1, ax2):
                ax.axvspan(pd.to_datetime(g["last_sample_before"]), pd.to_datetime(g["first_sample_after"]),
                           color="tab:orange", alpha=0.3)
        ax1.plot([], [], color="tab:orange", alpha=0.3, lw=6, label="base-station gap")
        ax1.legend(fontsize=8, loc="upper right")
    ax2.set_ylabel("rate (nT/min)")
    ax2.set_xlabel("time (UTC)")
    ax2.legend(fontsize=8, loc="upper right")
    ax1.set_title("Diurnal variation at the base station")
    return fig


def _rms(x):
    x = np.asarray(x, float)
    x = x[np.isfinite(x)]
    return float(np.sqrt(np.mean(x * x))) if x.size else float("nan")


def crossover_figure(crossovers: pd.DataFrame) -> Figure:
    """Histograms of the crossover differences before and after levelling (nT)."""
    fig = new_figure(10, 4)
    ax1, ax2 = fig.subplots(1, 2)
    before = crossovers["before_nT"].to_numpy(float)
    ax1.hist(before[np.isfinite(before)], bins=60, color="tab:gray")
    ax1.set_title(f"before levelling: RMS {_rms(before):.3f} nT ({np.isfinite(before).sum()})")
    ax1.set_xlabel("crossover difference (nT)")
    ax1.set_ylabel("crossovers")
    used = crossovers["used"].astype(str).str.lower().isin(["true", "1"]).to_numpy() if "used" in crossovers else None
    for col, colour, label in (("after_tie_nT", "tab:blue", "after tie-line levelling"), ("after_nT", "tab:green", "after all levelling")):
        if col not in crossovers:
            continue
        x = crossovers[col].to_numpy(float)
        if used is not None:
            x = x[used]
        x = x[np.isfinite(x)]
        if x.size:
            lim = np.percentile(np.abs(x), 99) or 1.0
            ax2.hist(np.clip(x, -lim, lim), bins=60, histtype="step", color=colour, lw=1.4,
                     label=f"{label}: RMS {_rms(x):.3f} nT")
    ax2.set_title("after levelling (crossovers used)")
    ax2.set_xlabel("crossover difference (nT)")
    ax2.legend(fontsize=8)
    return fig


def removal_figure(rows: pd.DataFrame) -> Figure:
    """RMS of each correction removed, by stage (log scale), with its range written beside it."""
    fig = new_figure(10, max(2.5, 0.5 * len(rows) + 1.2))
    ax = fig.add_subplot()
    if len(rows):
        labels = [plain(f"{s}: {v}") for s, v in zip(rows["stage"], rows["correction"])]
        y = np.arange(len(rows))[::-1]
        rms = rows["rms_nT"].to_numpy(float)
        ax.barh(y, np.where(rms > 0, rms, np.nan), color="tab:blue")
        ax.set_yticks(y, labels)
        ax.set_xscale("log")
        for yi, r, lo, hi in zip(y, rms, rows["min_nT"], rows["max_nT"]):
            ax.annotate(f"RMS {r:.3g} nT, range {lo:.3g} to {hi:.3g} nT", (r, yi), xytext=(4, 0),
                        textcoords="offset points", va="center", fontsize=8)
        ax.set_xlim(max(np.nanmin(rms[rms > 0]) / 3, 1e-4) if (rms > 0).any() else 1e-3,
                    (np.nanmax(rms) if np.isfinite(rms).any() else 1) * 300)
    ax.set_xlabel("RMS removed (nT, log scale)")
    ax.set_title("What each correction removed")
    return fig


def noise_figure(noise: dict, sensor_names, gradient: np.ndarray | None, noise_level: float | None,
                 threshold: float | None, gradient_units: str = "nT/m", threshold_name: str = "picking threshold") -> Figure:
    """Reading noise from fourth differences (per sensor), and the distribution of the gradient grid."""
    fig = new_figure(10, 4)
    ax1, ax2 = fig.subplots(1, 2)
    edges = noise["edges"]
    centres = 0.5 * (edges[1:] + edges[:-1])
    for k, counts in enumerate(noise["counts"]):
        if counts.sum():
            name = sensor_names[k] if k < len(sensor_names) else str(k)
            ax1.step(centres, counts, where="mid", lw=0.9, label=plain(f"{name}: {noise['sigma_nT'][k]:.3f} nT"))
    sig = noise["sigma_all_nT"]
    if np.isfinite(sig):
        ax1.set_xlim(-6 * sig, 6 * sig)
    ax1.set_yscale("log")
    ax1.set_xlabel("fourth difference / sqrt(70) (nT)")
    ax1.set_ylabel("differences")
    ax1.set_title(f"reading noise: {sig:.3f} nT (robust, all sensors)")
    ax1.legend(fontsize=7)
    if gradient is not None:
        g = gradient[np.isfinite(gradient) & (gradient > 0)]
        if g.size:
            bins = np.logspace(np.log10(g.min()), np.log10(g.max()), 80)
            ax2.hist(g, bins=bins, color="tab:gray")
            ax2.set_xscale("log")
            ax2.set_yscale("log")
        if noise_level:
            ax2.axvline(noise_level, color="tab:blue", ls="--", label=f"noise level {noise_level:.3g} {gradient_units}")
        if threshold:
            ax2.axvline(threshold, color="tab:red", ls="--", label=plain(f"{threshold_name} {threshold:.3g} {gradient_units}"))
        ax2.legend(fontsize=8)
    ax2.set_xlabel(plain(f"total gradient amplitude ({gradient_units})"))
    ax2.set_ylabel("grid cells (subsample)")
    ax2.set_title("gradient grid against its noise level")
    return fig


def profile_figure(profile: dict, target: pd.Series, line_names, sensor_names) -> Figure:
    """Readings of the closest passes and the fitted dipole's anomaly, and observed against modelled."""
    fig = new_figure(10, 3.6)
    ax1, ax2 = fig.subplots(1, 2, width_ratios=[2, 1])
    for k, p in enumerate(profile["passes"]):
        colour = f"C{k}"
        line = line_names[p["line_index"]] if p["line_index"] < len(line_names) else p["line_index"]
        sensor = sensor_names[p["sensor_index"]] if p["sensor_index"] < len(sensor_names) else p["sensor_index"]
        ax1.plot(p["along_m"], p["observed_nT"], ".", ms=3, color=colour,
                 label=plain(f"{line} {sensor}, {p['offset_m']:.1f} m off"))
        ax1.plot(p["along_m"], p["model_nT"], "-", lw=1.2, color=colour)
    ax1.plot([], [], "k-", label="fitted dipole")
    ax1.set_xlabel("distance along track from the closest reading (m)")
    ax1.set_ylabel("residual (nT)")
    ax1.legend(fontsize=7)
    depth = target.get("depth_below_sensor_m", np.nan)
    ax1.set_title(plain(f"{target['target_id']} (rank {target['rank']}, {target['kind']}): depth below sensor "
                        f"{depth:.2f} m, fit R^2 {target.get('fit_r2', np.nan):.3f}"), fontsize=10)
    obs, mod = profile["observed_nT"], profile["model_nT"]
    if len(obs):
        ax2.plot(mod, obs, ".", ms=2, color="tab:gray")
        lo, hi = float(min(obs.min(), mod.min())), float(max(obs.max(), mod.max()))
        ax2.plot([lo, hi], [lo, hi], "k-", lw=0.8)
    ax2.set_xlabel("modelled (nT)")
    ax2.set_ylabel("observed (nT)")
    ax2.set_title(f"{profile['n_readings']} readings: RMS {profile['rms_nT']:.3g} nT, R^2 {profile['r2']:.3f}", fontsize=9)
    return fig
