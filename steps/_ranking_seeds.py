"""QC seed items: reading the seed list and checking each seed against the target table.

A seed is found when a compact target (kind ``point`` or ``cluster``) lies
within the seed radius horizontally; the nearest such target is taken
(k-d tree, Bentley 1975). The depth error is the target's elevation less
the seed's, where the seed's elevation is known (given, or the seabed under
it less its burial).

References
----------
Bentley, J. L. (1975). Multidimensional binary search trees used for
    associative searching. Communications of the ACM 18(9), 509-517.
    [Bentley1975]_
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
from pyproj import CRS, Transformer
from scipy.spatial import cKDTree

from lodeline.model import DataError
from lodeline.params import Param

__all__ = ["SEEDS_INPUT", "read_seeds", "check_seeds"]

SEEDS_INPUT = (
    Param("files", None, "Seed list(s): CSV files with seed_id and easting_m, northing_m (survey CRS) or lon, lat (WGS 84); optional burial_m or elevation_m.",
          kind=list, item_kind=str, minimum=1),
)


def read_seeds(spec: dict, crs_wkt: str, readings_bed=None) -> pd.DataFrame:
    """Seed table with ``seed_id``, ``easting_m``, ``northing_m``, ``elevation_m`` (NaN when unknown).

    Parameters
    ----------
    spec : dict
        The validated ``[inputs.seeds]`` table (``files``: absolute paths).
    crs_wkt : str
        Survey CRS.
    readings_bed : callable, optional
        ``readings_bed(xy) -> seabed elevation`` (m) used with ``burial_m``.
    """
    parts = []
    for path in spec["files"]:
        path = Path(path)
        try:
            frame = pd.read_csv(path)
        except (OSError, pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as err:
            raise DataError(f"{path}: cannot read the seed list ({type(err).__name__}: {str(err).splitlines()[0]}); "
                            "give a CSV with a header row") from None
        if "seed_id" not in frame.columns:
            raise DataError(f"{path}: the seed list has no 'seed_id' column (columns: {', '.join(map(str, frame.columns))})")
        if {"easting_m", "northing_m"} <= set(frame.columns):
            e, n = frame["easting_m"], frame["northing_m"]
        elif {"lon", "lat"} <= set(frame.columns):
            to_xy = Transformer.from_crs(CRS.from_epsg(4326), CRS.from_user_input(crs_wkt), always_xy=True)
            e, n = to_xy.transform(pd.to_numeric(frame["lon"], errors="coerce").to_numpy(float),
                                   pd.to_numeric(frame["lat"], errors="coerce").to_numpy(float))
        else:
            raise DataError(f"{path}: the seed list needs easting_m and northing_m, or lon and lat columns")
        e = pd.to_numeric(pd.Series(e), errors="coerce").to_numpy(float)
        n = pd.to_numeric(pd.Series(n), errors="coerce").to_numpy(float)
        bad = np.flatnonzero(~(np.isfinite(e) & np.isfinite(n)))
        if bad.size:
            raise DataError(f"{path}: row {bad[0] + 2}: seed position is not a number; fix the row or remove it")
        out = pd.DataFrame({"seed_id": frame["seed_id"].astype(str), "easting_m": e, "northing_m": n,
                            "source_file": path.name})
        if "elevation_m" in frame.columns:
            out["elevation_m"] = pd.to_numeric(frame["elevation_m"], errors="coerce").to_numpy(float)
        elif "burial_m" in frame.columns and readings_bed is not None:
            bed = readings_bed(out[["easting_m", "northing_m"]].to_numpy(float))
            out["elevation_m"] = bed - pd.to_numeric(frame["burial_m"], errors="coerce").to_numpy(float)
        else:
            out["elevation_m"] = np.nan
        parts.append(out)
    seeds = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=["seed_id", "easting_m", "northing_m", "elevation_m"])
    dup = seeds["seed_id"][seeds["seed_id"].duplicated()]
    if len(dup):
        raise DataError(f"seed list: seed_id {dup.iloc[0]!r} appears more than once; give each seed its own id")
    return seeds


def check_seeds(seeds: pd.DataFrame, targets: pd.DataFrame, radius_m: float) -> pd.DataFrame:
    """One row per seed: found, target_id, horizontal_error_m, depth_error_m, message."""
    compact = targets[targets["kind"].isin(["point", "cluster"]) & np.isfinite(targets["easting_m"])].reset_index(drop=True)
    rows = []
    tree = cKDTree(compact[["easting_m", "northing_m"]].to_numpy(float)) if len(compact) else None
    for _, seed in seeds.iterrows():
        row = {"seed_id": seed["seed_id"], "easting_m": seed["easting_m"], "northing_m": seed["northing_m"],
               "found": False, "target_id": "", "horizontal_error_m": np.nan, "depth_error_m": np.nan}
        if tree is not None:
            dist, j = tree.query([seed["easting_m"], seed["northing_m"]])
            if dist <= radius_m:
                t = compact.loc[j]
                row.update(found=True, target_id=t["target_id"], horizontal_error_m=float(dist),
                           depth_error_m=float(t["elevation_m"] - seed["elevation_m"]) if np.isfinite(seed["elevation_m"]) else np.nan)
        if row["found"]:
            depth = f", depth error {row['depth_error_m']:+.2f} m" if math.isfinite(row["depth_error_m"]) else ""
            row["message"] = f"found as {row['target_id']}: horizontal error {row['horizontal_error_m']:.2f} m{depth}"
        else:
            row["message"] = f"NOT FOUND: no target within {radius_m:g} m"
        rows.append(row)
    return pd.DataFrame(rows, columns=["seed_id", "easting_m", "northing_m", "found", "target_id",
                                       "horizontal_error_m", "depth_error_m", "message"])
