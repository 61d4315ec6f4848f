"""Where independent pieces of work run: in this process (default) or on a Dask cluster.

Calibration and leave-one-out folds are independent per basin. The chain cuts the basins into
chunks and hands them to an :class:`Executor`: ``map(function, chunks, context)`` calls
``function(chunk, context)`` for every chunk and returns the results in chunk order, so the same
run gives the same tables whichever executor runs it. With Dask (``distributed``), the shared
context (forcing, attributes, settings) is scattered to the workers once and the chunks run as
tasks; a local cluster of ``workers`` processes is started when no scheduler address is given.
"""

from __future__ import annotations

import ctypes
import gc
import importlib
import logging
import sys
from collections import deque
from collections.abc import Callable, Iterable, Iterator, Sequence
from contextlib import contextmanager
from functools import partial
from typing import Any

from regional.errors import RunError

logger = logging.getLogger(__name__)

CONNECT_TIMEOUT_S = 10.0
"""Default wait for a Dask scheduler to answer, in seconds (``[compute] connect_timeout_s``)."""

ChunkFn = Callable[[Sequence[str], Any], Any]
Progress = Callable[[int, int], None] | None
Batch = tuple[ChunkFn, Sequence[Sequence[str]], Any] | tuple[ChunkFn, Sequence, Any, Callable]
"""One round of work: the function, its chunks and the context they share; optionally a
fourth item, ``finish(results, shared)``, which turns the batch's results (in chunk order) into
what the round gives, where the chunks ran (:meth:`DaskExecutor.map_batches`)."""

BATCHES_AHEAD = 3
"""Batches :meth:`DaskExecutor.map_batches` keeps submitted beyond the one being gathered."""


HEAP_PAD_BYTES = 256 * 2**20
"""Freed memory glibc keeps at the top of the heap instead of returning it to the system."""
_M_TRIM_THRESHOLD, _M_TOP_PAD = -1, -2  # mallopt parameter numbers of glibc's malloc.h


def keep_freed_memory() -> bool:
    """Ask glibc's malloc to keep freed heap memory for reuse (Linux only; else a no-op).

    The kernels, metrics and folds allocate and free many arrays of a few MB. By default glibc
    returns freed memory at the top of the heap to the system at once, so the next array faults
    its pages in again; on virtual machines, where a page fault is costly, that made the whole
    chain about 3 x slower on the development machine (a side-by-side measure in this process
    against a thread, whose arena is not trimmed). Setting a top pad and trim threshold of
    256 MB keeps at most that much freed memory mapped. Called by the command line and for the
    workers of a local Dask cluster; a library user may call it too.

    Returns
    -------
    bool
        Whether the allocator accepted the settings.
    """
    _KEEPING[0] = _set_heap_pad(HEAP_PAD_BYTES)
    return _KEEPING[0]


DEFAULT_PAD_BYTES = 128 * 2**10
"""glibc's own top pad and trim threshold (128 KiB)."""
_KEEPING = [False]  # whether keep_freed_memory is in force in this process


def return_freed_memory() -> bool:
    """Let glibc's malloc give freed heap memory back to the system at once, as it does by
    default (top pad and trim threshold of :data:`DEFAULT_PAD_BYTES`; Linux only, else a
    no-op): the opposite of :func:`keep_freed_memory`, for a process that runs no kernels.

    Returns
    -------
    bool
        Whether the allocator accepted the settings.
    """
    _KEEPING[0] = False
    return _set_heap_pad(DEFAULT_PAD_BYTES)


def _set_heap_pad(pad_bytes: int) -> bool:
    """Top pad ``pad_bytes`` and trim threshold twice that (or ``pad_bytes`` at glibc's
    default), in bytes."""
    libc = _glibc()
    if libc is None:
        return False
    trim = pad_bytes if pad_bytes == DEFAULT_PAD_BYTES else 2 * pad_bytes
    done = libc.mallopt(_M_TOP_PAD, pad_bytes) == 1
    return libc.mallopt(_M_TRIM_THRESHOLD, trim) == 1 and done


def release_freed_memory() -> bool:
    """Give the pages of freed heap memory back to the system (glibc's ``malloc_trim(0)``;
    Linux only, else a no-op).

    :func:`keep_freed_memory` keeps freed memory for reuse, which speeds up the many
    allocations inside a stage; but what a stage frees at its end (a fold's flows, a held-out
    repeat's summaries, a batch of the long series table) then stays resident into the next
    stage, scattered through the heap where the top pad cannot return it. The chain calls
    this between stages: on the benchmark's synthetic region (20 years, linear store with
    snow) the whole run's peak fell from 710 to 653 MB at 500 basins and from 1,221 to
    1,148 MB at 2,000 (docs/scale.md); each call takes a few milliseconds.

    Returns
    -------
    bool
        Whether the allocator was asked (it may have had nothing to return).
    """
    libc = _glibc()
    if libc is None:
        return False
    libc.malloc_trim(0)
    return True


def _glibc() -> ctypes.CDLL | None:
    """The C library whose allocator the two functions above tune (None off glibc)."""
    try:
        return ctypes.CDLL("libc.so.6")
    except OSError:
        return None


WORKER_ENVIRONMENT = {
    "MALLOC_TOP_PAD_": str(HEAP_PAD_BYTES),
    "MALLOC_TRIM_THRESHOLD_": str(2 * HEAP_PAD_BYTES),
}
"""Environment of local Dask workers: the same allocator settings as :func:`keep_freed_memory`
(``distributed`` otherwise starts workers with a 64 KiB trim threshold)."""


QUIET_CLUSTER = {
    "distributed.admin.tick.interval": "200ms",
    "distributed.admin.system-monitor.interval": "2s",
}
"""Dask settings of a local cluster's scheduler, nannies and workers: their event loops check
they are not blocked every 200 ms (Dask's default 20 ms) and they sample their own CPU and
memory every 2 s (default 0.5 s; no dashboard shows them). With the defaults an idle 2-worker
cluster cost 1.0-1.3 s of CPU per 20 s (the client, where the scheduler and the nannies run,
and the two workers; development machine, three runs), 0.5 s with these settings. The memory
monitor that restarts a worker over its limit keeps Dask's interval."""


def worker_start_method(configured: str, platform: str = sys.platform) -> str:
    """How a local cluster starts its worker processes: ``fork`` on Linux when Dask's
    ``distributed.worker.multiprocessing-method`` is left at its default (``spawn``), else
    the configured method.

    A spawned worker is a fresh interpreter: it imports pandas, scikit-learn, numba,
    matplotlib and the chain again (about 2.5 s of CPU per worker on the development
    machine, run while the client reads the region and into the first calibration tasks).
    A forked worker starts as a copy of this process, whose modules are already imported
    (:class:`DaskExecutor` imports the workers' modules here first). Forking is safe here:
    when Dask forks a worker (from its own thread), this process's other threads are
    Dask's (its event loop, queue feeders, process watchers) and the main thread waiting
    for the workers to start, so no computation is under way; no kernel uses numba's
    parallel threading layer, which must not be forked. macOS and Windows keep ``spawn``
    (fork is unsafe or absent there); a user's own setting (``forkserver``, say) is kept.
    """
    if configured == "spawn" and platform == "linux":
        return "fork"
    return configured


@contextmanager
def _frozen_heap(freeze: bool) -> Iterator[None]:
    """While local workers are forked from this process (``freeze`` true), its objects are
    moved out of the garbage collector's sight (:func:`gc.freeze`), and put back after.

    A forked worker inherits them (the imported modules: about 220,000 objects) and keeps
    them frozen: its full collections no longer traverse them (a full collection of such a
    process took about 0.1 s; drawing the figures of the 200-basin benchmark region, each
    worker ran 4-5 full collections that took 1.0-1.2 s of its CPU, most of it on the
    inherited objects), and no collection writes to their pages, which the worker then
    keeps shared with this process instead of copying. This process collects as before.
    """
    if freeze:
        gc.freeze()
    try:
        yield
    finally:
        if freeze:
            gc.unfreeze()


def warm_up(modules: Sequence[str] = ()) -> None:
    """Set the allocator, import ``modules`` and load the compiled kernels (run on each new
    worker as it starts, before its first task; a forked worker has the modules already)."""
    import numpy as np

    keep_freed_memory()
    for name in modules:
        importlib.import_module(name)

    from regional.models import model_names, simulate
    from regional.models.simulate import get_model

    for name in model_names():
        params = {p.name: p.initial for p in get_model(name).parameters}
        forcing = np.ones(3)
        simulate(name, forcing, forcing, params)
        simulate(name, forcing, forcing, params, temp=forcing)


async def _warm_up_soon(modules: Sequence[str]) -> None:
    """:func:`warm_up` as a coroutine, which a Dask worker runs without the client waiting."""
    warm_up(modules)


TASKS_PER_WORKER = 4
"""Least number of tasks per worker a stage aims at, so that no worker idles at the end."""


def chunk_size(
    n_items: int, default: int, *, n_workers: int, tasks_per_worker: int = TASKS_PER_WORKER
) -> int:
    """Items per task: ``default``, smaller when that leaves fewer than ``tasks_per_worker``
    tasks per worker (a few expensive GR4J calibrations must not all land on one worker while
    the other waits)."""
    if n_workers <= 1:
        return default
    return max(1, min(default, -(-n_items // (tasks_per_worker * n_workers))))


def chunked(items: Sequence[str], size: int) -> list[list[str]]:
    """Cut ``items`` into consecutive chunks of at most ``size`` (order kept)."""
    if size < 1:
        raise ValueError(f"chunk size must be >= 1: got {size}")
    return [list(items[i : i + size]) for i in range(0, len(items), size)]


def tapered(items: Sequence[str], size: int, *, n_workers: int) -> list[list[str]]:
    """Cut ``items`` into consecutive chunks of at most ``size`` whose sizes shrink towards
    the end (order kept): each chunk holds at most a ``1 / (2 n_workers)`` share of the items
    not yet cut, so a stage's last tasks are short and no worker waits long for another's
    last one (after guided self-scheduling, which cuts a ``1 / n_workers`` share:
    Polychronopoulos and Kuck 1987, IEEE Trans. Computers 36(12)). No chunk holds a lone
    item unless ``size`` is 1: a one-basin chunk's arrays are typed apart by numba (a column
    is both C- and F-contiguous), which would compile the kernels again on every worker the
    first time. So with ``size`` 2 and an odd number of items the last chunk holds 3 (the only
    case a chunk exceeds ``size``). With one worker: :func:`chunked`."""
    if size < 1:
        raise ValueError(f"chunk size must be >= 1: got {size}")
    if n_workers <= 1:
        return chunked(items, size)
    least = min(2, size)
    chunks, start = [], 0
    while start < len(items):
        share = -(-(len(items) - start) // (2 * n_workers))
        step = max(least, min(size, share))
        if len(items) - start - step == 1 and least > 1:
            step += 1  # no lone item left for the last chunk
        chunks.append(list(items[start : start + step]))
        start += step
    return chunks


class InProcessExecutor:
    """Run every chunk here, one after another (the default)."""

    name = "in-process"
    n_workers = 1

    def map(
        self,
        function: ChunkFn,
        chunks: Sequence[Sequence[str]],
        context: Any,
        *,
        progress: Progress = None,
    ) -> list[Any]:
        """Call ``function(chunk, context)`` for each chunk, in order."""
        results = []
        done = 0
        total = sum(len(chunk) for chunk in chunks)
        for chunk in chunks:
            results.append(function(chunk, context))
            done += len(chunk)
            if progress is not None:
                progress(done, total)
        return results

    def imap(self, function: ChunkFn, chunks: Sequence[Sequence[str]], context: Any) -> Iterator:
        """:meth:`map` a chunk at a time: each chunk runs when its result is taken, so the
        caller can use and drop one chunk's result before the next is made."""
        for chunk in chunks:
            yield function(chunk, context)

    def map_batches(
        self,
        batches: Iterable[Batch],
        *,
        ahead: int = BATCHES_AHEAD,
        shared: Any = None,
        keep: bool = False,
    ) -> Iterator[Any]:
        """:meth:`map` of each ``(function, chunks, context)`` batch, batch after batch,
        lazily: a batch runs only when the one before it has been taken (``ahead`` is for the
        cluster). A batch with a fourth item ``finish`` gives ``finish(results, shared)`` (with
        ``keep``, the pair it returns, as it is: nothing is kept elsewhere here)."""
        for function, chunks, context, *finish in batches:
            results = self.map(function, chunks, context)
            yield finish[0](results, shared) if finish else results

    def start_map(
        self,
        function: ChunkFn,
        chunks: Sequence[Sequence[Any]],
        context: Any,
        *,
        priority: int = 0,
    ) -> Callable[[], list[Any]]:
        """:meth:`map` to be waited for later: here the chunks run when the returned call is
        made (on a cluster they run meanwhile; ``priority`` is for the cluster)."""
        return partial(self.map, function, chunks, context)

    def close(self) -> None:
        """Nothing to release."""


class DaskExecutor:
    """Run chunks as tasks on a Dask ``distributed`` cluster.

    Parameters
    ----------
    scheduler : str, optional
        Address of a running scheduler (``tcp://host:8786``). When absent a local cluster of
        ``workers`` processes is started and closed with :meth:`close`.
    workers : int, optional
        Worker processes of the local cluster (default 2), one thread each.
    connect_timeout_s : float, default 10
        How long to wait for the scheduler to answer, in seconds.
    worker_modules : sequence of str
        Modules every worker imports as it starts (:func:`warm_up`, which runs without
        blocking this process: the caller goes on while the workers import). A local
        cluster's workers are forked from this process where :func:`worker_start_method`
        allows: the modules are then imported here first, and the workers start with them.

    Raises
    ------
    RunError
        The scheduler did not answer within ``connect_timeout_s`` (address and wait named).
    """

    name = "dask"

    def __init__(
        self,
        scheduler: str | None = None,
        *,
        workers: int | None = None,
        connect_timeout_s: float = CONNECT_TIMEOUT_S,
        worker_modules: Sequence[str] = (),
    ) -> None:
        try:
            from distributed import Client, LocalCluster
        except ImportError as error:  # pragma: no cover - depends on the environment
            raise RuntimeError(
                "running on a Dask cluster needs the 'distributed' package: "
                'pip install -e ".[cluster]" from the checkout'
            ) from error
        import dask

        self._cluster = None
        self._restore_keeping = False
        if scheduler:
            self.client = _connect(Client, scheduler, connect_timeout_s)
        else:
            method = worker_start_method(
                dask.config.get("distributed.worker.multiprocessing-method")
            )
            if method == "fork":
                for name in worker_modules:
                    importlib.import_module(name)
            config = {
                "distributed.nanny.pre-spawn-environ": WORKER_ENVIRONMENT,
                "distributed.worker.multiprocessing-method": method,
                # no dashboard shows the workers' statistical profile: sampling the task
                # thread every 10 ms cost 3-4 % of a busy worker's CPU (development machine)
                "distributed.worker.profile.enabled": False,
                **QUIET_CLUSTER,
            }
            with dask.config.set(config), _frozen_heap(method == "fork"):
                self._cluster = LocalCluster(
                    n_workers=workers or 2,
                    threads_per_worker=1,
                    processes=True,
                    dashboard_address=None,
                    silence_logs=logging.ERROR,
                )
            self.client = Client(self._cluster)
        self.client.run(_warm_up_soon, tuple(worker_modules), wait=False)
        logger.info("dask client: %s", self.client)

    def map(
        self,
        function: ChunkFn,
        chunks: Sequence[Sequence[str]],
        context: Any,
        *,
        progress: Progress = None,
    ) -> list[Any]:
        """Scatter ``context`` once, run one task per chunk, gather results in chunk order."""
        shared, futures = self._tasks(function, chunks, context)
        self._wait(futures, chunks, progress)
        return self.client.gather(futures)

    def imap(self, function: ChunkFn, chunks: Sequence[Sequence[str]], context: Any) -> Iterator:
        """:meth:`map` yielding each chunk's result in chunk order as it is gathered: every
        task submitted at once, each result released on the cluster once taken."""
        shared, futures = self._tasks(function, chunks, context)
        for i in range(len(futures)):
            future, futures[i] = futures[i], None
            yield future.result()
        del shared  # the scattered context, held until the last task was taken

    def _tasks(self, function: ChunkFn, chunks: Sequence[Sequence[str]], context: Any) -> tuple:
        """``context`` scattered once and one task per chunk submitted: the scattered
        context's future (the caller holds it while the tasks run) and the tasks'."""
        # hash=False: a fresh key per stage, so releasing one stage's copy never races with
        # the next stage scattering an equal object
        shared = self.client.scatter(context, broadcast=True, hash=False)
        futures = [
            self.client.submit(function, list(chunk), shared, pure=False) for chunk in chunks
        ]
        return shared, futures

    @staticmethod
    def _wait(futures: Sequence, chunks: Sequence[Sequence[str]], progress: Progress) -> None:
        """Wait for every task, calling ``progress(done, total)`` in basins as they finish."""
        from distributed import as_completed

        sizes = {future.key: len(chunk) for future, chunk in zip(futures, chunks, strict=True)}
        total, done = sum(sizes.values()), 0
        for future in as_completed(futures):
            done += sizes[future.key]
            if progress is not None:
                progress(done, total)

    def map_batches(
        self,
        batches: Iterable[Batch],
        *,
        ahead: int = BATCHES_AHEAD,
        shared: Any = None,
        keep: bool = False,
    ) -> Iterator[Any]:
        """:meth:`map` of each ``(function, chunks, context)`` batch without a barrier between
        batches.

        The tasks of the first ``ahead + 1`` batches are submitted at once, by this call (the
        caller may do other work before taking the first results); each batch's results are
        gathered in chunk order and yielded in batch order, and as one is gathered the next
        batch is submitted, so the workers go on with the next batches while the caller uses
        the results. Memory stays bounded: the results of at most ``ahead + 1`` batches wait
        on the workers, and the client holds one batch's results at a time (plus what the
        caller keeps).

        A batch with a fourth item ``finish`` is finished on the cluster: one more task,
        ``finish(results, shared)``, takes its chunks' results on a worker (they never reach
        this process) and only what it returns is gathered and yielded. ``shared`` is
        scattered to the workers once for all the batches (or, when it is a future of a
        result left on a worker, given as that result). With ``keep``, ``finish`` returns a
        pair ``(small, kept)``: only ``small`` is gathered, and ``(small, future of kept)``
        is yielded (``kept`` stays on the worker until the caller drops the future).
        """
        if ahead < 0:
            raise ValueError(f"ahead must be >= 0: got {ahead}")
        pending: deque = deque()
        remaining = iter(batches)
        everywhere: list = []  # ``shared`` as scattered, once, when a batch first needs it

        def submit_next() -> None:
            batch = next(remaining, None)
            if batch is None:
                return
            function, chunks, context, *finish = batch
            scattered = self.client.scatter(context, broadcast=True, hash=False)
            futures = [
                self.client.submit(function, list(c), scattered, pure=False) for c in chunks
            ]
            if finish:
                if not everywhere:
                    everywhere.append(self._placed(shared))
                # the chunks' results stay on the workers until the finishing task has used them
                futures = [self.client.submit(finish[0], futures, everywhere[0], pure=False)]
                if keep:
                    futures = [self.client.submit(_item, futures[0], i) for i in (0, 1)]
            pending.append((scattered, futures, bool(finish)))

        def gathered() -> Iterator[Any]:
            while pending:
                scattered, futures, finished = pending.popleft()
                results = self.client.gather(futures[:1] if finished and keep else futures)
                kept = futures[-1]
                del scattered, futures  # released on the workers once gathered
                submit_next()
                if finished and keep:
                    yield results[0], kept
                else:
                    yield results[0] if finished else results
            everywhere.clear()

        for _ in range(ahead + 1):
            submit_next()
        return gathered()

    def map_keeping(
        self,
        function: ChunkFn,
        chunks: Sequence[Sequence[str]],
        context: Any,
        *,
        progress: Progress = None,
    ) -> tuple[list[Any], list[Any]]:
        """:meth:`map` of a ``function`` that returns a pair ``(small, kept)`` per chunk: the
        small parts are gathered (in chunk order), the kept parts stay on the workers, one
        future per chunk (in chunk order), until the caller drops them."""
        shared, futures = self._tasks(function, chunks, context)
        small = [self.client.submit(_item, f, 0, pure=False) for f in futures]
        kept = [self.client.submit(_item, f, 1, pure=False) for f in futures]
        self._wait(futures, chunks, progress)
        del futures, shared  # each pair is released once split
        return self.client.gather(small), kept

    def start_each(
        self, function: ChunkFn, chunks: Sequence[Sequence[Any]], context: Any
    ) -> list[Callable[[], Any]]:
        """:meth:`start_map` whose results are taken one at a time: one call per chunk (in
        chunk order), each waiting for its chunk's result and handing it over (its copy on
        the workers released), so the caller holds one result at a time."""
        shared, futures = self._tasks(function, chunks, context)
        return [partial(_taken, [shared, future], self.client) for future in futures]

    def submit(self, function: Callable, *args: Any, priority: int = 0):
        """One task ``function(*args)`` now; futures among ``args`` (also inside lists) reach
        it as their results, fetched by the worker that runs it. Returns its future."""
        return self.client.submit(function, *args, pure=False, priority=priority)

    def gather(self, futures: Sequence[Any]) -> list[Any]:
        """The results of ``futures`` (:meth:`submit`, :meth:`map_keeping`) in this process."""
        return self.client.gather(list(futures))

    def start_map(
        self,
        function: ChunkFn,
        chunks: Sequence[Sequence[Any]],
        context: Any,
        *,
        priority: int = 0,
    ) -> Callable[[], list[Any]]:
        """Scatter ``context`` once and submit one task per chunk now; the returned call waits
        for the results and gives them in chunk order (the caller works meanwhile).

        A worker takes a task of a lower ``priority`` (default 0) only when no task of a
        higher one is ready: small independent tasks given ``priority=-1`` fill the gaps
        other work leaves and the end of a stage, where one worker would otherwise wait for
        the other's last task.
        """
        shared = self.client.scatter(context, broadcast=True, hash=False)
        futures = [
            self.client.submit(function, list(c), shared, pure=False, priority=priority)
            for c in chunks
        ]
        held = [shared, futures]

        def gather() -> list[Any]:
            results = self.client.gather(held[1])
            held.clear()  # released on the workers once gathered
            return results

        return gather

    def _placed(self, value: Any):
        """``value`` scattered to every worker, or as it is when already a future (a result
        left on a worker: the workers that need it fetch it)."""
        from distributed import Future

        if isinstance(value, Future):
            return value
        return self.client.scatter(value, broadcast=True, hash=False)

    def hold_little(self) -> None:
        """Until :meth:`close`, this process (the cluster's client) gives freed heap memory
        back to the system at once (:func:`return_freed_memory`); :meth:`close` then sets
        :func:`keep_freed_memory` again where it was set.

        For a client that runs no kernels and holds a large region's per-basin results
        while its daily results stay on the workers (:mod:`regional.kept`): what one stage
        frees then no longer stays resident into the next. The workers keep their own
        settings (:func:`warm_up`, :data:`WORKER_ENVIRONMENT`).
        """
        self._restore_keeping = self._restore_keeping or _KEEPING[0]
        return_freed_memory()

    @property
    def n_workers(self) -> int:
        """Workers connected to the scheduler now (at least 1)."""
        return max(1, len(self.client.scheduler_info().get("workers", {})))

    def close(self) -> None:
        """Close the client, and the local cluster when this executor started it (the
        allocator settings :meth:`hold_little` changed restored)."""
        self.client.close()
        if self._cluster is not None:
            self._cluster.close()
        if self._restore_keeping:
            keep_freed_memory()
            self._restore_keeping = False


def _taken(held: list, client) -> Any:
    """The result of ``held``'s future (its second item), the futures then dropped."""
    result = client.gather(held[1])
    held.clear()
    return result


def _item(pair: Sequence[Any], position: int) -> Any:
    """One item of a task's result (a task of :meth:`DaskExecutor.map_keeping`)."""
    return pair[position]


def _connect(client_class, address: str, timeout_s: float):
    try:
        return client_class(address, timeout=timeout_s)
    except (OSError, TimeoutError) as error:
        raise RunError(
            f"cannot reach the Dask scheduler at {address}: no answer after waiting "
            f"{timeout_s:g} s ({error}). Fix: start the scheduler, check the address and port "
            "(--scheduler or [compute] scheduler), or wait longer with [compute] "
            "connect_timeout_s."
        ) from None
    except (MemoryError, ValueError) as error:  # a server answered, in another protocol
        raise RunError(
            f"the address {address} answered, but not as a Dask scheduler ({type(error).__name__} "
            "while reading its greeting). Fix: give the scheduler's own address and port (often "
            "tcp://HOST:8786; the dashboard port, often 8787, is a web page, not the scheduler)."
        ) from None


def make_executor(
    scheduler: str | None = None,
    *,
    workers: int | None = None,
    connect_timeout_s: float = CONNECT_TIMEOUT_S,
    worker_modules: Sequence[str] = (),
):
    """In-process unless a scheduler address or a worker count asks for Dask (whose workers
    import ``worker_modules`` as they start)."""
    if scheduler or workers:
        return DaskExecutor(
            scheduler,
            workers=workers,
            connect_timeout_s=connect_timeout_s,
            worker_modules=worker_modules,
        )
    return InProcessExecutor()
