"""Running independent tasks (a scan each) on Dask distributed: an embedded local cluster
of single-threaded worker processes, or a running scheduler by address."""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from typing import Any, TypeVar

__all__ = ["cap_fit_threads", "dask_client", "default_workers", "fit_threads", "run_tasks"]

T = TypeVar("T")


def default_workers() -> int:
    """The cores this process may use (``--workers``' default)."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


def cap_fit_threads(threads: int) -> int:
    """Cap the fit kernels' threads (numba) in this process, so that workers side by side
    do not oversubscribe the cores; returns the number before."""
    import numba

    before = int(numba.get_num_threads())
    cap = int(numba.config.NUMBA_NUM_THREADS)  # type: ignore[attr-defined]
    numba.set_num_threads(max(1, min(threads, cap)))
    return before


@contextmanager
def fit_threads(threads: int) -> Iterator[None]:
    """The fit kernels on ``threads`` threads in this process while the block runs."""
    before = cap_fit_threads(threads)
    try:
        yield
    finally:
        cap_fit_threads(before)


@contextmanager
def dask_client(workers: int, scheduler: str | None) -> Iterator[Any]:
    """A client of the scheduler at ``scheduler``, or of an embedded local cluster of
    ``workers`` single-threaded processes (closed on exit)."""
    from distributed import Client, LocalCluster

    if scheduler is not None:
        with Client(scheduler) as client:
            yield client
        return
    with (
        LocalCluster(
            n_workers=workers,
            threads_per_worker=1,
            processes=True,
            dashboard_address=None,
            silence_logs=40,  # logging.ERROR: the workers' own chatter stays out
        ) as cluster,
        Client(cluster) as client,
    ):
        yield client


def run_tasks(
    client: Any, task: Callable[..., T], arguments: Sequence[tuple[Any, ...]], name: str
) -> Iterator[T]:
    """Submit ``task(*args)`` for each ``args``; yield the results as they finish. The first
    failure is raised once every task has ended (none is left writing behind us)."""
    from distributed import as_completed

    futures = [
        client.submit(task, *args, pure=False, key=f"{name}-{i}")
        for i, args in enumerate(arguments)
    ]
    failure: BaseException | None = None
    for future in as_completed(futures):
        try:
            yield future.result()
        except Exception as error:  # re-raised below, once the rest have ended
            failure = failure or error
    if failure is not None:
        raise failure
