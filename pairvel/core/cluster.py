"""Where tasks run: in this process, or as tasks on a Dask cluster.

A :class:`TaskRunner` runs calls of one function, in order, either here (no scheduler) or on the
workers of a Dask scheduler.  Large inputs that every call reads go to the workers once, by
:meth:`TaskRunner.share` (a broadcast ``scatter``), so the task graph holds only small arguments
and references to the shared data: its size does not grow with the number of tracers.

The runner watches the cluster while it waits: a worker lost in the middle of a run is survived
(the scheduler reruns its tasks elsewhere), but when no worker at all is left for
``worker_wait_s`` seconds the run ends with one :class:`ClusterError` instead of waiting forever.

dask.distributed is imported only when a scheduler is configured.
"""

from __future__ import annotations

__all__ = ["ClusterError", "TaskRunner", "open_runner"]

import contextlib
import logging
import time
import warnings
from concurrent.futures import CancelledError

from .errors import ConfigError, PairvelError

_log = logging.getLogger(__name__)
_POLL_S = 1.0  # how often a waiting run looks at the cluster's workers


class ClusterError(PairvelError):
    """The Dask cluster cannot run the work (no worker left, scheduler gone)."""


class TaskRunner:
    """Run calls of a function here (``client`` None) or on a Dask cluster.

    Parameters
    ----------
    client : dask.distributed.Client or None
    worker_wait_s : float, default 120
        How long a run waits with no worker on the cluster before it fails.
    key : str
        The config key named in errors.
    """

    def __init__(self, client=None, *, worker_wait_s: float = 120.0, key: str = "compute.scheduler_address"):
        self.client = client
        self.worker_wait_s = float(worker_wait_s)
        self.key = key

    @property
    def distributed(self) -> bool:
        return self.client is not None

    def n_workers(self) -> int:
        """Workers now on the cluster (1 in this process)."""
        return 1 if self.client is None else len(self.client.nthreads())

    def share(self, value):
        """``value`` as the calls should receive it: itself here, a reference to a copy held by every
        worker on a cluster (one broadcast, outside the task graph)."""
        if self.client is None:
            return value
        try:
            self.client.wait_for_workers(1, timeout=self.worker_wait_s)
            return self.client.scatter([value], broadcast=True, hash=False, timeout=self.worker_wait_s)[0]
        except TimeoutError:
            raise self._no_workers("the shared data could not be sent") from None

    def run(self, fn, calls) -> list:
        """``[fn(*args) for args in calls]``, on the cluster when there is one (results in order)."""
        calls = list(calls)
        if self.client is None:
            return [fn(*args) for args in calls]
        futures = [self.client.submit(_keeping_warnings, fn, *args, pure=False) for args in calls]
        try:
            self._wait(futures)
            parts = self.client.gather(futures)
        except CancelledError:  # the workers went, and the shared data with them
            raise ClusterError(f"{self.key}: the Dask workers holding this run's shared data are gone "
                               f"({len(self.client.nthreads())} workers left); start workers and rerun",
                               key=self.key) from None
        finally:
            for future in futures:
                future.release()
        for message, category in dict.fromkeys(w for _, kept in parts for w in kept):  # shown here, once each
            warnings.warn(message, category, stacklevel=2)
        return [result for result, _ in parts]

    def _wait(self, futures) -> None:
        from dask.distributed import wait

        idle_since = None
        while True:
            try:
                wait(futures, timeout=min(_POLL_S, max(self.worker_wait_s, 0.05)))
                return
            except TimeoutError:
                pass
            if self.n_workers():
                idle_since = None
                continue
            idle_since = idle_since or time.monotonic()
            if time.monotonic() - idle_since >= self.worker_wait_s:
                self.client.cancel(futures)
                raise self._no_workers(f"{sum(f.status != 'finished' for f in futures)} of {len(futures)} tasks "
                                       f"unfinished")

    def _no_workers(self, what: str) -> ClusterError:
        return ClusterError(f"{self.key}: no Dask worker left on the cluster for {self.worker_wait_s:g} s ({what}); "
                            f"start workers or raise compute.worker_wait_s", key=self.key)


def _keeping_warnings(fn, *args):
    """``fn(*args)`` and the warnings it raised, as (message, category) pairs: a worker's warnings
    are otherwise lost, and a run keeps every warning (``core.warnlog``)."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        result = fn(*args)
    return result, [(str(w.message), w.category) for w in caught]


def _connect(address, scheduler_file, timeout_s: float):
    try:
        from dask.distributed import Client
    except ImportError:
        raise ConfigError("a Dask scheduler is configured but dask.distributed is not installed: "
                          "pip install 'pairvel[dask]'", key="compute.scheduler_address") from None
    where, key = ((f"the scheduler file {scheduler_file}", "compute.scheduler_file") if scheduler_file is not None
                  else (f"the Dask scheduler at {address}", "compute.scheduler_address"))
    try:
        if scheduler_file is not None:
            return Client(scheduler_file=str(scheduler_file), timeout=f"{timeout_s:g}s"), key
        return Client(address, timeout=f"{timeout_s:g}s"), key
    except (OSError, ValueError) as err:
        raise ConfigError(f"{key}: cannot reach {where} ({err})", key=key) from None


@contextlib.contextmanager
def open_runner(scheduler=None, *, scheduler_file=None, worker_wait_s: float = 120.0):
    """A :class:`TaskRunner` for a scheduler address, a scheduler file, an open Client, or nothing.

    A client this function opens is closed on exit; a Client passed in stays open.  With a
    scheduler, waits up to ``worker_wait_s`` for a first worker (:class:`ClusterError` after that).
    """
    if isinstance(scheduler, TaskRunner):
        yield scheduler
        return
    if hasattr(scheduler, "submit"):
        client, owned, key = scheduler, False, "compute.scheduler_address"
    elif scheduler or scheduler_file is not None:
        client, key = _connect(scheduler or None, scheduler_file, max(worker_wait_s, 30.0))
        owned = True
    else:
        yield TaskRunner(None)
        return
    try:
        try:
            client.wait_for_workers(1, timeout=worker_wait_s)
        except TimeoutError:
            raise ClusterError(f"{key}: no Dask worker joined the cluster within {worker_wait_s:g} s; start workers "
                               f"or raise compute.worker_wait_s", key=key) from None
        _log.debug("Dask cluster: %d workers", len(client.nthreads()))
        yield TaskRunner(client, worker_wait_s=worker_wait_s, key=key)
    finally:
        if owned:
            client.close()
