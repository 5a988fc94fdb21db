"""A Dask distributed client: a LocalCluster on this machine by default, or an existing scheduler."""

from __future__ import annotations

import logging
from collections.abc import Callable, Iterator
from contextlib import contextmanager

from ...errors import StateError


@contextmanager
def dask_client(scheduler: str | None = None, n_workers: int = 2, *, client=None) -> Iterator:
    """Yield a ``distributed.Client``.

    Parameters
    ----------
    scheduler : str, optional
        ``tcp://HOST:8786`` of a running scheduler; else a ``LocalCluster`` of
        ``n_workers`` worker processes (one thread each) is started and stopped.
    client : distributed.Client, optional
        Use this one as it is (not closed here).
    """
    if client is not None:
        yield client
        return
    from distributed import Client, LocalCluster

    if not isinstance(n_workers, int) or n_workers < 1:
        raise ValueError(f"n_workers: expected a positive integer, got {n_workers!r}")
    if scheduler:
        try:
            c = Client(scheduler, timeout="20s")
        except OSError as e:
            raise StateError(f"--scheduler {scheduler}: cannot reach the Dask scheduler ({e})") from None
        try:
            yield c
        finally:
            c.close()
        return
    cluster = LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True, dashboard_address=None,
                           silence_logs=logging.ERROR)
    c = Client(cluster)
    try:
        yield c
    finally:
        c.close()
        cluster.close()


def run_tasks(client, fn: Callable, args: list, progress: Callable[[int, int], None] | None = None) -> list:
    """Submit ``fn(*a)`` for each ``a`` in ``args``; results in submission order, progress as they finish."""
    from distributed import as_completed

    futures = [client.submit(fn, *a, pure=False) for a in args]
    index = {f.key: i for i, f in enumerate(futures)}
    out: list = [None] * len(futures)
    for done, f in enumerate(as_completed(futures), start=1):
        out[index[f.key]] = f.result()
        if progress:
            progress(done, len(futures))
    return out
