"""Executors: where chunks of members are computed.

Every executor runs a module-level pure function on a list of tasks and yields
``(index, result)`` pairs as tasks finish, in any order; callers put results back in task
order, so what is computed never depends on where or in which order it ran. Three
executors share that interface:

* :class:`InProcess` computes in the calling process (tests, small runs, ``--workers 1``);
* :class:`LocalThreads` computes in threads of the calling process (the default on one machine:
  the compiled engine releases Python's lock while it integrates, so threads share the cores
  without starting processes or copying tasks and results between them);
* :class:`LocalPool` uses a pool of worker processes on this machine;
* :class:`DaskCluster` ships tasks to a running dask.distributed scheduler.

No executor draws random numbers or decides anything about the science: a task carries
everything its function needs (the case, the seed, draw indices), and each member's random
streams come from the seed and its draw index alone (see :mod:`impact.ensemble.sample`).
"""

from __future__ import annotations

import os
import signal
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool

from impact.errors import SettingError

# A task whose worker process dies is sent again this many times before the run gives up.
RETRIES = 2
# How long a cluster address may take to answer before the run gives up on it (seconds).
CONNECT_TIMEOUT = 10.0
# How often a pool worker checks that the process that started it is still there (seconds): a
# parent killed with SIGKILL cannot end its workers, so they end themselves within this time.
PARENT_POLL = 0.5


def _worker_start(parent: int):
    """Pool-worker initializer: leave interrupts to the parent, and end when the parent is gone.

    The parent decides what an interrupt means (it ends the pool itself), so workers ignore
    SIGINT (a terminal's Ctrl-C reaches the whole process group) and take SIGTERM's default
    action rather than any handler inherited through fork.
    """
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)

    def watch():
        while os.getppid() == parent:
            time.sleep(PARENT_POLL)
        os._exit(1)  # orphaned: nobody will read this worker's results

    threading.Thread(target=watch, name="parent-watch", daemon=True).start()


def machine_cores() -> int:
    """Cores this process may use (the affinity mask where the platform has one)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


class Lifetime:
    """An executor as a context manager: closed when the block ends, aborted when it ends by an error.

    ``with execution.executor() as ex:`` replaces a try/abort/close block: a failure or an
    interrupt ends the workers at once (finished chunks stay checkpointed), a normal end waits for them.
    """

    def __enter__(self):
        return self

    def __exit__(self, kind, value, traceback):
        if kind is None:
            self.close()
        else:
            self.abort()
        return False


class InProcess(Lifetime):
    """Compute every task in the calling process, in task order."""

    name = "in-process"
    workers = 1

    def map(self, fn: Callable, tasks: Sequence) -> Iterator[tuple[int, object]]:
        for i, task in enumerate(tasks):
            yield i, fn(task)

    def close(self):
        pass

    def abort(self):
        pass

    def describe(self) -> dict:
        return {"executor": self.name, "workers": 1}


class _LocalWorkers(Lifetime):
    """What the executors of this machine's workers share: a pool made on first use, ended by close."""

    name = "local"
    workers = 1
    _pool = None

    def close(self):
        """Wait for the running tasks, then end the pool (it is made again if needed)."""
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None

    def describe(self) -> dict:
        return {"executor": self.name, "workers": self.workers}


class LocalThreads(_LocalWorkers):
    """Threads of the calling process, computing tasks side by side.

    What runs in parallel is the compiled kernels (which release Python's global lock); the
    Python around them takes turns. Tasks share the process's memory, so nothing is copied or
    pickled. A running task cannot be stopped: on an interrupt the tasks not yet started are
    dropped and the running ones finish their chunk (chunks are short by design).
    """

    name = "threads"

    def __init__(self, workers: int):
        self.workers = int(workers)
        self._pool = None

    def map(self, fn: Callable, tasks: Sequence) -> Iterator[tuple[int, object]]:
        from concurrent.futures import ThreadPoolExecutor

        if self._pool is None:
            self._pool = ThreadPoolExecutor(max_workers=self.workers, thread_name_prefix="impact")
        pending: dict[Future, int] = {}
        todo = list(range(len(tasks)))
        limit = 2 * self.workers  # bounded in flight: results stream back, memory stays flat
        try:
            while todo or pending:
                while todo and len(pending) < limit:
                    i = todo.pop(0)
                    pending[self._pool.submit(fn, tasks[i])] = i
                done, _ = wait(list(pending), return_when=FIRST_COMPLETED)
                for fut in sorted(done, key=pending.__getitem__):
                    yield pending.pop(fut), fut.result()
        finally:
            for fut in pending:
                fut.cancel()

    def abort(self):
        """Drop the tasks not started; the running ones end with their chunk."""
        pool, self._pool = self._pool, None
        if pool is not None:
            pool.shutdown(wait=False, cancel_futures=True)


class LocalPool(_LocalWorkers):
    """A pool of worker processes on this machine.

    Workers are forked from this process where the platform allows it (they start at once,
    with the modules already imported), else started fresh. When a worker dies (killed, out of memory) the
    pool is rebuilt and the tasks that had not finished are sent again, at most
    :data:`RETRIES` times each.
    """

    name = "process pool"

    def __init__(self, workers: int):
        import multiprocessing as mp

        self.workers = int(workers)
        self._ctx = mp.get_context("fork" if "fork" in mp.get_all_start_methods() else "spawn")
        self._pool: ProcessPoolExecutor | None = None

    def _executor(self) -> ProcessPoolExecutor:
        if self._pool is None:
            self._pool = ProcessPoolExecutor(max_workers=self.workers, mp_context=self._ctx,
                                             initializer=_worker_start, initargs=(os.getpid(),))
        return self._pool

    def map(self, fn: Callable, tasks: Sequence) -> Iterator[tuple[int, object]]:
        tries = [0] * len(tasks)
        pending: dict[Future, int] = {}
        todo = list(range(len(tasks)))
        # keep a bounded number of tasks in flight so results stream back as they finish
        limit = 2 * self.workers
        while todo or pending:
            while todo and len(pending) < limit:
                i = todo.pop(0)
                pending[self._executor().submit(fn, tasks[i])] = i
            done, _ = wait(list(pending), return_when=FIRST_COMPLETED)
            broken = False
            for fut in done:
                i = pending.pop(fut)
                try:
                    result = fut.result()
                except BrokenProcessPool:
                    broken = True
                    tries[i] += 1
                    if tries[i] > RETRIES:
                        self.close()
                        raise WorkerLost(f"a worker process died {tries[i]} times while computing chunk {i}; "
                                         "see the system log (out of memory?)") from None
                    todo.insert(0, i)
                    continue
                yield i, result
            if broken:
                # the pool is unusable once a worker has died: every unfinished task goes again
                for fut, i in pending.items():
                    fut.cancel()
                    todo.insert(0, i)
                pending.clear()
                self._pool.shutdown(wait=False, cancel_futures=True)
                self._pool = None

    def abort(self):
        """End the workers at once (interrupt, error): their unfinished chunks are not wanted."""
        pool, self._pool = self._pool, None
        if pool is None:
            return
        if hasattr(pool, "kill_workers"):  # Python 3.14+
            pool.kill_workers()
            pool.shutdown(wait=True, cancel_futures=True)
            return
        # before 3.14 the executor offers no public way to stop a running task: kill its processes
        procs = list((getattr(pool, "_processes", None) or {}).values())
        for p in procs:
            try:
                p.kill()
            except (OSError, ValueError):
                pass
        pool.shutdown(wait=False, cancel_futures=True)
        for p in procs:
            p.join(timeout=5)


class DaskCluster(Lifetime):
    """Tasks shipped to a dask.distributed scheduler; results gathered as arrays.

    The scheduler re-runs a task whose worker died; this executor only submits, gathers and
    hands results back in the same ``(index, result)`` form as the others.
    """

    name = "dask cluster"

    def __init__(self, address: str, timeout: float = CONNECT_TIMEOUT):
        try:
            from distributed import Client
        except ImportError:
            raise SettingError("cluster", "needs dask.distributed: pip install 'impact[cluster]' (or dask[distributed])") from None
        self.address = address
        try:
            self._client = Client(address, timeout=timeout, set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            raise SettingError("cluster", f"no Dask scheduler answered at {address} within {timeout:g} s ({type(exc).__name__}); "
                            "give the address a scheduler prints, e.g. tcp://10.0.0.5:8786") from None
        try:
            # a scheduler with no workers would take the tasks and never run them
            self._client.wait_for_workers(1, timeout=timeout)
        except (OSError, TimeoutError):
            self._client.close()
            raise SettingError("cluster", f"the Dask scheduler at {address} has no workers (none joined within {timeout:g} s); "
                            f"start some with: dask worker {address}") from None
        info = self._client.scheduler_info()
        self.workers = max(1, sum(int(w.get("nthreads", 1)) for w in info.get("workers", {}).values()))

    def map(self, fn: Callable, tasks: Sequence) -> Iterator[tuple[int, object]]:
        from distributed import KilledWorker, as_completed

        futures = [self._client.submit(fn, t, pure=False) for t in tasks]
        index = {f.key: i for i, f in enumerate(futures)}
        try:
            for fut in as_completed(futures, loop=self._client.loop):
                try:
                    result = fut.result()
                except KilledWorker:
                    # the scheduler gave up on a chunk whose workers kept dying (its allowed-failures)
                    raise WorkerLost(f"the cluster's workers died while computing chunk {index[fut.key]}") from None
                yield index[fut.key], result
        finally:
            for f in futures:
                f.release()

    def close(self):
        self._client.close()

    def abort(self):
        """Stop waiting for the cluster (its scheduler drops the released tasks)."""
        self._client.close()

    def describe(self) -> dict:
        return {"executor": self.name, "workers": self.workers, "address": self.address}


class WorkerLost(Exception):
    """A chunk could not be computed because its worker kept dying."""


def make_executor(workers: int | None = None, cluster: str | None = None, processes: bool = False):
    """The executor asked for: a cluster; else ``workers`` threads (or worker processes with
    ``processes``) on this machine, or this process alone for one worker."""
    if cluster:
        return DaskCluster(cluster)
    n = machine_cores() if workers is None else int(workers)
    if n < 1:
        raise SettingError("workers", f"must be at least 1, got {n}")
    if n == 1:
        return InProcess()
    return LocalPool(n) if processes else LocalThreads(n)


def count(progress, label: str, done: int, total: int, unit: str = "members"):
    """Tell a progress sink that ``done`` of ``total`` units of a stage are finished.

    A sink with a ``count`` method (the command line's meter) gets the numbers and works out
    rate and time left; a plain callable gets one line of text.
    """
    if progress is None:
        return
    if hasattr(progress, "count"):
        progress.count(label, done, total, unit)
    else:
        progress(f"{label}: {done}/{total} {unit}")
