"""Map a per-run job over many runs: serially, in local processes, or on Dask.

One abstraction serves ``audit``, ``correct`` and ``fix``: a pipeline hands
``map_chunks`` a picklable job (chunk of items → list of results), the items,
and a ``lost`` function that turns an item whose worker died into a result
(a finding or a failed outcome), so one bad worker never stops a batch.

* Results come back in input order whichever executor ran them, so reports are
  deterministic and identical between executors.
* Work goes out in chunks of neighbouring items (the audit's sidecar cache is
  per chunk); correction sends one run per chunk.
* A chunk whose worker is lost (a crashed process, a vanished Dask worker) is
  retried once. Locally only the chunks that were running when the worker died
  are suspects (each worker flags a chunk in shared memory as it starts it);
  each suspect is rerun alone in a pool of its own, then item by item, so only
  an item that kills a worker by itself becomes ``lost(item, why)``, and no
  other item is blamed or counted twice.
* Ctrl-C cancels what has not started, stops the local workers (SIGTERM: a
  running job ends through its clean-up; workers ignore the terminal's SIGINT)
  and waits until they are gone, then raises :class:`Interrupted` carrying the
  results that did finish: nothing is written after that.

The Dask executor connects to a running ``distributed`` scheduler (files must
be on a file system every worker sees); ``dask[distributed]`` is the optional
``slicetime[dask]`` extra and is imported only when used.
"""

from __future__ import annotations

import contextlib
import itertools
import os
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Generic, TypeVar

if TYPE_CHECKING:  # imported by the process pool only: 12 ms of every start otherwise
    from concurrent.futures import Future, ProcessPoolExecutor

T = TypeVar("T")
R = TypeVar("R")

Progress = Callable[[int, int, int], None]  # (done, total, failed)
Job = Callable[[Sequence[T]], list[R]]
Lost = Callable[[T, str], R]


class Interrupted(KeyboardInterrupt):
    """Ctrl-C during a batch; ``results`` holds what finished (None where not)."""

    def __init__(self, results: list[Any]) -> None:
        super().__init__("interrupted")
        self.results = results


class ExecutorError(RuntimeError):
    """The executor itself cannot run (e.g. no Dask scheduler at the address)."""


def available_cpus() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def chunked(items: Sequence[T], size: int) -> list[Sequence[T]]:
    return [items[i : i + size] for i in range(0, len(items), size)]


@dataclass
class RunStats:
    """What an executor did: for summaries and for tests."""

    executor: str = "serial"
    #: the workers that ran a chunk (Dask: each task names its own worker)
    workers: set[str] = field(default_factory=set)
    #: how many workers the cluster had (Dask), None when not known
    cluster_workers: int | None = None
    retried_chunks: int = 0
    lost_items: int = 0


@dataclass
class _Tracker(Generic[R]):
    chunks: list[Sequence[Any]]
    progress: Progress | None
    failed_of: Callable[[R], bool] | None
    ordered: list[list[R] | None] = field(init=False)
    done: int = 0
    failed: int = 0

    def __post_init__(self) -> None:
        self.ordered = [None] * len(self.chunks)
        self.total = sum(len(c) for c in self.chunks)

    def finish(self, index: int, results: list[R]) -> None:
        self.ordered[index] = results
        self.done += len(self.chunks[index])
        if self.failed_of is not None:
            self.failed += sum(1 for r in results if self.failed_of(r))
        if self.progress:
            self.progress(self.done, self.total, self.failed)

    def flat(self) -> list[R]:
        return [r for part in self.ordered if part is not None for r in part]

    def partial(self) -> list[R | None]:
        out: list[R | None] = []
        for chunk, part in zip(self.chunks, self.ordered, strict=True):
            out.extend(part if part is not None else [None] * len(chunk))
        return out

    def pending(self) -> list[int]:
        return [i for i, part in enumerate(self.ordered) if part is None]


class Executor:
    """Runs chunks somewhere. Subclasses implement ``_run``."""

    name = "serial"

    def __init__(self) -> None:
        self.stats = RunStats(self.name)

    def map_chunks(
        self,
        job: Job[T, R],
        items: Sequence[T],
        *,
        lost: Lost[T, R],
        chunk_size: int = 64,
        progress: Progress | None = None,
        failed_of: Callable[[R], bool] | None = None,
    ) -> list[R]:
        tracker: _Tracker[R] = _Tracker(chunked(items, chunk_size), progress, failed_of)
        try:
            self._run(job, tracker, lost)
        except KeyboardInterrupt:
            raise Interrupted(tracker.partial()) from None
        return tracker.flat()

    def _run(self, job: Job[T, R], tracker: _Tracker[R], lost: Lost[T, R]) -> None:
        for index, chunk in enumerate(tracker.chunks):
            tracker.finish(index, job(chunk))

    def _give_up(self, tracker: _Tracker[R], index: int, lost: Lost[T, R], why: str) -> None:
        chunk = tracker.chunks[index]
        self.stats.lost_items += len(chunk)
        tracker.finish(index, [lost(item, why) for item in chunk])

    def close(self) -> None:
        """Release connections (Dask); nothing to do for local executors."""


class ProcessExecutor(Executor):
    """A local process pool. When a worker dies, only the chunks that were running
    are suspects: each is rerun alone in a one-worker pool, so the one that kills
    its worker again is the only one lost; chunks that had not started go back to
    a full pool."""

    name = "processes"

    def __init__(self, jobs: int, *, serial_below: int = 0) -> None:
        super().__init__()
        self.jobs = jobs
        #: fewer items than this run in this process (starting workers would cost more)
        self.serial_below = serial_below

    def _run(self, job: Job[T, R], tracker: _Tracker[R], lost: Lost[T, R]) -> None:
        if self.jobs <= 1 or len(tracker.chunks) <= 1 or tracker.total < self.serial_below:
            Executor._run(self, job, tracker, lost)
            return
        while todo := tracker.pending():
            started = _shared_flags(len(tracker.chunks))
            broken = self._one_pool(job, tracker, todo, started)
            if not broken:
                return
            # running when the pool broke: flagged by the worker before the job began
            suspects = [i for i in tracker.pending() if started[i]]
            if not suspects:  # a worker died while idle: suspect everything left
                suspects = tracker.pending()
            self.stats.retried_chunks += len(suspects)
            for index in suspects:
                self._alone(job, tracker, index, lost)

    def _one_pool(
        self, job: Job[T, R], tracker: _Tracker[R], todo: list[int], started: Any
    ) -> bool:
        """Run ``todo`` in a fresh pool; True when the pool broke (work left undone)."""
        from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
        from concurrent.futures.process import BrokenProcessPool

        pool = ProcessPoolExecutor(
            max_workers=min(self.jobs, len(todo)), initializer=_remember_flags,
            initargs=(started, os.getpid()),
        )
        futures: dict[Future[list[R]], int] = {}
        # a few chunks in flight per worker, not all at once: results that arrive faster
        # than they are taken would otherwise pile up in this process
        window = max(2, 2 * self.jobs)
        queue = iter(todo)
        waiting: set[Future[list[R]]] = set()

        def submit(count: int) -> None:
            for i in itertools.islice(queue, count):
                future = pool.submit(_flagged, job, tracker.chunks[i], i)
                futures[future] = i
                waiting.add(future)

        with _owned(pool):
            try:
                submit(window)
            except BrokenProcessPool:  # a worker died before the window was filled
                return True
            while waiting:
                finished, waiting = wait(waiting, return_when=FIRST_COMPLETED)
                for future in finished:
                    try:
                        results = future.result()
                    except BrokenProcessPool:
                        return True
                    # drop the finished future: it would hold its results until the end
                    tracker.finish(futures.pop(future), results)
                    del results
                    try:
                        submit(1)
                    except BrokenProcessPool:  # another worker died meanwhile
                        return True
            return False

    def _alone(self, job: Job[T, R], tracker: _Tracker[R], index: int, lost: Lost[T, R]) -> None:
        """Rerun a suspect chunk in a pool of its own; if it kills that worker too, run its
        items one by one, and lose only an item that kills a worker on its own."""
        chunk = tracker.chunks[index]
        results = self._isolated(job, chunk)
        if results is None:
            results = []
            for item in chunk:
                single = self._isolated(job, [item]) if len(chunk) > 1 else None
                if single is None:
                    self.stats.lost_items += 1
                    single = [lost(item, "its worker process stopped unexpectedly twice")]
                results.extend(single)
        tracker.finish(index, results)

    def _isolated(self, job: Job[T, R], chunk: Sequence[T]) -> list[R] | None:
        """``job(chunk)`` in a one-worker pool; None when that worker died."""
        from concurrent.futures import ProcessPoolExecutor
        from concurrent.futures.process import BrokenProcessPool

        pool = ProcessPoolExecutor(
            max_workers=1, initializer=_remember_flags,
            initargs=(_shared_flags(1), os.getpid()),
        )
        with _owned(pool):
            try:
                return pool.submit(_flagged, job, chunk, 0).result()
            except BrokenProcessPool:
                return None


#: per pool: one shared byte per chunk, set by the worker as the chunk starts
_FLAGS: Any = None
#: in a worker: whether a job is running (SIGTERM then stops it through its clean-up)
_IN_JOB = False
#: exit status of a worker stopped by the parent after Ctrl-C
STOPPED_STATUS = 130


class _Stopped(BaseException):
    """Raised in a worker's job when the parent stops the batch (after Ctrl-C)."""


def _shared_flags(count: int) -> Any:
    import multiprocessing

    return multiprocessing.RawArray("b", max(1, count))


def _on_terminate(signum: int, frame: Any) -> None:
    if _IN_JOB:
        raise _Stopped
    os._exit(STOPPED_STATUS)


def _remember_flags(flags: Any, parent: int | None = None) -> None:
    """Worker initialiser: keep the flags; Ctrl-C is the parent's to handle (it stops
    the workers with SIGTERM, which ends a running job through its clean-up); and the
    worker ends with its parent (``parent``: its pid) however the parent ends."""
    import signal

    global _FLAGS
    _FLAGS = flags
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, _on_terminate)
    if parent is not None:
        die_with_parent(parent)


#: how often the portable watch looks whether the parent still runs (seconds)
PARENT_WATCH_INTERVAL = 1.0


def die_with_parent(parent: int) -> None:
    """End this process (SIGTERM to itself: a running job cleans up first) when the
    process ``parent`` ends, even by kill -9: on Linux the kernel sends the signal
    (``prctl(PR_SET_PDEATHSIG)``, prctl(2)); everywhere a daemon thread also checks
    once a second that the parent is still this process's parent (an orphan is
    adopted by another process, so ``getppid`` changes)."""
    import signal
    import sys
    import threading

    if sys.platform.startswith("linux"):
        with contextlib.suppress(Exception):  # no libc or no prctl: the watch remains
            import ctypes

            pr_set_pdeathsig = 1  # <linux/prctl.h>
            ctypes.CDLL(None, use_errno=True).prctl(pr_set_pdeathsig, int(signal.SIGTERM),
                                                    0, 0, 0)

    def watch() -> None:
        while os.getppid() == parent:
            time.sleep(PARENT_WATCH_INTERVAL)
        os.kill(os.getpid(), signal.SIGTERM)

    if os.getppid() != parent:  # the parent ended before the signal was asked for
        os.kill(os.getpid(), signal.SIGTERM)
    threading.Thread(target=watch, name="slicetime-parent-watch", daemon=True).start()


def _flagged(job: Job[T, R], chunk: Sequence[T], index: int) -> list[R]:
    """In a worker: mark chunk ``index`` as started (in shared memory, visible to the
    parent at once, even if this process dies a moment later), then run it."""
    global _IN_JOB
    if _FLAGS is not None:
        _FLAGS[index] = 1
    _IN_JOB = True
    try:
        return job(chunk)
    except _Stopped:
        os._exit(STOPPED_STATUS)  # the job's clean-up has run; take no further work
    finally:
        _IN_JOB = False


@contextlib.contextmanager
def _owned(pool: ProcessPoolExecutor) -> Iterator[None]:
    """The lifetime of a pool this process made: on any error (Ctrl-C included) its
    workers are stopped first; in every case it is shut down at the end."""
    try:
        yield
    except BaseException:
        _stop_workers(pool)
        raise
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def _stop_workers(pool: ProcessPoolExecutor) -> None:
    """Ctrl-C: cancel what has not started and end the workers now (SIGTERM, which
    ends a running job through its clean-up, so its temporary files go; SIGKILL for
    a worker that has not stopped within a few seconds). Returns once they are gone,
    so nothing is written after the batch reports."""
    processes = dict(getattr(pool, "_processes", None) or {})
    pool.shutdown(wait=False, cancel_futures=True)
    for process in processes.values():
        with contextlib.suppress(OSError, ValueError, AttributeError):
            process.terminate()
    deadline = time.monotonic() + 5.0
    for process in processes.values():
        with contextlib.suppress(OSError, ValueError, AttributeError, AssertionError):
            process.join(max(0.0, deadline - time.monotonic()))
            if process.is_alive():
                process.kill()
                process.join(1.0)


@dataclass(frozen=True)
class _Located(Generic[T, R]):
    """A job that also says which Dask worker ran it (the result may later be held
    elsewhere, so the scheduler's record of who holds it is not who ran it)."""

    job: Job[T, R]

    def __call__(self, items: Sequence[T]) -> tuple[str, list[R]]:
        from distributed import get_worker

        try:
            where = get_worker().address
        except ValueError:  # not on a worker (a client running tasks itself)
            where = "client"
        return where, self.job(items)


class DaskExecutor(Executor):
    """Chunks as tasks on a running ``distributed`` scheduler (retried once)."""

    name = "dask"

    def __init__(self, address: str, *, timeout: float = 10.0) -> None:
        super().__init__()
        try:
            from distributed import Client
        except ImportError:
            raise ExecutorError(
                "--scheduler needs the optional Dask support: pip install 'slicetime-bids[dask]'"
            ) from None
        try:
            self.client = Client(address, timeout=timeout, set_as_default=False)
        except (OSError, TimeoutError) as exc:
            raise ExecutorError(
                f"cannot reach a Dask scheduler at {address} ({exc}); start one with "
                "'dask scheduler' and workers with 'dask worker ADDRESS'"
            ) from None
        self.address = address

    def _run(self, job: Job[T, R], tracker: _Tracker[R], lost: Lost[T, R]) -> None:
        from distributed import as_completed

        todo = tracker.pending()
        try:
            self.stats.cluster_workers = len(self.client.scheduler_info().get("workers", {}))
        except Exception:  # only a summary figure: never a reason to fail
            self.stats.cluster_workers = None
        futures = self.client.map(
            _Located(job), [tracker.chunks[i] for i in todo], pure=False, retries=1,
            key=[f"slicetime-{time.time_ns()}-{i}" for i in todo],
        )
        index_of = {future.key: i for future, i in zip(futures, todo, strict=True)}
        try:
            for future in as_completed(futures, loop=self.client.loop):
                index = index_of[future.key]
                if future.status == "error":
                    why = f"its Dask task failed ({type(future.exception()).__name__})"
                    self._give_up(tracker, index, lost, why)
                    continue
                where, result = future.result()
                self.stats.workers.add(where)
                tracker.finish(index, result)
                future.release()
        except BaseException:
            self.client.cancel(futures)
            raise

    def close(self) -> None:
        self.client.close()


#: with this many CPUs or fewer, light per-run work (audit, fix) runs in one process by
#: default: measured on 2 CPUs, sending whole results back costs more than the second
#: worker saves (README, Performance)
LIGHT_WORK_SERIAL_CPUS = 2
#: ... unless the workers send back little (``small_results``: a streamed audit's report
#: lines and run facts), there are at least this many runs, and the machine has a CPU to
#: spare (``IDLE_LOAD_FOR_WORKERS``): then the workers can win (2,000 runs on 2 CPUs with
#: a load average of 1.3: about a quarter less time); below it starting them costs more
SMALL_RESULTS_PARALLEL_FROM = 500
#: on 2 CPUs, the second worker only pays when the other CPU is free: with the 1-minute
#: load average above this (other work running), one process. Measured with a load of
#: 4 to 6 on 2 CPUs (README, Performance): two workers took 1.08 and 1.17 times as long
#: as one for 2,000 runs (json, text), 0.91 and 1.04 for 20,000, and 15-25 % more CPU
IDLE_LOAD_FOR_WORKERS = 0.5


def load_average() -> float:
    """The 1-minute load average (0 where the system does not tell)."""
    try:
        return os.getloadavg()[0]
    except (AttributeError, OSError):
        return 0.0


def make_executor(jobs: int | None, scheduler: str | None, *, light: bool = False,
                  small_results: bool = False) -> Executor:
    """``--scheduler`` wins (connecting for at most ``SLICETIME_CONNECT_TIMEOUT``
    seconds, default 10); else ``--jobs`` local processes. Without ``--jobs``: the
    CPUs available, except for ``light`` work on machines with at most
    ``LIGHT_WORK_SERIAL_CPUS`` CPUs, which runs in this process, or, when the work
    sends back ``small_results`` and the machine is idle (``IDLE_LOAD_FOR_WORKERS``),
    in this process below ``SMALL_RESULTS_PARALLEL_FROM`` runs."""
    if scheduler:
        timeout = float(os.environ.get("SLICETIME_CONNECT_TIMEOUT", "10"))
        return DaskExecutor(scheduler, timeout=timeout)
    if jobs is not None:
        return ProcessExecutor(jobs) if jobs > 1 else Executor()
    cpus = available_cpus()
    if cpus == 1:
        return Executor()
    if light and cpus <= LIGHT_WORK_SERIAL_CPUS:
        spare = load_average() <= IDLE_LOAD_FOR_WORKERS
        return (ProcessExecutor(cpus, serial_below=SMALL_RESULTS_PARALLEL_FROM)
                if small_results and spare else Executor())
    return ProcessExecutor(cpus)


def map_chunks(
    job: Job[T, R],
    items: Sequence[T],
    *,
    lost: Lost[T, R],
    executor: Executor | None = None,
    jobs: int = 1,
    chunk_size: int = 64,
    progress: Progress | None = None,
    failed_of: Callable[[R], bool] | None = None,
) -> list[R]:
    """Apply ``job`` to chunks of ``items`` on ``executor`` (default: ``jobs`` local
    processes); return the results in input order."""
    runner = executor if executor is not None else (
        ProcessExecutor(jobs) if jobs > 1 else Executor()
    )
    return runner.map_chunks(
        job, items, lost=lost, chunk_size=chunk_size, progress=progress, failed_of=failed_of
    )


__all__ = [
    "DaskExecutor",
    "Executor",
    "ExecutorError",
    "Interrupted",
    "ProcessExecutor",
    "Progress",
    "RunStats",
    "available_cpus",
    "chunked",
    "make_executor",
    "map_chunks",
]
