"""Progress bars on a terminal; silent when quiet or not on a terminal."""

from __future__ import annotations

import contextlib
import sys

from dask.callbacks import Callback

__all__ = ["make_progress", "dask_progress"]


class _Silent:
    def update(self, n: int = 1) -> None:
        pass

    def close(self) -> None:
        pass


def make_progress(enabled: bool):
    """Return ``progress(total, desc)`` making a tqdm bar, or a silent stand-in."""

    def progress(total: int | None = None, desc: str = ""):
        if not enabled:
            return _Silent()
        from tqdm import tqdm

        return tqdm(total=total, desc=desc, file=sys.stderr, leave=False, dynamic_ncols=True)

    return progress


class _DaskBar(Callback):
    """A tqdm bar over the tasks of dask computations (local schedulers)."""

    def __init__(self, desc: str):
        super().__init__()
        self.desc = desc
        self.bar = None

    def _start_state(self, dsk, state):
        from tqdm import tqdm

        total = sum(len(state[k]) for k in ("ready", "waiting", "running", "finished"))
        self.bar = tqdm(total=total, desc=self.desc, file=sys.stderr, leave=False, dynamic_ncols=True)

    def _posttask(self, key, result, dsk, state, worker_id):
        if self.bar is not None:
            self.bar.update(1)

    def _finish(self, dsk, state, errored):
        if self.bar is not None:
            self.bar.close()
            self.bar = None


@contextlib.contextmanager
def dask_progress(enabled: bool, desc: str):
    """Show a bar for dask work done inside the block when ``enabled``."""
    if not enabled:
        yield
        return
    with _DaskBar(desc):
        yield
