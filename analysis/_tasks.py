"""Where work runs: tile sizes, worker processes, a dask scheduler (:class:`Execution`), and the tile grid.

A low module (numpy only at import; dask.distributed on first parallel use): ``columns`` runs its windows with
:func:`map_tasks` and :func:`tile_grid`, ``parallel`` (tiled finding, memory-mapped reading) and ``batch`` build on
it, and none of them is imported back. Public through :mod:`tenfold.analysis.parallel`.

Parallel work (:func:`map_tasks`) runs serially, on an embedded ``distributed.LocalCluster`` (``workers``
processes of one thread each, started on demand and closed after), or on an existing scheduler
(``scheduler='tcp://host:8786'``; the workers must see the same files and output folder).
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np

from ._errors import TenfoldInputError

__all__ = ["Execution", "map_tasks", "tile_grid", "AUTO_TILE_ABOVE_PX", "AUTO_TILE_SIZE"]

#: images with more pixels than this square are tiled automatically (an untiled 4096^2 run peaks near 2 GB)
AUTO_TILE_ABOVE_PX = 4096
#: core tile size chosen automatically, px
AUTO_TILE_SIZE = 2048


@dataclass
class Execution:
    """How to run: tiles, workers, scheduler.

    Attributes
    ----------
    tile_size : int or None
        Core tile size in px; None = automatic (tiles of ``AUTO_TILE_SIZE`` when a side exceeds
        ``AUTO_TILE_ABOVE_PX``), 0 = never tile.
    workers : int or None
        Worker processes for tiles or images; None = the number of CPU cores, 1 = serial in this process.
    scheduler : str or None
        Address of a running dask scheduler to use instead of an embedded local cluster.
    overlap : int or None
        Halo around each tile, px (None = automatic from the column scale).
    """

    tile_size: int | None = None
    workers: int | None = None
    scheduler: str | None = None
    overlap: int | None = None

    def __post_init__(self) -> None:
        if self.tile_size is not None and not (isinstance(self.tile_size, (int, np.integer)) and
                                               (self.tile_size == 0 or self.tile_size >= 64)):
            raise TenfoldInputError(f"tile size must be 0 (never tile) or a whole number >= 64 px, got "
                                    f"{self.tile_size!r}")
        if self.workers is not None and not (isinstance(self.workers, (int, np.integer)) and self.workers >= 1):
            raise TenfoldInputError(f"workers must be a whole number >= 1, got {self.workers!r}")
        if self.overlap is not None and not (isinstance(self.overlap, (int, np.integer)) and self.overlap >= 0):
            raise TenfoldInputError(f"overlap must be a whole number >= 0 px, got {self.overlap!r}")

    @property
    def n_workers(self) -> int:
        return int(self.workers) if self.workers is not None else (os.cpu_count() or 1)

    @property
    def parallel(self) -> bool:
        return self.scheduler is not None or self.n_workers > 1

    def tiles_for(self, shape) -> int | None:
        """Core tile size to use for an image of ``shape``, or None for an untiled run."""
        if self.tile_size == 0:
            return None
        if self.tile_size is None:
            return AUTO_TILE_SIZE if max(shape) > AUTO_TILE_ABOVE_PX else None
        return int(self.tile_size) if max(shape) > self.tile_size else None


# --------------------------------------------------------------------------------------------------------------
# running tasks


def _client(execution: Execution):
    try:
        from distributed import Client, LocalCluster
    except ImportError:  # pragma: no cover - a dependency; kept for a clear message
        raise TenfoldInputError("parallel runs need the 'distributed' package: pip install distributed") from None
    if execution.scheduler:
        try:
            return Client(execution.scheduler, timeout="20s"), None
        except Exception as exc:
            raise TenfoldInputError(f"--scheduler {execution.scheduler}: cannot connect ({type(exc).__name__}: "
                                    f"{exc}); check the address or leave it out for a local cluster") from None
    cluster = LocalCluster(n_workers=execution.n_workers, threads_per_worker=1, processes=True,
                           dashboard_address=None)
    return Client(cluster), cluster


def map_tasks(tasks: list[tuple[Callable, tuple]], execution: Execution | None = None) -> Iterator[tuple[int, object]]:
    """Run ``func(*args)`` for every task; yield ``(index, result)`` as each finishes.

    Serial (in order) when there is one task or ``execution`` asks for one worker; otherwise on dask.distributed
    (embedded local cluster, or ``execution.scheduler``), in completion order. An exception in a task is raised
    here (batch tasks catch their own).
    """
    execution = execution or Execution(workers=1)
    if len(tasks) <= 1 or not execution.parallel:
        for k, (func, args) in enumerate(tasks):
            yield k, func(*args)
        return
    from distributed import as_completed

    client, cluster = _client(execution)
    try:
        futures = [client.submit(func, *args, pure=False) for func, args in tasks]
        index = {f.key: k for k, f in enumerate(futures)}
        for fut in as_completed(futures):
            yield index[fut.key], fut.result()
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


# --------------------------------------------------------------------------------------------------------------
# tiles


def tile_grid(shape, tile_size: int, overlap: int) -> list[tuple[tuple[int, int, int, int], tuple[int, int, int, int]]]:
    """Core and halo windows ``((r0, r1, c0, c1) core, (r0, r1, c0, c1) with halo)`` covering ``shape``.

    Cores are disjoint and cover the image; the last row/column of tiles takes the remainder (a sliver thinner
    than a quarter tile is merged into its neighbour).
    """
    def cuts(n):
        edges = list(range(0, n, tile_size)) + [n]
        if len(edges) > 2 and edges[-1] - edges[-2] < tile_size // 4:
            edges.pop(-2)
        return list(zip(edges[:-1], edges[1:]))

    rows, cols = shape
    out = []
    for r0, r1 in cuts(rows):
        for c0, c1 in cuts(cols):
            out.append(((r0, r1, c0, c1), (max(0, r0 - overlap), min(rows, r1 + overlap),
                                           max(0, c0 - overlap), min(cols, c1 + overlap))))
    return out
