"""Where dask work executes: a dask.distributed scheduler when one is configured, else local threads.

``compute`` is the one place the service turns lazy dask collections into values; ``service.pipeline`` calls it
once per run (or once per feature batch of a job). Both paths run the same task graph, so a result computed
on the cluster is identical, bit for bit, to the one computed on local threads.

A worker lost in the middle of a computation is handled by the scheduler: it reschedules the tasks that
worker was running and recomputes the results it held on the workers that remain. Only a task that kept
taking its worker down (``distributed.scheduler.allowed-failures`` times, 3 by default) fails the run, and
then as a :class:`~service.errors.ClusterUnavailableError` (503), like a scheduler that does not answer.
"""

from __future__ import annotations

import contextlib
import logging
import os
import queue
import threading
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import Future, ThreadPoolExecutor
from typing import TYPE_CHECKING, Any

import dask
import dask.threaded

from service.errors import ClusterUnavailableError, WxshockError

if TYPE_CHECKING:
    import distributed

    from service.settings import Settings

log = logging.getLogger(__name__)

# Seconds to wait for the scheduler to answer when the first client is made.
CONNECT_TIMEOUT_S = 10.0
# Seconds a computation waits for at least one worker to be connected before it is refused.
WORKER_WAIT_S = 30.0
# Times a task that raised is run again before its error is the run's error. A lost worker is not counted
# here (the scheduler reschedules those tasks by itself); this covers a transient read error on a worker,
# for example an object store that answered one request with a throttling error.
TASK_RETRIES = 2

# dask's threaded scheduler, given as the function itself: named by its string ("threads"), dask first imports
# dask.distributed to look for a client (0.7 s of CPU in the first computation of a process, the server's first
# request, where no cluster is configured).
LOCAL_THREADS = dask.threaded.get

_clients: dict[str, distributed.Client] = {}
_lock = threading.Lock()


def client_for(settings: Settings) -> distributed.Client | None:
    """The cached distributed client of ``settings.scheduler``; None when work runs on local threads."""
    address = (settings.scheduler or "").strip()
    if not address:
        return None
    with _lock:
        client = _clients.get(address)
        if client is not None and client.status == "running":
            return client
        if client is not None:
            _close_quietly(client)
        client = _connect(address)
        _clients[address] = client
        return client


def _connect(address: str) -> distributed.Client:
    """A new client of the scheduler at ``address``; it does not become dask's global default."""
    from distributed import Client

    try:
        # set_as_default=False: a plain dask.compute elsewhere in the process must not silently move to
        # the cluster; only compute() below sends work there.
        client = Client(
            address,
            timeout=CONNECT_TIMEOUT_S,
            set_as_default=False,
            name="wxshock",
            direct_to_workers=_direct_to_workers(),
        )
    except (OSError, TimeoutError, ValueError) as exc:
        raise ClusterUnavailableError(
            f"dask scheduler {address!r} did not answer within {CONNECT_TIMEOUT_S:g} s "
            f"({type(exc).__name__}: {exc}); start the scheduler, correct WXSHOCK_SCHEDULER / --scheduler "
            "(e.g. tcp://host:8786), or unset it to compute on local threads",
            field="scheduler",
        ) from exc
    log.info("connected to dask scheduler %s", address)
    return client


def _direct_to_workers() -> bool:
    """Gather results straight from the workers unless dask's config says otherwise.

    The daily series of a feature batch are large (features x days x variables float64); relayed through
    the scheduler they cross the network twice and load the scheduler. Where the service cannot reach the
    workers, set ``DASK_DISTRIBUTED__CLIENT__DIRECT_TO_WORKERS=False``.
    """
    configured = dask.config.get("distributed.client.direct-to-workers", None)
    return True if configured is None else bool(configured)


def _close_quietly(client: distributed.Client) -> None:
    """Close a client whose connection is gone, ignoring errors from the already closed comms."""
    try:
        client.close(timeout=2)
    except Exception:  # noqa: BLE001 - a dead client may fail to close in many ways; it is dropped anyway
        log.debug("closing a stale dask client failed", exc_info=True)


def close_clients() -> None:
    """Close every cached client (server shutdown, tests)."""
    with _lock:
        clients = list(_clients.values())
        _clients.clear()
    for client in clients:
        _close_quietly(client)


def compute(*collections: Any, settings: Settings) -> tuple[Any, ...]:
    """Compute dask collections (arrays, xarray objects, delayed) together; non-dask arguments pass through.

    Runs on the scheduler named by ``settings.scheduler``, else on ``settings.threads`` local threads (one
    per core when None). Returns a tuple with one computed value per argument, in order, like
    ``dask.compute``. Errors raised inside a task reach the caller with their own type.
    """
    client = client_for(settings)
    if client is None:
        return dask.compute(*collections, scheduler=LOCAL_THREADS, num_workers=settings.threads)
    return _compute_on_cluster(client, collections, settings.scheduler or "")


def compute_each(
    items: Iterable[tuple[Any, Any]],
    *,
    settings: Settings,
    in_flight: int | None = None,
    cancelled: Callable[[], bool] | None = None,
    overlap_tails: bool = False,
    read_ahead: bool = False,
) -> Iterator[tuple[Any, Any]]:
    """Compute many independent collections, a few at a time; yield (key, value) as each one finishes.

    ``items`` gives (key, collection) pairs and is read lazily, so a caller may build each graph only when it
    is about to run. At most ``in_flight`` collections run at once (default: two on threads, so that one
    batch's single-threaded indicator table overlaps the next batch's chunk work; on a cluster one per worker
    thread, at least two). On threads, ``overlap_tails`` counts a collection with one output task (a delayed
    value) as no longer in flight once that task starts: the next one's tasks then run beside it, and at most
    ``2 * in_flight`` run at once. With ``read_ahead`` (threads), the next item is taken from ``items`` as soon as
    one starts, so that its graph is made while the running ones compute rather than while a thread waits for
    it. Values come in the order they finish: the caller puts them in order. When
    ``cancelled()`` turns true no further collection starts; those running finish (threads) or are cancelled
    (cluster). Errors are those of :func:`compute`.
    """
    client = client_for(settings)
    if client is None:
        yield from _each_on_threads(
            iter(items), settings, in_flight or 2, cancelled, overlap_tails, read_ahead
        )
        return
    address = settings.scheduler or ""
    with _cluster_errors(address):
        _wait_for_workers(client, address)
        if in_flight is None:
            threads = sum(
                w.get("nthreads", 1) for w in client.scheduler_info(n_workers=-1)["workers"].values()
            )
            in_flight = max(2, threads)
    yield from _each_on_cluster(client, iter(items), address, in_flight, cancelled)


def _output_key(collection: Any) -> Any:
    """The key of a collection's one output task (a delayed value's), or None when it has several or none."""
    keys = collection.__dask_keys__() if dask.is_dask_collection(collection) else []
    return keys[0] if isinstance(keys, list) and len(keys) == 1 and not isinstance(keys[0], list) else None


def _each_on_threads(
    items: Iterator[tuple[Any, Any]],
    settings: Settings,
    in_flight: int,
    cancelled: Callable[[], bool] | None,
    overlap_tails: bool = False,
    read_ahead: bool = False,
) -> Iterator[tuple[Any, Any]]:
    """compute_each on local threads: every collection's tasks share one pool of settings.threads threads."""
    threads = settings.threads or os.cpu_count() or 1
    pool, drivers = _pools(threads, 2 * in_flight if overlap_tails else in_flight)
    queued = _Queued(pool, QUEUED_PER_THREAD * threads)
    # the pools live as long as the process: making threads per request costs an on-demand answer
    running: dict[Future, Any] = {}
    in_tail: set[Future] = set()
    # ("done", future) when a computation ends, ("tail", future) when its output task starts
    events: queue.SimpleQueue[tuple[str, Future]] = queue.SimpleQueue()
    # read_ahead: the next item, taken from ``items`` before it may start (or the error taking it raised, raised
    # when it would have started)
    ahead: list[tuple[Any, Any] | BaseException] = []

    def take() -> tuple[Any, Any]:
        if ahead:
            item = ahead.pop()
            if isinstance(item, BaseException):
                raise item
            return item
        return next(items)

    def take_ahead() -> None:
        try:
            ahead.append(next(items))
        except StopIteration:
            pass
        except Exception as error:  # noqa: BLE001 - raised in its turn, after the collections before it
            ahead.append(error)

    def start() -> bool:
        before_tail = len(running) - len(in_tail)
        if (
            before_tail >= in_flight
            or len(running) >= 2 * in_flight
            or (cancelled is not None and cancelled())
        ):
            return False
        try:
            key, collection = take()
        except StopIteration:
            return False
        tail = _output_key(collection) if overlap_tails else None
        started = threading.Event()  # set once the future below exists, before its tail can be reported
        holder: list[Future] = []

        def at_task(task_key: Any, *_: Any) -> None:
            if task_key == tail:
                started.wait()
                events.put(("tail", holder[0]))

        options: dict[str, Any] = {}
        if tail is not None:
            # (start, start_state, pretask, posttask, finish); given here, dask's global callbacks stay untouched
            options["callbacks"] = [(None, None, at_task, None, None)]
        future = drivers.submit(dask.compute, collection, scheduler=LOCAL_THREADS, pool=queued, **options)
        holder.append(future)
        started.set()
        running[future] = key
        future.add_done_callback(lambda f: events.put(("done", f)))
        if read_ahead and not ahead:
            take_ahead()
        return True

    try:
        while start():
            pass
        while running:
            what, future = events.get()
            if future not in running:
                continue
            if what == "tail":
                in_tail.add(future)
            else:
                in_tail.discard(future)
                key = running.pop(future)
                (value,) = future.result()
                yield key, value
            while start():
                pass
    finally:
        for future in running:
            future.cancel()


_POOLS: dict[tuple[int, int], tuple[ThreadPoolExecutor, ThreadPoolExecutor]] = {}

# A computation on local threads hands its tasks to the pool this many per pool thread at a time: a thread that
# finishes a chunk task (about 2 ms) finds the next one waiting in the pool's queue, instead of idling until the
# computation's scheduling thread has learnt of the finished task and submitted another (dask submits only as many
# as it is told there are workers).
QUEUED_PER_THREAD = 2


class _Queued:
    """A thread pool as dask's threaded scheduler sees it: ``depth`` workers, so that it keeps that many tasks
    submitted; they queue in ``pool`` and run on its threads."""

    def __init__(self, pool: ThreadPoolExecutor, depth: int) -> None:
        self._pool = pool
        self._max_workers = depth  # the number of workers dask.threaded.get reads from its pool

    def submit(self, fn: Callable[..., Any], /, *args: Any, **kwargs: Any) -> Future:
        """Queue ``fn(*args, **kwargs)`` in the pool."""
        return self._pool.submit(fn, *args, **kwargs)


def _pools(threads: int, in_flight: int) -> tuple[ThreadPoolExecutor, ThreadPoolExecutor]:
    """(task pool of ``threads`` threads, pool of ``in_flight`` threads driving one computation each)."""
    with _lock:
        pools = _POOLS.get((threads, in_flight))
        if pools is None:
            pools = _POOLS[(threads, in_flight)] = (
                ThreadPoolExecutor(threads, thread_name_prefix="wxshock-task"),
                ThreadPoolExecutor(in_flight, thread_name_prefix="wxshock-batch"),
            )
        return pools


def _each_on_cluster(
    client: distributed.Client,
    items: Iterator[tuple[Any, Any]],
    address: str,
    in_flight: int,
    cancelled: Callable[[], bool] | None,
) -> Iterator[tuple[Any, Any]]:
    """compute_each on the cluster: each collection's result stays on a worker until it is gathered here."""
    from distributed import as_completed

    running: dict[Any, Any] = {}
    queue = as_completed(loop=client.loop)

    def start() -> bool:
        if cancelled is not None and cancelled():
            return False
        try:
            key, collection = next(items)
        except StopIteration:
            return False
        future = client.compute(collection, retries=TASK_RETRIES)
        running[future.key] = (key, future)
        queue.add(future)
        return True

    try:
        with _cluster_errors(address):
            while len(running) < in_flight and start():
                pass
        while running:
            with _cluster_errors(address):
                future = next(queue)
                key, _ = running.pop(future.key)
                value = future.result()
            future.release()
            yield key, value
            with _cluster_errors(address):
                while len(running) < in_flight and start():
                    pass
    finally:
        for _, future in running.values():
            future.cancel()


def _wait_for_workers(client: distributed.Client, address: str) -> None:
    """Wait briefly for a worker; ClusterUnavailableError when none comes."""
    try:
        client.wait_for_workers(1, timeout=WORKER_WAIT_S)
    except TimeoutError as exc:
        raise ClusterUnavailableError(
            f"dask scheduler {address!r} has no worker (waited {WORKER_WAIT_S:g} s); start at least one "
            f"'dask worker {address}' or unset WXSHOCK_SCHEDULER to compute on local threads",
            field="scheduler",
        ) from exc


@contextlib.contextmanager
def _cluster_errors(address: str) -> Iterator[None]:
    """Turn the cluster's failures into ClusterUnavailableError (503); domain errors keep their type."""
    from distributed import KilledWorker
    from distributed.client import FutureCancelledError
    from distributed.comm.core import CommClosedError

    try:
        yield
    except WxshockError:
        raise  # a domain error raised inside a task (a store that cannot be read) keeps its own type
    except KilledWorker as exc:
        raise ClusterUnavailableError(
            f"dask task {exc.task!r} was running on {exc.allowed_failures + 1} workers that each died while "
            f"running it (the last was {exc.last_worker.address}), more often than the scheduler allows "
            "(distributed.scheduler.allowed-failures); check the workers' memory limit and logs",
            field="scheduler",
        ) from exc
    except (CommClosedError, FutureCancelledError) as exc:
        # FutureCancelledError: the client lost the scheduler while waiting ("scheduler-connection-lost").
        raise ClusterUnavailableError(
            f"lost the connection to dask scheduler {address!r} during the computation "
            f"({type(exc).__name__}); retry once the scheduler is back",
            field="scheduler",
        ) from exc


def _compute_on_cluster(client: distributed.Client, collections: tuple[Any, ...], address: str) -> tuple:
    """Run the collections on the cluster, waiting briefly for a worker; lost workers are the scheduler's."""
    with _cluster_errors(address):
        _wait_for_workers(client, address)
        return dask.compute(*collections, scheduler=client, retries=TASK_RETRIES)
