"""How many worker processes a run may start: never more than the cores it may use, nor than its tasks.

Each worker is a Python process holding numba kernels and image tiles (a few hundred MB); a thousand of them
exhaust the memory long before they speed anything up. :func:`cap_workers` gives the number to use and a note
saying why when it is lower than the one asked for.
"""

from __future__ import annotations

import math
import os

__all__ = ["usable_cores", "cap_workers", "n_tiles"]


def usable_cores() -> int:
    """CPU cores this process may run on (its affinity mask, else the machine's count; at least 1)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def n_tiles(shape, tile_px: int | None) -> int:
    """Tiles of ``tile_px`` covering an image of ``shape`` (rows, cols); 1 for an untiled run."""
    if not tile_px:
        return 1
    return math.ceil(int(shape[0]) / tile_px) * math.ceil(int(shape[1]) / tile_px)


def cap_workers(workers: int | None, *, tasks: int, what: str = "tiles", flag: str = "--workers") -> tuple[int | None, str]:
    """The worker count to use for ``tasks`` tasks, and a note when the one asked for was lowered.

    Parameters
    ----------
    workers : int or None
        Workers asked for (None = automatic, left to the scheduler: returned unchanged unless above the cap).
    tasks : int
        Independent tasks (tiles of an image, images of a batch); more workers than tasks would idle.
    what : str
        What the tasks are, for the note.
    flag : str
        Name of the option in the note.

    Returns
    -------
    workers : int or None
        ``min(workers, usable_cores(), tasks)`` (at least 1), or None when ``workers`` was None.
    note : str
        Why the number was lowered ('' when it was not).
    """
    if workers is None:
        return None, ""
    cores = usable_cores()
    cap = max(1, min(cores, int(tasks)))
    if workers <= cap:
        return workers, ""
    why = f"{cores} CPU core{'s' if cores != 1 else ''}" if cores <= tasks else f"{tasks} {what}"
    return cap, (f"{flag} {workers} is more than this run can use ({why}); using {cap} worker process"
                 f"{'es' if cap != 1 else ''}")
