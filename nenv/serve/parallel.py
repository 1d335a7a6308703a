"""Run one function over many inputs: in this process, in local worker processes, or on a Dask cluster.

Every parallel step of nenv (corpus survey, training features, batch
extension) goes through :func:`as_done`, so all three behave alike: results
arrive as they finish, tagged with their input's index; Ctrl-C cancels what
has not started and stops running tasks cleanly (workers ignore SIGINT; the
parent stops them with SIGTERM, which they turn into an exception, so
temporary files are removed); the same inputs give the same results whichever
way they run (each task is a pure function of its arguments).

A Dask cluster is reached through a scheduler address ("tcp://host:8786").
Its workers need nenv installed and must see the same paths as this machine
(shared storage), because tasks name files, not their contents.
"""

from __future__ import annotations

import os
import re
from typing import Callable, Iterator, Optional, Sequence

from nenv.errors import InputError


def _context(fresh: bool):
    """Worker processes by fork (Linux default; cheap), or spawned (fresh interpreters) where asked or
    where fork is not available."""
    import multiprocessing

    method = "fork" if "fork" in multiprocessing.get_all_start_methods() and not fresh else "spawn"
    return multiprocessing.get_context(method)


def as_done(fn: Callable, arg_tuples: Sequence[tuple], *, workers: int = 1, scheduler: Optional[str] = None, fresh: bool = False) -> Iterator[tuple[int, object]]:
    """Yield ``(i, fn(*arg_tuples[i]))`` as each call finishes.

    workers : local processes (0 = one per core, 1 = in this process); ignored with ``scheduler``
    scheduler : a dask.distributed scheduler address
    fresh : start the workers as new interpreters (spawn) instead of copies of this process (fork),
        each running numba's parallel loops on one thread: for work whose libraries cannot be forked
        once used (the perceptual measures: ViSQOL's parallel loops run on GNU OpenMP, which ends a
        forked child that uses it again)
    """
    if scheduler:
        yield from _dask(fn, arg_tuples, scheduler)
        return
    workers = workers or os.cpu_count() or 1
    if workers <= 1 or len(arg_tuples) <= 1:
        for i, args in enumerate(arg_tuples):
            yield i, fn(*args)
        return
    from concurrent.futures import ProcessPoolExecutor, as_completed

    ctx = _context(fresh)
    started = ctx.SimpleQueue()  # each worker puts its process id here as it starts
    pool = ProcessPoolExecutor(max_workers=min(workers, len(arg_tuples)), mp_context=ctx, initializer=_worker_signals, initargs=(started, fresh))
    try:
        index = {pool.submit(_task, fn, args): i for i, args in enumerate(arg_tuples)}
        for fut in as_completed(index):
            yield index[fut], fut.result()
    except BaseException:
        # Ctrl-C (or an error): stop every worker through SIGTERM, which each turns into an
        # exception, so a task in the middle of writing removes its temporary file on the way out;
        # wait for each to finish that before this process goes on (and perhaps exits)
        workers = _stop_workers(started)
        pool.shutdown(wait=True, cancel_futures=True)
        for p in workers:
            p.join(STOP_WAIT_S)
        raise
    pool.shutdown(wait=True)


STOP_WAIT_S = 30.0  # seconds a stopped worker may take to clean up before it is left behind


def _stop_workers(started) -> list:
    """Send SIGTERM to every worker of this pool (they said their ids in ``started``); return them."""
    import multiprocessing

    pids = set()
    while not started.empty():
        pids.add(started.get())
    workers = [p for p in multiprocessing.active_children() if p.pid in pids]
    for p in workers:
        p.terminate()
    return workers


class WorkerStopped(KeyboardInterrupt):
    """Raised inside a worker process told to stop (SIGTERM from the parent)."""


_stopped = False  # in a worker: set once it has been told to stop


def _stop_worker(signum, frame):
    import signal

    global _stopped
    # once only: a second SIGTERM (the pool stopping its workers again) must not interrupt the
    # clean-up the first one started (removing a temporary file)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    _stopped = True
    raise WorkerStopped()


def _task(fn: Callable, args: tuple):
    """Run one task in a worker; a worker that was told to stop starts nothing new."""
    if _stopped:
        raise WorkerStopped()
    try:
        return fn(*args)
    finally:
        if _stopped:  # the clean-up is done: a further SIGTERM may end this process outright
            import signal

            signal.signal(signal.SIGTERM, signal.SIG_DFL)


def _worker_signals(started, one_thread: bool = False) -> None:
    """In each worker: say its process id, ignore Ctrl-C (the parent decides), turn SIGTERM into an
    exception that unwinds cleanly; with ``one_thread``, run numba's parallel loops (ViSQOL's) on one
    thread, since the workers are the parallelism (two workers of two threads on two cores took 27%
    longer than one process)."""
    import signal

    started.put(os.getpid())
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, _stop_worker)
    if one_thread:
        import numba

        numba.set_num_threads(1)


def in_order(fn: Callable, arg_tuples: Sequence[tuple], *, workers: int = 1, scheduler: Optional[str] = None, on_done: Optional[Callable[[], None]] = None) -> list:
    """``[fn(*a) for a in arg_tuples]``, computed by :func:`as_done`; ``on_done()`` after each."""
    out: list = [None] * len(arg_tuples)
    for i, r in as_done(fn, arg_tuples, workers=workers, scheduler=scheduler):
        out[i] = r
        if on_done:
            on_done()
    return out


SCHEDULER_ADDRESS = re.compile(r"(?:[a-z][a-z0-9+]*://)?(?:\[[^\]]+\]|[^:/\[\]\s]+):\d{1,5}")  # [tcp://]HOST:PORT


def dask_client(scheduler: str):
    """A dask.distributed client for the scheduler at ``scheduler``; InputError if malformed or unreachable."""
    if not SCHEDULER_ADDRESS.fullmatch(scheduler):
        # checked before dask sees it: a client that fails inside its constructor hangs the exit for 20 s
        raise InputError(f"--scheduler {scheduler!r} must look like tcp://HOST:PORT, e.g. tcp://10.0.0.5:8786")
    try:
        from distributed import Client
    except ImportError as e:
        raise InputError(f"a dask scheduler needs dask.distributed: pip install 'nenv[cluster]' ({e})") from e
    try:
        return Client(scheduler, timeout="10s", set_as_default=False)
    except (OSError, TimeoutError, ValueError) as e:
        raise InputError(f"cannot reach the dask scheduler at {scheduler!r}: {e}") from e


def _dask(fn: Callable, arg_tuples: Sequence[tuple], scheduler: str) -> Iterator[tuple[int, object]]:
    client = dask_client(scheduler)
    try:
        from distributed import as_completed

        with client.as_current():  # only while setting up: between results the caller's dask work is its own
            futures = [client.submit(fn, *args, pure=False) for args in arg_tuples]
            finishing = as_completed(futures)
        index = {f.key: i for i, f in enumerate(futures)}
        try:
            for fut in finishing:
                yield index[fut.key], fut.result()
        except BaseException:
            client.cancel(futures)
            raise
    finally:
        client.close()
