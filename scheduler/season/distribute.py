"""The season's realizations as Dask tasks: a local cluster by default, or an existing one.

The unit of work is a block of ``BLOCK_NIGHTS`` consecutive nights of one realization; the
block after it takes its state (the realization's copy of the queue and its nights so far).
Why blocks rather than whole realizations: every task is submitted at once with earlier
blocks first in priority, so the workers advance all realizations through the season roughly
together. A worker then plans the same few nights for every realization it holds, and its
sky cache (one per worker process, keyed by night) only needs the nights of about two blocks:
each night's sky is computed once per worker and read by every realization planning it,
while the memory stays bounded whatever the season's length (a realization-per-task design
would need the whole season's skies in memory, or recompute them for every realization).

Determinism: a block's result depends only on the setup, the realization, its nights and the
state handed to it (weather seeded from the master seed and the night's date, plans bounded
by a work budget, never by the clock), so the same seed gives the same outcomes whichever
worker runs which block, on any number of workers and under any load.

Workers share nothing through the live database: the setup (plain data read once by the
command) is sent to every worker.
"""

from __future__ import annotations

import logging
import resource
import sys
import time
import uuid
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Callable, Iterator

from scheduler.model.errors import InputError
from scheduler.season.engine import RealizationState, SeasonSetup, initial_state, simulate_nights
from scheduler.season.simulate import RealizationOutcome
from scheduler.sky.ephemeris import SkyCache

BLOCK_NIGHTS = 5

_SKY_CACHE: SkyCache | None = None  # one per worker process


def worker_sky_cache() -> SkyCache:
    """This process's sky cache: the nights of about two blocks (the one being planned and the next)."""
    global _SKY_CACHE
    if _SKY_CACHE is None:
        _SKY_CACHE = SkyCache(max_nights=2 * BLOCK_NIGHTS + 1)
    return _SKY_CACHE


def run_block(setup: SeasonSetup, state: RealizationState, start: int, stop: int) -> RealizationState:
    """Nights start..stop-1 of one realization (a Dask task)."""
    return simulate_nights(setup, state, range(start, stop), worker_sky_cache())


def blocks(n_nights: int, size: int = BLOCK_NIGHTS) -> list[tuple[int, int]]:
    return [(a, min(a + size, n_nights)) for a in range(0, n_nights, size)]


def peak_rss_mib() -> float:
    """This process's peak resident memory (Linux: VmHWM, the process's own high-water mark)."""
    try:
        with open("/proc/self/status", encoding="ascii") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return kib / (1024.0 * 1024.0) if sys.platform == "darwin" else kib / 1024.0


def _cpu_s() -> float:
    return time.process_time()


def _sky_computed() -> dict:
    c = worker_sky_cache()
    return {"nights": c.nights_computed, "targets": c.targets_computed}


@dataclass(frozen=True)
class RunInfo:
    """How the run went (not part of the outlook: it varies with the cluster)."""

    workers: int
    peak_rss_mib: dict  # worker address -> peak resident memory, MiB
    sky_nights_computed: dict  # worker address -> nights whose sky it computed
    cpu_s: dict  # worker address -> CPU seconds the worker process has used (its start included)


@contextmanager
def dask_client(scheduler: str | None, workers: int | None) -> Iterator[object]:
    """A client of an existing cluster (``scheduler``: tcp://host:port), else of a local cluster
    of ``workers`` single-threaded worker processes, started here and stopped on exit."""
    from distributed import Client, LocalCluster

    cluster = None
    if scheduler:
        try:
            client = Client(scheduler, timeout="15s")
        except (OSError, TimeoutError, ValueError) as e:
            raise InputError("scheduler", f"cannot reach a Dask scheduler at {scheduler!r} ({type(e).__name__}: "
                                          f"{str(e).splitlines()[0][:120] if str(e) else 'no answer'}); "
                                          "allowed a running scheduler's address, tcp://host:port") from None
    else:
        # ":0": the dashboard on a free port (several simulations at once never fight over one)
        cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=":0",
                               silence_logs=logging.ERROR, memory_limit=0)
        client = Client(cluster)
    try:
        yield client
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


def run_realizations(client, setup: SeasonSetup, realizations: int,
                     progress: Callable[[int, int, int, int], None] | None = None
                     ) -> tuple[list[RealizationOutcome], RunInfo]:
    """Every realization through every night on the client's cluster.

    progress(realizations done, realizations, nights done, nights) after every block.
    """
    from distributed import as_completed

    n = len(setup.dates)
    parts = blocks(n)
    token = uuid.uuid4().hex[:12]  # keys unique on a shared cluster
    setup_f = client.scatter(setup, broadcast=True)
    meta: dict[str, tuple[int, int, int]] = {}
    futures = []
    for r in range(realizations):
        prev = initial_state(setup, r)
        for b, (a, z) in enumerate(parts):
            prev = client.submit(run_block, setup_f, prev, a, z, key=f"season-{token}-r{r}-b{b}",
                                 priority=len(parts) - b, pure=False)
            meta[prev.key] = (r, b, z - a)
            futures.append(prev)
    del prev
    done_r = done_n = 0
    if progress:
        progress(0, realizations, 0, n * realizations)
    outcomes: list[RealizationOutcome] = []
    pending = as_completed(futures)
    futures.clear()  # as_completed holds them until each is done; then they can be released
    for fut in pending:
        r, b, k = meta[fut.key]
        if fut.status == "error" or b == len(parts) - 1:
            outcomes.append(fut.result().outcome())  # a task's error is raised here
            done_r += 1
        done_n += k
        del fut
        if progress:
            progress(done_r, realizations, done_n, n * realizations)
    info = RunInfo(workers=len(client.scheduler_info()["workers"]),
                   peak_rss_mib={w: round(v, 1) for w, v in sorted(client.run(peak_rss_mib).items())},
                   sky_nights_computed={w: v["nights"] for w, v in sorted(client.run(_sky_computed).items())},
                   cpu_s={w: round(v, 1) for w, v in sorted(client.run(_cpu_s).items())})
    return sorted(outcomes, key=lambda o: o.realization), info

