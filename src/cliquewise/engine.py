"""Where stages run: an embedded dask cluster by default, or an existing one.

By default stages run on a thread pool in this process, one thread per core: numba kernels compiled with ``nogil=True`` run side by side, nothing is
serialised and a round trip costs microseconds, not the milliseconds of a
distributed client (which matters for an EM that maps once per iteration). ``workers=N``
starts a ``dask.distributed`` LocalCluster of N worker processes on 127.0.0.1,
which is what ``memory_limit`` needs to mean anything; ``scheduler=
"tcp://HOST:PORT"`` joins a running cluster; ``dashboard=HOST:PORT`` runs the
in-process case on a distributed client so the dashboard can be served (bound to
127.0.0.1 unless a host is given).

Stages use only :meth:`Engine.map` (run a function over items, with a progress
bar, results in item order) and :meth:`Engine.submit`, so they run the same way
on every engine.
"""

from __future__ import annotations

import logging
import os
import sys
import threading
import time
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any, Callable, Iterable, Sequence

import psutil


@dataclass
class EngineSettings:
    scheduler: str | None = None  # tcp://host:port of an existing cluster
    workers: int | None = None  # worker processes for a LocalCluster; None = in-process threads
    threads: int | None = None  # threads per worker
    memory_limit: str | None = None  # per worker, e.g. "2GB"
    dashboard: str | None = None  # e.g. "127.0.0.1:8787"; None = no dashboard
    progress: bool = True

    def to_dict(self) -> dict:
        return dict(self.__dict__)


class EngineError(RuntimeError):
    pass


def _quiet_dask_logs() -> None:
    # tornado.application: errors in the callbacks of dask's event loop, such as a
    # local cluster correcting its state while a dying worker is restarted
    for name in ("distributed", "distributed.worker", "distributed.scheduler", "distributed.nanny",
                 "distributed.core", "distributed.http.proxy", "distributed.utils_perf", "tornado.application"):
        logging.getLogger(name).setLevel(_dask_log_level())


def dashboard_address(spec: str) -> str:
    """``HOST:PORT`` for the dashboard: 127.0.0.1 unless a host is given explicitly.

    >>> dashboard_address("8787"), dashboard_address(":8787"), dashboard_address("0.0.0.0:8787")
    ('127.0.0.1:8787', '127.0.0.1:8787', '0.0.0.0:8787')
    """
    spec = str(spec).strip()
    host, sep, port = spec.rpartition(":")
    if not sep:
        host, port = "", spec
    return f"{host or '127.0.0.1'}:{port}"


def _dask_log_level() -> int:
    # dask's own error lines (a task failed, a worker died) repeat what our one-line
    # error says; they are shown with --debug only
    return logging.ERROR if logging.getLogger("cliquewise").isEnabledFor(logging.DEBUG) else logging.CRITICAL


class Engine:
    """A dask client (or dask's threaded scheduler) plus the few helpers stages need."""

    def __init__(self, settings: EngineSettings | None = None):
        self.settings = s = settings or EngineSettings()
        if s.scheduler or s.workers or s.dashboard:
            # importing distributed configures its loggers (level INFO); quieten them after
            import distributed  # noqa: F401
        _quiet_dask_logs()
        self._cluster = None
        self.client = None
        ncores = os.cpu_count() or 1
        if s.scheduler:
            from dask.distributed import Client

            try:
                self.client = Client(s.scheduler, timeout="20s")
            except (OSError, TimeoutError) as exc:
                raise EngineError(f"cannot reach the dask scheduler at {s.scheduler}: {exc}") from exc
        elif s.workers:
            from dask.distributed import Client, LocalCluster

            threads = s.threads or max(1, ncores // s.workers)
            # the scheduler always serves HTTP (health checks); without a dashboard it
            # gets a free port on 127.0.0.1, never the public default :8787
            web = ({"dashboard_address": dashboard_address(s.dashboard)} if s.dashboard else
                   {"dashboard_address": None, "scheduler_kwargs": {"dashboard": False,
                                                                    "dashboard_address": "127.0.0.1:0"}})
            self._cluster = LocalCluster(
                n_workers=s.workers, threads_per_worker=threads, processes=True,
                memory_limit=s.memory_limit or "auto", host="127.0.0.1",
                silence_logs=_dask_log_level(), **web,
            )
            self.client = Client(self._cluster)
        elif s.dashboard:
            from dask.distributed import Client, LocalCluster

            self._cluster = LocalCluster(
                n_workers=1, threads_per_worker=s.threads or ncores, processes=False,
                memory_limit=s.memory_limit or 0, dashboard_address=dashboard_address(s.dashboard),
                # the in-process worker serves HTTP too; without a host it would listen everywhere
                worker_dashboard_address="127.0.0.1:0", silence_logs=_dask_log_level(),
            )
            self.client = Client(self._cluster)
        # without a client: dask's threaded scheduler in this process (lowest latency)
        self._threads = s.threads or ncores
        self._pool = None
        if self.client is None:
            from concurrent.futures import ThreadPoolExecutor

            self._pool = ThreadPoolExecutor(self._threads, thread_name_prefix="cliquewise")
        self.in_process = self.client is None or (self._cluster is not None and not s.workers)

    # -- description ---------------------------------------------------------
    def describe(self) -> dict:
        if self.client is None:
            return {"address": None, "workers": 1, "threads": self._threads, "in_process": True,
                    "dashboard": None, "scheduler": "threads"}
        info = self.client.scheduler_info()
        workers = info.get("workers", {})
        return {
            "address": info.get("address"),
            "workers": len(workers),
            "threads": sum(w.get("nthreads", 0) for w in workers.values()),
            "in_process": self.in_process,
            "dashboard": self.client.dashboard_link if self.settings.dashboard else None,
            "scheduler": "distributed",
        }

    def nthreads(self) -> int:
        if self.client is None:
            return self._threads
        return max(1, sum(self.client.nthreads().values()))

    def task_memory(self) -> int | None:
        """Bytes one task may hold: the smallest worker memory limit over its
        threads (``None`` when the workers have no limit, as on the embedded engine).
        Stages size the pieces of their larger steps by it."""
        if self.client is None:
            return None
        try:
            workers = self.client.scheduler_info()["workers"].values()
            shares = [w["memory_limit"] / max(1, w.get("nthreads", 1)) for w in workers if w.get("memory_limit")]
        except Exception:  # noqa: BLE001 - an unknown limit means none
            return None
        return int(min(shares)) if shares else None

    # -- running -------------------------------------------------------------
    def map(self, func: Callable, items: Sequence, *args, desc: str = "", **kwargs) -> list:
        """``[func(item, *args, **kwargs) for item in items]`` on the cluster, in item order."""
        items = list(items)
        if not items:
            return []
        func = _with_fault_point(func)
        if self.client is None:
            return self._map_threads(func, items, args, kwargs, desc)
        from dask.distributed import as_completed

        extra = [[a] * len(items) for a in args]
        futures = self.client.map(func, items, *extra, pure=False, **kwargs)
        if not desc or not self.settings.progress:
            try:
                return self.client.gather(futures)
            except BaseException as exc:
                self.client.cancel(futures)
                _raise_worker_loss(exc, desc or func)
                raise
        index = {f.key: i for i, f in enumerate(futures)}
        results: list[Any] = [None] * len(items)
        with progress_bar(len(items), desc, self.settings.progress) as bar:
            try:
                for fut in as_completed(futures):
                    results[index[fut.key]] = fut.result()
                    bar(1)
            except BaseException as exc:
                self.client.cancel(futures)
                _raise_worker_loss(exc, desc or func)
                raise
        return results

    def _map_threads(self, func, items, args, kwargs, desc):
        # Independent tasks need no task graph: a plain pool keeps every core busy.
        from concurrent.futures import wait, FIRST_EXCEPTION

        if len(items) == 1:
            return [func(items[0], *args, **kwargs)]
        with progress_bar(len(items), desc, self.settings.progress) as bar:
            futs = [self._pool.submit(func, it, *args, **kwargs) for it in items]
            for f in futs:
                f.add_done_callback(lambda _f: bar(1))
            done, pending = wait(futs, return_when=FIRST_EXCEPTION)
            for f in futs:
                if f.done() and f.exception() is not None:
                    for p in pending:
                        p.cancel()
                    raise f.exception()
            return [f.result() for f in futs]

    def submit(self, func: Callable, *args, **kwargs):
        """Run ``func`` on the cluster; returns an object with ``.result()``."""
        func = _with_fault_point(func)
        if self.client is None:
            return _Done(func(*args, **kwargs))
        return _Future(self.client.submit(func, *args, pure=False, **kwargs), func)

    def scatter(self, data, broadcast: bool = True):
        if self.in_process:
            return data
        # hash=False: every scatter is its own key, so releasing one never drops another
        return self.client.scatter(data, broadcast=broadcast, hash=False)

    def worker_rss(self) -> int:
        """Sum of the resident memory of the worker processes (0 in-process)."""
        if self.in_process:
            return 0
        try:
            info = self.client.scheduler_info()["workers"]
            return int(sum(w.get("metrics", {}).get("memory", 0) for w in info.values()))
        except Exception:  # noqa: BLE001 - monitoring must never break a run
            return 0

    def close(self) -> None:
        """Shut the client, the thread pool and the local cluster down.

        An error while they shut down (say a local cluster joining a worker
        process that was being restarted after dying) is logged at debug level and
        not raised: raised from the ``finally`` of a run, it would replace the
        run's own error (such as the clear one for workers that keep dying), and
        after a run that completed, the results are written whatever it says.
        """
        steps = []
        if self.client is not None:
            steps.append(self.client.close)
        if self._pool is not None:
            steps.append(lambda: self._pool.shutdown(wait=False))
        if self._cluster is not None:
            steps.append(self._cluster.close)
        for step in steps:
            try:
                step()
            except Exception:
                logging.getLogger(__name__).debug("engine: error while shutting down", exc_info=True)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def _with_fault_point(func: Callable) -> Callable:
    """``func`` itself, or (only when the crash tests set ``CLIQUEWISE_FAULT``) a
    wrapper that passes the fault point ``task:<name>`` before calling it."""
    if not (os.environ.get("CLIQUEWISE_FAULT") or os.environ.get("CLIQUEWISE_FAULT_TRACE")):
        return func
    return _FaultTask(func)


class _FaultTask:
    """A task wrapper with a fault point (see ``store.fault_point``); picklable."""

    def __init__(self, func: Callable):
        self.func = func
        self.__name__ = getattr(func, "__name__", "task")

    def __call__(self, *args, **kwargs):
        from cliquewise.store import fault_point

        fault_point(f"task:{self.__name__}")
        return self.func(*args, **kwargs)


def _raise_worker_loss(exc: BaseException, what) -> None:
    """Turn dask's ``KilledWorker`` (a task's worker died too often) into a clear error."""
    try:
        from distributed import KilledWorker
    except ImportError:  # pragma: no cover - distributed is a dependency
        return
    from concurrent.futures import CancelledError

    name = what if isinstance(what, str) else getattr(what, "__name__", "a task")
    if isinstance(exc, KilledWorker):
        raise EngineError(
            f"worker processes died repeatedly while running {name} (out of memory, or killed); finished "
            f"units are checkpointed: fix the cause (e.g. a larger --memory-limit) and run 'cliquewise resume "
            f"RUN_DIR'") from None
    if isinstance(exc, CancelledError):  # the stages never cancel their own tasks before this point
        raise EngineError(
            f"{name} was cancelled by the cluster: its input data were lost, usually because worker processes "
            f"died (out of memory, or killed); finished units are checkpointed: fix the cause (e.g. a larger "
            f"--memory-limit) and run 'cliquewise resume RUN_DIR'") from None


class _Future:
    """A distributed future whose ``.result()`` reports a lost worker clearly."""

    def __init__(self, future, func):
        self._future, self._func = future, func

    def result(self):
        try:
            return self._future.result()
        except Exception as exc:  # noqa: BLE001
            _raise_worker_loss(exc, self._func)
            raise


class _Done:
    """A finished result with the ``.result()`` of a future."""

    def __init__(self, value):
        self._value = value

    def result(self):
        return self._value


# -- progress -----------------------------------------------------------------

@contextmanager
def progress_bar(total: int, desc: str, enabled: bool = True):
    """A tqdm bar on stderr when it is a terminal (or forced); yields an ``update(n)``."""
    if not enabled or not desc:
        yield lambda n: None
        return
    from tqdm import tqdm

    bar = tqdm(total=total, desc=desc, unit="task", file=sys.stderr, leave=False,
               disable=None if not os.environ.get("CLIQUEWISE_PROGRESS") else False,
               dynamic_ncols=True)
    try:
        yield bar.update
    finally:
        bar.close()


# -- resource monitoring -------------------------------------------------------

class ResourceMonitor:
    """Samples resident memory of this process (and its workers) while a stage runs."""

    def __init__(self, engine: Engine | None = None, interval: float = 0.05):
        self.engine = engine
        self.interval = interval
        self.peak_driver = 0
        self.peak_workers = 0
        self._stop = threading.Event()
        self._proc = psutil.Process()

    def _sample(self):
        try:
            rss = self._proc.memory_info().rss
        except psutil.Error:
            rss = 0
        self.peak_driver = max(self.peak_driver, rss)

    def _run(self):
        tick = 0
        while not self._stop.wait(self.interval):
            self._sample()
            tick += 1
            if self.engine is not None and not self.engine.in_process and tick % 10 == 0:
                self.peak_workers = max(self.peak_workers, self.engine.worker_rss())

    def __enter__(self):
        self._t0 = time.perf_counter()
        self._cpu0 = self._cpu_times()
        self._sample()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()
        return self

    def _cpu_times(self) -> float:
        t = self._proc.cpu_times()
        return t.user + t.system

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()
        self._sample()
        if self.engine is not None and not self.engine.in_process:
            self.peak_workers = max(self.peak_workers, self.engine.worker_rss())
        self.wall = time.perf_counter() - self._t0
        self.cpu = self._cpu_times() - self._cpu0

    def as_dict(self, worker_cpu: float = 0.0) -> dict:
        return {
            "wall_seconds": round(self.wall, 4),
            "cpu_seconds": round(self.cpu + worker_cpu, 4),
            "peak_rss_bytes": int(self.peak_driver + self.peak_workers),
            "peak_rss_driver_bytes": int(self.peak_driver),
            "peak_rss_workers_bytes": int(self.peak_workers),
        }
