"""One runner for independent tasks: in this process, on joblib workers, or on a Dask cluster.

Campaign simulation, feature extraction (threads over row blocks) and scoring use it.

API
---
``run_tasks(fn, tasks, *, n_jobs=1, scheduler=None, shared=None, progress=False, desc="",
unit="task", weight=None, initial=0, prefer="processes") -> Iterator[(key, result)]``

    Calls ``fn(*args, **shared)`` once per item ``key -> args`` of ``tasks`` (a mapping whose
    values are tuples of positional arguments) and yields ``(key, result)`` pairs **as the
    tasks finish** (unordered; sort by key if order matters). Where it runs:

    - ``scheduler is None`` and (``n_jobs == 1`` or at most one task): serially in this
      process, lazily (task ``i + 1`` starts only when the caller asks for the next result,
      so whatever the caller did with the results before an exception or Ctrl-C is kept);
    - ``scheduler is None`` and ``n_jobs > 1`` (or ``-1``: every core): joblib
      ``Parallel(n_jobs, prefer=prefer, return_as="generator_unordered")``; ``prefer`` is
      ``"processes"`` (loky) or ``"threads"`` (for numpy work that releases the GIL);
    - ``scheduler`` a Dask address (``"tcp://host:port"``, ``"tls://host:port"``), a
      :class:`dask.distributed.Client`, or ``"local"`` (a local cluster of ``n_jobs``
      single-threaded worker processes, started and closed here): on Dask, with at most
      two tasks per worker thread in flight (bounded memory on both sides); ``n_jobs`` is
      ignored for an address or a Client. The client is closed afterwards unless it was
      passed in.

    ``shared``: a mapping ``name -> object`` passed to every call as keyword arguments.
    On Dask each object is scattered once to every worker (``broadcast=True``); with joblib
    processes it is pickled once to a private temporary file that each worker loads once; with
    threads it is shared in memory.

    ``progress``: a tqdm bar on stderr (``desc``, ``unit``); it starts at ``initial`` (work
    done before this call), its total is ``initial`` plus the summed weights, and each
    finished task advances it by ``weight(key)`` (default 1).

    An exception raised by a task propagates out of the iteration (with Dask, the tasks
    still queued are cancelled). Arguments are checked before anything runs:
    :class:`~waneguide.core.errors.InputError` names the option (``--jobs``,
    ``--scheduler``) and the fix. An unreachable scheduler raises InputError too.

``check_n_jobs(n_jobs, option="--jobs") -> int`` and ``check_scheduler(scheduler,
option="--scheduler")``: the same checks, for callers that validate before long set-up
work.

Results travel back to the caller's process (with joblib and Dask they are pickled), so a
task should return what the caller needs, not write to a disk the caller may not share.
"""
from __future__ import annotations

import contextlib
import numbers
import os
import pickle
import tempfile
from typing import Any, Callable, Hashable, Iterator, Mapping

from joblib import Parallel, delayed
from tqdm.auto import tqdm

from waneguide.core.errors import InputError

try:  # dask[distributed] is a dependency; guarded so that a trimmed install still runs locally
    from dask.distributed import Client, LocalCluster, as_completed
except ImportError:  # pragma: no cover - exercised only without dask
    Client = LocalCluster = as_completed = None

__all__ = ["run_tasks", "check_n_jobs", "check_scheduler", "SCHEDULER_PREFIXES"]

#: Address schemes accepted for a remote Dask scheduler.
SCHEDULER_PREFIXES = ("tcp://", "tls://")
#: How long to wait for a Dask scheduler to answer before giving up.
CONNECT_TIMEOUT = "20s"
_TASKS_PER_THREAD = 2


def check_n_jobs(n_jobs: Any, option: str = "--jobs") -> int:
    """``n_jobs`` as an int: a positive whole number, or -1 for every core of this machine."""
    whole = isinstance(n_jobs, numbers.Integral) and not isinstance(n_jobs, bool)
    if not whole or not (int(n_jobs) >= 1 or int(n_jobs) == -1):
        raise InputError(f"{option} must be a positive whole number of parallel workers (or -1 for every core); "
                         f"got {n_jobs!r}. Give e.g. {option} 2, or {option} 1 to run in this process.")
    return int(n_jobs)


def check_scheduler(scheduler: Any, option: str = "--scheduler"):
    """``None``, ``"local"``, a Dask address (tcp:// or tls://) or a :class:`dask.distributed.Client`."""
    if scheduler is None:
        return None
    if Client is None:
        raise InputError(f"{option} needs dask.distributed, which is not installed; install dask[distributed] "
                         f"or drop {option} to run on this machine.")
    if isinstance(scheduler, Client):
        return scheduler
    if isinstance(scheduler, str) and (scheduler == "local" or scheduler.startswith(SCHEDULER_PREFIXES)):
        return scheduler
    got = repr(scheduler) if isinstance(scheduler, str) else f"a {type(scheduler).__name__}"
    raise InputError(f"{option} must be a Dask scheduler address such as tcp://127.0.0.1:8786 (tcp:// or tls://), "
                     f"'local', or a dask.distributed.Client; got {got}. Start a scheduler with `dask scheduler` "
                     f"and pass its address, or drop {option} to run on this machine.")


def run_tasks(
    fn: Callable[..., Any],
    tasks: Mapping[Hashable, tuple],
    *,
    n_jobs: int = 1,
    scheduler=None,
    shared: Mapping[str, Any] | None = None,
    progress: bool = False,
    desc: str = "",
    unit: str = "task",
    weight: Callable[[Hashable], float] | None = None,
    initial: float = 0,
    prefer: str = "processes",
) -> Iterator[tuple[Hashable, Any]]:
    """Run ``fn(*tasks[key], **shared)`` for every key; yield ``(key, result)`` as tasks finish.

    See the module docstring for where the tasks run and what each argument does.
    """
    n_jobs = check_n_jobs(n_jobs)
    scheduler = check_scheduler(scheduler)
    if prefer not in ("processes", "threads"):
        raise ValueError(f"prefer must be 'processes' or 'threads'; got {prefer!r}.")
    todo = {key: tuple(args) for key, args in tasks.items()}
    kwargs = dict(shared or {})
    weigh = weight if weight is not None else (lambda key: 1)
    total = initial + sum(weigh(k) for k in todo)
    return _iterate(fn, todo, kwargs, n_jobs=n_jobs, scheduler=scheduler, prefer=prefer, weigh=weigh,
                    bar=dict(total=total, initial=initial, desc=desc, unit=unit, disable=not progress, leave=False))


def _iterate(fn, todo, kwargs, *, n_jobs, scheduler, prefer, weigh, bar):
    with tqdm(**bar) as pbar:
        if scheduler is not None:
            results = _dask(fn, todo, kwargs, scheduler, n_jobs)
        elif n_jobs == 1 or len(todo) <= 1:
            results = ((key, fn(*args, **kwargs)) for key, args in todo.items())
        elif prefer == "threads" or not kwargs:
            par = Parallel(n_jobs=n_jobs, prefer=prefer, return_as="generator_unordered")
            results = par(delayed(_keyed)(fn, key, args, kwargs) for key, args in todo.items())
        else:
            results = _processes(fn, todo, kwargs, n_jobs)
        for key, result in results:
            pbar.update(weigh(key))
            yield key, result


def _keyed(fn, key, args, kwargs):
    return key, fn(*args, **kwargs)


#: ``shared`` objects a worker process has loaded, by the path of their pickle (one load per process).
_LOADED: dict[str, dict] = {}


def _keyed_from_file(fn, key, args, shared_path):
    kwargs = _LOADED.get(shared_path)
    if kwargs is None:
        _LOADED.clear()  # one batch at a time per worker
        with open(shared_path, "rb") as fh:
            kwargs = _LOADED[shared_path] = pickle.load(fh)
    return key, fn(*args, **kwargs)


def _processes(fn, todo, kwargs, n_jobs):
    """joblib worker processes; ``shared`` pickled once to a private temporary file, loaded once per worker.

    Pickling a model bundle with every task cost more than scoring its captures; a file read once
    by each worker does not. The file lives in the system temp folder (mode 0600) and is removed
    when the iteration ends.
    """
    fd, path = tempfile.mkstemp(prefix="waneguide-shared-", suffix=".pkl")
    try:
        with os.fdopen(fd, "wb") as fh:
            pickle.dump(kwargs, fh, protocol=pickle.HIGHEST_PROTOCOL)
        par = Parallel(n_jobs=n_jobs, prefer="processes", return_as="generator_unordered")
        yield from par(delayed(_keyed_from_file)(fn, key, args, path) for key, args in todo.items())
    finally:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(path)


def _apply(fn, args, kwargs):
    return fn(*args, **kwargs)


def _connect(scheduler, n_jobs):
    """(client, cluster or None, whether this call owns the client)."""
    if isinstance(scheduler, Client):
        return scheduler, None, False
    if scheduler == "local":
        workers = n_jobs if n_jobs > 0 else (os.cpu_count() or 1)
        cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                               dashboard_address=None)
        return Client(cluster, set_as_default=False), cluster, True
    try:
        return Client(scheduler, timeout=CONNECT_TIMEOUT, set_as_default=False), None, True
    except (OSError, TimeoutError) as exc:
        raise InputError(f"could not reach the Dask scheduler at {scheduler} ({exc}); start it (`dask scheduler`, "
                         "then `dask worker ADDRESS` on each machine), or drop --scheduler to run on this "
                         "machine.") from None


def _dask(fn, todo, kwargs, scheduler, n_jobs):
    client, cluster, own = _connect(scheduler, n_jobs)
    futures: dict = {}
    try:
        n_threads = max(1, sum(client.nthreads().values()))
        remote = {name: client.scatter([value], broadcast=True, hash=False)[0] for name, value in kwargs.items()}
        pending = iter(todo.items())

        def submit():
            item = next(pending, None)
            if item is None:
                return None
            fut = client.submit(_apply, fn, item[1], remote, pure=False)
            futures[fut] = item[0]
            return fut

        first = [f for f in (submit() for _ in range(_TASKS_PER_THREAD * n_threads)) if f is not None]
        queue = as_completed(first, loop=client.loop)
        for fut in queue:
            key = futures.pop(fut)
            result = fut.result()
            fut.release()
            nxt = submit()
            if nxt is not None:
                queue.add(nxt)
            yield key, result
    finally:
        if futures:
            client.cancel(list(futures))
        if own:
            client.close()
            if cluster is not None:
                cluster.close()
