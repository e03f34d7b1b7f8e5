"""Where campaign runs are evaluated: a local thread or process pool, or a Dask distributed cluster.

:func:`make_engine` picks: a local thread pool (a command is a process of its own; also any single
worker), a local process pool (a Python function on several workers; the callable must be importable by
name, and a script calling the API needs the ``if __name__ == "__main__":`` guard), or a Dask
distributed cluster, whose workers must be able to import windowfinder and the function's module.
"""

from __future__ import annotations

import numbers
import os
from concurrent import futures as cf

from windowfinder.errors import InputError
from windowfinder.campaign.commands import stop_commands
from windowfinder.campaign.evaluators import FunctionEvaluator, one_line

def _process_context():
    """Start method for pool workers: a fork server (one clean process, started once, with windowfinder
    imported, that forks each worker) where the platform has one, else spawn. Plain fork is avoided: it
    copies a process that may hold threads (Dask, the pool's own manager) and can deadlock."""
    import multiprocessing

    if "forkserver" in multiprocessing.get_all_start_methods():
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(["windowfinder.campaign.evaluators"])
        return ctx
    return multiprocessing.get_context("spawn")


class _LocalEngine:
    """A concurrent.futures pool: threads (commands, or one worker) or spawned processes (functions)."""

    def __init__(self, workers: int, processes: bool):
        self.workers, self.processes = workers, processes
        self.pool = None

    def __enter__(self):
        if self.processes:
            self.pool = cf.ProcessPoolExecutor(self.workers, mp_context=_process_context())
        else:
            self.pool = cf.ThreadPoolExecutor(self.workers, thread_name_prefix="windowfinder-run")
        return self

    def submit(self, fn, *args):
        return self.pool.submit(fn, *args)

    def as_completed(self, fs):
        return cf.as_completed(fs)

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            self.pool.shutdown(wait=True)
            return
        stop_commands()
        for proc in list((getattr(self.pool, "_processes", None) or {}).values()):
            proc.terminate()  # our own pool workers, still busy with runs nobody will record
        self.pool.shutdown(wait=False, cancel_futures=True)


class _DaskEngine:
    """A Dask distributed client on an existing scheduler or on a LocalCluster started here."""

    def __init__(self, scheduler: str | None = None, local_workers: int | None = None):
        self.scheduler, self.local_workers = scheduler, local_workers
        self.client = self.cluster = None

    def __enter__(self):
        try:
            from dask.distributed import Client, LocalCluster
        except ImportError:
            raise InputError("running on Dask needs dask.distributed; pip install 'windowfinder[cluster]' "
                             "or use --workers for a local pool") from None
        if self.local_workers:
            self.cluster = LocalCluster(n_workers=self.local_workers, threads_per_worker=1, processes=True,
                                        dashboard_address=None)
            self.client = Client(self.cluster)
        else:
            try:
                self.client = Client(self.scheduler, timeout="20s")
            except (OSError, TimeoutError, ValueError) as e:
                raise InputError(f"--scheduler {self.scheduler}: cannot connect ({one_line(e, 120)}); "
                                 "check the address (tcp://host:8786) and that the scheduler runs") from None
        return self

    def submit(self, fn, *args):
        return self.client.submit(fn, *args, pure=False)

    def as_completed(self, fs):
        from dask.distributed import as_completed

        return as_completed(list(fs))

    def __exit__(self, exc_type, exc, tb):
        try:
            self.client.close()
        finally:
            if self.cluster is not None:
                self.cluster.close()


def check_count(name: str, value, low: int) -> None:
    """Refuse ``value`` unless it is a whole number >= ``low`` (``name`` is the option shown to the user)."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < low:
        raise InputError(f"{name} {value!r}: must be a whole number >= {low}")


def make_engine(evaluator, workers: int | None = None, scheduler: str | None = None,
                dask_local: int | None = None):
    """The evaluation engine: a Dask client (``scheduler`` address or ``dask_local`` workers on this
    machine) or a local pool of ``workers`` (default ``os.cpu_count()``): threads for a command or a
    single worker, spawned processes for a Python function."""
    if scheduler and dask_local:
        raise InputError("--scheduler and --dask-local exclude each other; choose one")
    if dask_local is not None:
        check_count("--dask-local", dask_local, 1)
        return _DaskEngine(local_workers=dask_local)
    if scheduler:
        return _DaskEngine(scheduler=scheduler)
    workers = workers if workers is not None else (os.cpu_count() or 1)
    check_count("--workers", workers, 1)
    processes = isinstance(evaluator, FunctionEvaluator) and workers > 1
    return _LocalEngine(workers, processes)


__all__ = ["check_count", "make_engine"]
