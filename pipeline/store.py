"""The run folder: stage outputs, manifest, log and atomic writes.

Layout of a run folder::

    manifest.json              one entry per stage: cache key, hashes, timing, ledger
    run.log                    what every run did, appended
    store/<stage>-<key>/       a stage's output: <name>.zarr stores, <name>.csv
                               tables, other files, and stage.json
    <stage>  ->  store/<stage>-<key>   a link to the current output

A stage output is written into ``store/.tmp-...`` and renamed into place when
complete; the manifest and the links are replaced with :func:`os.replace`. A
run killed at any moment therefore leaves each stage with its old or its new
output, never a half-written one, and the next run removes the leftovers.
"""

from __future__ import annotations

import fcntl
import hashlib
import json
import os
import shutil
import uuid
from pathlib import Path

import numpy as np
import xarray as xr

__all__ = ["RunStore", "RunFolderError", "hash_file", "hash_json", "atomic_write_text"]

MANIFEST_VERSION = 1
#: Zarr chunk length of stored readings (readings are rechunked to segment
#: boundaries when read back).
STORE_CHUNK = 1 << 20


class RunFolderError(OSError):
    """The run folder cannot be used (one-line message for the user)."""


def hash_json(obj) -> str:
    """BLAKE2b hex digest of a canonical JSON rendering of ``obj``."""
    text = json.dumps(obj, sort_keys=True, default=str, separators=(",", ":"))
    return hashlib.blake2b(text.encode(), digest_size=16).hexdigest()


def hash_file(path: Path, cache: dict | None = None) -> str:
    """BLAKE2b digest of a file's bytes (cached by path, size and mtime)."""
    st = path.stat()
    tag = f"{path}:{st.st_size}:{st.st_mtime_ns}"
    if cache is not None and tag in cache:
        return cache[tag]
    h = hashlib.blake2b(digest_size=16)
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 22), b""):
            h.update(block)
    digest = h.hexdigest()
    if cache is not None:
        cache[tag] = digest
    return digest


def _fsync_dir(path: Path) -> None:
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def atomic_write_text(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` through a temporary file and a rename."""
    tmp = path.with_name(f".{path.name}.{uuid.uuid4().hex[:8]}.tmp")
    try:
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except OSError as err:
        tmp.unlink(missing_ok=True)
        raise RunFolderError(f"{path}: cannot write ({err.strerror}): check free space and permissions") from None
    _fsync_dir(path.parent)


def _jsonable(obj):
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    return obj


class RunStore:
    """Access to one run folder.

    Parameters
    ----------
    folder : Path
        The run folder; created when missing.
    """

    def __init__(self, folder: Path):
        self.folder = Path(folder)
        self.store = self.folder / "store"
        try:
            self.store.mkdir(parents=True, exist_ok=True)
            probe = self.folder / f".write-test-{uuid.uuid4().hex[:8]}"
            probe.write_text("ok")
            probe.unlink()
        except OSError as err:
            raise RunFolderError(
                f"{self.folder}: run folder is not writable ({err.strerror}): choose another [run] folder or fix its permissions"
            ) from None
        self.manifest_path = self.folder / "manifest.json"
        self.log_path = self.folder / "run.log"
        self._lock_fh = None

    # -- locking -----------------------------------------------------------
    def lock(self) -> None:
        """Take the run folder's lock, refusing a second concurrent run."""
        self._lock_fh = open(self.folder / ".lock", "w")
        try:
            fcntl.flock(self._lock_fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise RunFolderError(
                f"{self.folder}: another run is using this run folder: wait for it to finish or choose another folder"
            ) from None

    def unlock(self) -> None:
        if self._lock_fh is not None:
            fcntl.flock(self._lock_fh, fcntl.LOCK_UN)
            self._lock_fh.close()
            self._lock_fh = None

    # -- manifest ----------------------------------------------------------
    def read_manifest(self) -> dict:
        if not self.manifest_path.exists():
            return {"version": MANIFEST_VERSION, "stages": {}}
        try:
            manifest = json.loads(self.manifest_path.read_text())
        except (json.JSONDecodeError, OSError):
            # The manifest is replaced atomically, so this is damage from outside;
            # start afresh (outputs are found again by their cache keys).
            return {"version": MANIFEST_VERSION, "stages": {}}
        manifest.setdefault("stages", {})
        return manifest

    def write_manifest(self, manifest: dict) -> None:
        atomic_write_text(self.manifest_path, json.dumps(_jsonable(manifest), indent=2) + "\n")

    # -- stage outputs -----------------------------------------------------
    def output_dir(self, stage: str, key: str) -> Path:
        return self.store / f"{stage}-{key[:16]}"

    def has_output(self, stage: str, key: str) -> bool:
        return (self.output_dir(stage, key) / "stage.json").is_file()

    def begin(self, stage: str, key: str) -> Path:
        """Create and return a fresh temporary folder for a stage's output."""
        tmp = self.store / f".tmp-{stage}-{key[:16]}-{uuid.uuid4().hex[:8]}"
        tmp.mkdir()
        return tmp

    def commit(self, tmp: Path, stage: str, key: str, record: dict) -> Path:
        """Seal a temporary output folder and rename it into place."""
        atomic_write_text(tmp / "stage.json", json.dumps(_jsonable(record), indent=2, sort_keys=True) + "\n")
        final = self.output_dir(stage, key)
        if final.exists():
            # Same key means same inputs and parameters: the existing output is equivalent.
            shutil.rmtree(tmp, ignore_errors=True)
        else:
            try:
                os.rename(tmp, final)
            except OSError as err:
                raise RunFolderError(f"{final}: cannot move the stage output into place ({err.strerror})") from None
            _fsync_dir(self.store)
        self.link(stage, final)
        return final

    def link(self, stage: str, target: Path) -> None:
        """Point ``<run folder>/<stage>`` at ``target`` atomically."""
        link = self.folder / stage
        tmp = self.folder / f".{stage}.{uuid.uuid4().hex[:8]}.link"
        os.symlink(os.path.relpath(target, self.folder), tmp)
        if link.exists() and not link.is_symlink():
            raise RunFolderError(f"{link}: exists and is not a link made by lodeline: move it away")
        os.replace(tmp, link)

    def read_record(self, stage: str, key: str) -> dict:
        return json.loads((self.output_dir(stage, key) / "stage.json").read_text())

    def clean_temporary(self) -> list[Path]:
        """Remove temporary folders and links left by killed runs."""
        removed = []
        for p in list(self.store.glob(".tmp-*")) + list(self.folder.glob(".*.link")) + list(self.folder.glob(".*.tmp")):
            if p.is_dir() and not p.is_symlink():
                shutil.rmtree(p, ignore_errors=True)
            else:
                p.unlink(missing_ok=True)
            removed.append(p)
        return removed

    def prune(self, keep: set[Path]) -> list[Path]:
        """Remove stage outputs not in ``keep`` (outputs no current stage uses)."""
        removed = []
        for p in self.store.iterdir():
            if p.name.startswith(".") or p in keep:
                continue
            shutil.rmtree(p, ignore_errors=True)
            removed.append(p)
        return removed

    # -- datasets ----------------------------------------------------------
    @staticmethod
    def write_dataset(ds: xr.Dataset, path: Path) -> None:
        """Write a dataset to a chunked zarr store (computes dask arrays)."""
        ds = ds.copy()
        for var in ds.variables.values():
            var.encoding = {}
            var.attrs = _jsonable(dict(var.attrs))
        ds.attrs = _jsonable(dict(ds.attrs))
        if "crs_wkt" in ds.attrs and "crs" not in ds.variables:
            # CF grid-mapping variable that the variables' grid_mapping="crs" refers to.
            ds = ds.assign_coords(crs=((), np.int8(0), {"crs_wkt": ds.attrs["crs_wkt"], "spatial_ref": ds.attrs["crs_wkt"]}))
        if ds.sizes.get("reading", 0) > 0:
            ds = ds.chunk({"reading": STORE_CHUNK})
        ds.to_zarr(path, mode="w", zarr_format=2, consolidated=True)

    @staticmethod
    def open_dataset(path: Path) -> xr.Dataset:
        return xr.open_zarr(path, consolidated=True, zarr_format=2)
