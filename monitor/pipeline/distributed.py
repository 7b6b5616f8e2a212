"""The tiles of a backfill as Dask futures (``[compute] engine = "dask"``).

The returns of each block of instruments are scattered to the cluster once; every tile
(block I x block J) is one task that reads its two blocks and returns only the sparse
conditions the alert book needs (:mod:`monitor.alerts.tiles`). The book, the store and the
digest stay in this process. Dask (``pip install 'comove[dask]'``) is imported only here
and only when the engine is ``dask``.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import logging
from collections.abc import Callable, Iterator, Sequence
from typing import Any

import numpy as np

from monitor.alerts.book import AlertBook
from monitor.alerts.replay import Plan
from monitor.alerts.tiles import SparseConditions, cut, tile_conditions, tileable
from monitor.config import ComputeSettings
from monitor.errors import ComoveError

LOG = logging.getLogger("comove.compute")

TileProgress = Callable[[int, int], None]


def _distributed() -> Any:
    try:
        import distributed
    except ImportError:
        raise ComoveError("[compute] engine = \"dask\" needs Dask: pip install "
                          "'comove[dask]'") from None
    return distributed


@contextlib.contextmanager
def client(compute: ComputeSettings) -> Iterator[Any]:
    """A Dask client on a new local cluster (``scheduler = "local"``) or on the running
    scheduler at the address; an unreachable address is one ComoveError naming it."""
    distributed = _distributed()
    if compute.scheduler == "local":
        with distributed.LocalCluster(
            n_workers=compute.workers, threads_per_worker=compute.threads_per_worker,
            processes=True, dashboard_address=":0",
        ) as cluster, distributed.Client(cluster) as connected:
            _log_cluster(connected)
            yield connected
        return
    try:
        connected = distributed.Client(compute.scheduler, timeout=compute.connect_seconds)
    except (OSError, TimeoutError) as exc:
        raise ComoveError(f"[compute] scheduler {compute.scheduler}: cannot reach it "
                          f"({type(exc).__name__}: {exc})") from None
    with connected:
        _log_cluster(connected)
        yield connected


def _log_cluster(connected: Any) -> None:
    workers = connected.scheduler_info().get("workers", {})
    link = getattr(connected, "dashboard_link", None)
    LOG.info("dask scheduler %s, %d workers%s", connected.scheduler.address, len(workers),
             f", dashboard {link}" if link else "")


def remote_conditions(
    connected: Any,
    returns: np.ndarray,
    dates: Sequence[dt.date],
    plan: Plan,
    book: AlertBook,
    compute: ComputeSettings,
    *,
    from_t: int,
    stop_t: int,
    progress: TileProgress | None = None,
) -> tuple[frozenset[str], SparseConditions]:
    """Compute the tileable rules of `plan` on the cluster; the names of those rules and
    their conditions by day (for :func:`monitor.alerts.replay.replay`'s ``remote``)."""
    distributed = _distributed()
    rules = [rule for rule in plan.rules if tileable(rule)]
    conditions = SparseConditions(plan, from_t)
    if not rules:
        return frozenset(), conditions
    active = {rule.name: book.active_targets(rule) for rule in rules}
    size = compute.tile_size
    tiles = cut(rules, returns.shape[1], size, active)
    stop_rows = returns[:stop_t]
    blocks: dict[int, Any] = {}
    for tile in tiles:
        for start in (int(tile.rows[0]), int(tile.cols[0])):
            if start not in blocks:
                block = np.ascontiguousarray(stop_rows[:, start:start + size])
                # on every worker: a worker lost mid-run leaves copies for the retries
                # (scattered data is not a task Dask could recompute)
                blocks[start] = connected.scatter(block, broadcast=True)
    futures = [
        connected.submit(tile_conditions, blocks[int(tile.rows[0])], blocks[int(tile.cols[0])],
                         tile, list(dates[:stop_t]), from_t=from_t, stop_t=stop_t,
                         level=plan.level, pure=False)
        for tile in tiles
    ]
    done = 0
    for future in distributed.as_completed(futures):
        conditions.add(future.result())
        done += 1
        if progress is not None:
            progress(done, len(tiles))
    LOG.info("%d tiles of %d instruments a side computed on the cluster", len(tiles), size)
    return frozenset(rule.name for rule in rules), conditions
