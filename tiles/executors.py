"""Executors: a plain in-process loop (the reference) and Dask distributed.

Both run the same picklable task functions. The Dask executor keeps a bounded number of tasks in
flight, releases futures as they finish, retries failed tasks, and merges fit accumulators in a tree
on the workers. No pixel array passes through the scheduler: tasks read and write the stores.
"""
from __future__ import annotations

import logging
import os
from pathlib import Path
import traceback
from typing import Any, Callable, Iterable, Protocol

__all__ = ["Executor", "merge_tree", "LocalExecutor", "DaskExecutor", "make_executor", "TaskFailed", "WORKER_MALLOC_ENV"]

# glibc allocator settings for the worker processes of a LocalCluster this module starts. Dask's own
# default (MALLOC_TRIM_THRESHOLD_=65536) also switches off glibc's adaptive mmap threshold, so every
# array above 128 KiB becomes a fresh mapping whose pages fault in, zero-filled, on first touch: a tile
# task that allocates a few hundred MB of temporaries spends as much time in the kernel as in numpy.
# Serving blocks up to 256 MiB from the heap and keeping up to 256 MiB of freed heap per worker makes
# those temporaries reuse memory instead (glibc mallopt(3): M_MMAP_THRESHOLD, M_TRIM_THRESHOLD; the
# effect is measured by ``tests/benchmarks/bench_classify.py --worker-env``).
WORKER_MALLOC_ENV = {"MALLOC_MMAP_THRESHOLD_": str(256 << 20), "MALLOC_TRIM_THRESHOLD_": str(256 << 20)}


class TaskFailed(RuntimeError):
    pass


class Executor(Protocol):
    name: str
    dashboard: str | None

    def map(self, fn: Callable, items: Iterable, on_done: Callable[[Any, Any], None],
            on_error: Callable[[Any, BaseException, str], None]) -> None: ...

    def reduce(self, fn: Callable, items: Iterable, merge: Callable[[Any, Any], Any]) -> Any: ...

    def close(self) -> None: ...

    # optional: executors that can run tasks in the background while the caller goes on have
    # ``submit(fn, items) -> Background`` (see DaskExecutor.submit); the others run them in ``map``.


class Background:
    """Tasks submitted to run while the caller goes on (``DaskExecutor.submit``)."""

    def __init__(self, futures: list[tuple[Any, Any]]):
        self._futures = list(futures)  # (item, future)

    @property
    def pending(self) -> int:
        return len(self._futures)

    def collect(self, on_done: Callable[[Any, Any], None], on_error: Callable[[Any, BaseException, str], None],
                wait: bool = False) -> None:
        """Report the finished tasks (all of them, waiting for each, with ``wait``), in submission order."""
        left = []
        for item, fut in self._futures:
            if not wait and not fut.done():
                left.append((item, fut))
                continue
            _report(item, fut, on_done, on_error)
        self._futures = left


def _report(item: Any, fut: Any, on_done: Callable[[Any, Any], None],
            on_error: Callable[[Any, BaseException, str], None]) -> None:
    """Hand a finished future's result (or its error, with the traceback) to the callbacks; release it."""
    try:
        res = fut.result()
    except Exception as exc:  # noqa: BLE001 - reported per item
        on_error(item, exc, "".join(traceback.format_exception(exc)))
    else:
        on_done(item, res)
    fut.release()


def merge_tree(values: list, merge: Callable) -> Any:
    """Merge ``values`` pairwise in a fixed tree: (0,1), (2,3), ... then the pairs' results, and so on.

    The tree depends only on the values' order, never on when they were computed: a fresh fit and a
    refit (tiles.incremental) that merge the same values in the same order give the same bits.
    """
    while len(values) > 1:
        nxt = [merge(values[k], values[k + 1]) for k in range(0, len(values) - 1, 2)]
        if len(values) % 2:
            nxt.append(values[-1])
        values = nxt
    return values[0] if values else None


class LocalExecutor:
    """The reference: tasks run one after another in this process."""

    name = "local"
    dashboard = None

    def __init__(self, retries: int = 0):
        self.retries = retries

    def map(self, fn, items, on_done, on_error) -> None:
        for item in items:
            for attempt in range(self.retries + 1):
                try:
                    res = fn(item)
                except Exception as exc:  # noqa: BLE001 - reported per tile
                    if attempt == self.retries:
                        on_error(item, exc, traceback.format_exc())
                    continue
                on_done(item, res)
                break

    def reduce(self, fn, items, merge):
        return merge_tree([fn(it) for it in items], merge)

    def close(self) -> None:
        pass


class DaskExecutor:
    """Run tasks on a Dask distributed cluster.

    Give ``client`` or ``address`` (an existing scheduler), ``cluster`` (any dask cluster object, e.g.
    from dask-jobqueue), or nothing: a LocalCluster sized to the machine is started, with worker
    processes started by spawn and the dashboard bound to 127.0.0.1. Its workers get
    :data:`WORKER_MALLOC_ENV` added to their environment unless ``worker_env`` is given instead.
    """

    name = "dask"

    def __init__(self, *, client=None, address: str | None = None, cluster=None, n_workers: int | None = None,
                 threads_per_worker: int = 1, memory_limit: str | float | None = "auto",
                 dashboard_address: str | None = "127.0.0.1:0", retries: int = 2, max_in_flight: int | None = None,
                 processes: bool = True, worker_env: dict[str, str] | None = None,
                 local_directory: str | None = None):
        import dask
        import distributed  # noqa: F401 - loads distributed's configuration defaults
        from distributed import Client, LocalCluster

        dask.config.set({"distributed.worker.multiprocessing-method": "spawn",
                         "distributed.scheduler.allowed-failures": max(retries, 1)})
        self._own_cluster = None
        if client is not None:
            self.client = client
        elif address:
            self.client = Client(address, timeout="30s")
        else:
            if cluster is None:
                n = n_workers or max(1, (os.cpu_count() or 1) // threads_per_worker)
                net = {"host": "127.0.0.1"} if processes else {}
                dashboard_address = _local_dashboard(dashboard_address)
                env = {k: v for k, v in (dask.config.get("distributed.nanny.pre-spawn-environ") or {}).items()
                       if k not in WORKER_MALLOC_ENV}  # Dask's default, or an earlier executor's
                env.update(WORKER_MALLOC_ENV if worker_env is None else worker_env)
                dask.config.set({"distributed.nanny.pre-spawn-environ": env})
                if local_directory:  # Dask's scratch space (spill files, worker folders) where the caller says
                    Path(local_directory).mkdir(parents=True, exist_ok=True)
                    dask.config.set({"temporary-directory": str(local_directory)})
                    net["local_directory"] = str(local_directory)
                cluster = LocalCluster(n_workers=n, threads_per_worker=threads_per_worker, processes=processes,
                                       memory_limit=memory_limit, dashboard_address=dashboard_address, **net)
                self._own_cluster = cluster
            self.client = Client(cluster)
        self.retries = retries
        self._max_in_flight = max_in_flight
        try:
            self.dashboard = self.client.dashboard_link
        except Exception:  # noqa: BLE001
            self.dashboard = None

    @property
    def max_in_flight(self) -> int:
        if self._max_in_flight:
            return self._max_in_flight
        threads = sum(self.client.nthreads().values()) or 1
        return 2 * threads

    def map(self, fn, items, on_done, on_error) -> None:
        from distributed import as_completed

        it = iter(items)
        pending: dict = {}
        ac = as_completed()

        def submit_next() -> bool:
            try:
                item = next(it)
            except StopIteration:
                return False
            fut = self.client.submit(fn, item, pure=False, retries=self.retries,
                                     key=f"{getattr(item, 'label', 'task')}-{os.urandom(4).hex()}")
            pending[fut.key] = item
            ac.add(fut)
            return True

        for _ in range(self.max_in_flight):
            if not submit_next():
                break
        for fut in ac:
            _report(pending.pop(fut.key), fut, on_done, on_error)
            submit_next()

    def submit(self, fn, items) -> Background:
        """Start ``fn`` on every item on the workers and return at once; the caller collects the
        results later (:meth:`Background.collect`). Long tasks that nothing later in a run reads (the
        export of products) then share the workers with the tiles of the next steps."""
        items = list(items)
        return Background([(item, self.client.submit(fn, item, pure=False, retries=self.retries,
                                                      key=f"{getattr(item, 'label', 'task')}-{os.urandom(4).hex()}"))
                           for item in items])

    def reduce(self, fn, items, merge):
        """Accumulate on the workers, then merge in the same fixed pairwise tree as :func:`merge_tree`.

        Merges start as soon as both halves of a pair are ready, but the pairs are fixed by the
        items' order, never by completion order: floating-point merges give the same bits as the
        in-process loop whatever the number of workers.
        """
        from distributed import as_completed

        items = list(items)
        if not items:
            return None
        sizes = [len(items)]  # number of nodes per level of the tree
        while sizes[-1] > 1:
            sizes.append((sizes[-1] + 1) // 2)
        top = len(sizes) - 1
        it = iter(enumerate(items))
        ac = as_completed()
        where: dict = {}  # future key -> (level, index)
        waiting: dict = {}  # (level, index) -> future whose sibling is not ready yet
        result = None

        def submit_next() -> None:
            try:
                k, item = next(it)
            except StopIteration:
                return
            fut = self.client.submit(fn, item, pure=False, retries=self.retries)
            where[fut.key] = (0, k)
            ac.add(fut)

        def place(level: int, k: int, fut) -> None:
            nonlocal result
            while level < top and (k ^ 1) >= sizes[level]:  # a lone last node moves up unchanged
                level, k = level + 1, k // 2
            if level == top:
                result = fut
                return
            sib = waiting.pop((level, k ^ 1), None)
            if sib is None:
                waiting[(level, k)] = fut
                return
            a, b = (fut, sib) if k % 2 == 0 else (sib, fut)
            m = self.client.submit(merge, a, b, pure=False, retries=self.retries)
            where[m.key] = (level + 1, k // 2)
            ac.add(m)

        for _ in range(self.max_in_flight):
            submit_next()
        for fut in ac:
            if fut.status == "error":
                fut.result()  # raises
            level, k = where.pop(fut.key)
            if level == 0:
                submit_next()
            place(level, k, fut)
        return result.result()

    def close(self) -> None:
        """Close the client and, when this executor started it, the cluster.

        Stopping workers we started is expected, so Dask's warnings while they stop (a worker process
        "still alive after 4 seconds, killing" on a loaded machine, closed streams) are not shown; the
        levels of Dask's loggers are restored afterwards.
        """
        quiet = ("distributed.nanny", "distributed.worker", "distributed.core", "distributed.comm",
                 "distributed.batched", "distributed.scheduler", "distributed.client")
        saved = {name: logging.getLogger(name).level for name in quiet}
        if self._own_cluster is not None:
            for name in quiet:
                logging.getLogger(name).setLevel(logging.ERROR)
        try:
            try:
                self.client.close()
            finally:
                if self._own_cluster is not None:
                    self._own_cluster.close()
        finally:
            for name, level in saved.items():
                logging.getLogger(name).setLevel(level)


def _local_dashboard(address: str | None) -> str:
    """The dashboard stays on this machine: only 127.0.0.1, localhost or ::1 are accepted."""
    if not address:
        return "127.0.0.1:0"
    host = address.rsplit(":", 1)[0].strip("[]") if ":" in address else address
    if host not in ("127.0.0.1", "localhost", "::1"):
        raise ValueError(f"the dashboard must be bound to this machine (127.0.0.1, localhost or ::1). "
                         f"Got {address!r}; reach it from elsewhere through an SSH tunnel")
    return address


def make_executor(kind: str = "local", **opts) -> Executor:
    """``local`` (in-process loop), ``dask`` (LocalCluster or ``address=``), or ``jobqueue``
    (``system=`` slurm, pbs, sge, lsf, htcondor; other options go to the dask-jobqueue cluster)."""
    if kind == "local":
        return LocalExecutor(retries=opts.get("retries", 0))
    if kind == "dask":
        return DaskExecutor(**opts)
    if kind == "jobqueue":
        try:
            import dask_jobqueue
        except ImportError as exc:
            raise RuntimeError("batch clusters need the optional extra: pip install 'swathmill[batch]'") from exc
        opts = dict(opts)
        system = opts.pop("system", "slurm").lower()
        jobs = opts.pop("jobs", 1)
        retries = opts.pop("retries", 2)
        classes = {"slurm": "SLURMCluster", "pbs": "PBSCluster", "sge": "SGECluster", "lsf": "LSFCluster",
                   "htcondor": "HTCondorCluster"}
        if system not in classes:
            raise ValueError(f"execution.jobqueue.system must be one of {sorted(classes)}. Got {system!r}")
        lifetime = opts.pop("worker_lifetime", None)
        stagger = opts.pop("worker_lifetime_stagger", None)
        if lifetime:  # below the wall time, or workers die with KilledWorker when the job ends
            opts["worker_extra_args"] = [*opts.get("worker_extra_args", []), "--lifetime", lifetime,
                                         *(["--lifetime-stagger", stagger] if stagger else []), "--lifetime-restart"]
        opts.setdefault("scheduler_options", {"dashboard_address": "127.0.0.1:0"})
        cluster = getattr(dask_jobqueue, classes[system])(**opts)
        cluster.scale(jobs=jobs)
        return DaskExecutor(cluster=cluster, retries=retries)
    raise ValueError(f"executor must be 'local', 'dask' or 'jobqueue'. Got {kind!r}")
