"""nenv.serve.parallel on its own: what a Ctrl-C does to tasks already running in worker processes."""

from __future__ import annotations

import os
import sys
import time
import types
from pathlib import Path

import pytest

from nenv.serve import parallel


def _stoppable(kind: str, marker: str, seconds: float) -> str:
    """A task for the worker pool: "quick" returns at once; "slow" says it started, then waits up to
    ``seconds`` and writes what ended it to ``marker``: "finished", or "stopped" when its worker was told
    to stop (the exception SIGTERM raises in a worker unwinds through here, as through a file write)."""
    if kind == "quick":
        return kind
    Path(marker + ".started").touch()
    try:
        end = time.monotonic() + seconds
        while time.monotonic() < end:
            time.sleep(0.01)
        Path(marker).write_text("finished")
    except BaseException:
        Path(marker).write_text("stopped")
        raise
    return kind


def test_ctrl_c_stops_the_tasks_that_are_running_and_they_clean_up(tmp_path):
    """A KeyboardInterrupt in the parent while a task runs in a worker: the worker is told to stop
    (SIGTERM), the task unwinds through its clean-up, and the interrupt reaches the caller. Without
    the stop the pool would wait for the task to end by itself (here after 20 s, "finished")."""
    marker = str(tmp_path / "slow")
    gen = parallel.as_done(_stoppable, [("quick", "", 0.0), ("slow", marker, 20.0)], workers=2)
    assert next(gen) == (0, "quick")
    deadline = time.monotonic() + 20
    while not Path(marker + ".started").exists() and time.monotonic() < deadline:
        time.sleep(0.01)
    assert Path(marker + ".started").exists()
    with pytest.raises(KeyboardInterrupt):
        gen.throw(KeyboardInterrupt)
    assert Path(marker).read_text() == "stopped"


def test_results_are_tagged_with_their_inputs_index_in_any_arrangement():
    args = [("quick", "", 0.0)] * 5
    for workers in (1, 2):
        assert sorted(parallel.as_done(_stoppable, args, workers=workers)) == [(i, "quick") for i in range(5)]
    assert parallel.in_order(_stoppable, args, workers=2) == ["quick"] * 5


_SEEN_BY_WORKERS: list = []  # set by a test in this process; a forked worker inherits it, a spawned one starts empty


def _where(_: int) -> tuple[int, list, int]:
    """A task that says which process ran it, what it inherited, and on how many threads numba runs."""
    import numba

    return os.getpid(), list(_SEEN_BY_WORKERS), numba.get_num_threads()


def test_work_runs_in_this_process_unless_there_are_workers_and_tasks_to_share():
    """One worker, or one task, runs here with no pool to start; two workers with several tasks run
    elsewhere; 0 workers means one per core."""
    here = os.getpid()
    one = [(0,)]
    three = [(0,), (1,), (2,)]
    assert {r[0] for _, r in parallel.as_done(_where, three)} == {here}  # the default: in this process
    assert {r[0] for _, r in parallel.as_done(_where, three, workers=1)} == {here}
    assert [r[0] for _, r in parallel.as_done(_where, one, workers=2)] == [here]
    assert here not in {r[0] for _, r in parallel.as_done(_where, three, workers=2)}
    per_core = {r[0] for _, r in parallel.as_done(_where, three, workers=0)}
    assert (here in per_core) == ((os.cpu_count() or 1) == 1)


def test_one_per_core_is_one_where_the_system_does_not_say_how_many_cores(monkeypatch):
    monkeypatch.setattr(parallel, "os", types.SimpleNamespace(cpu_count=lambda: None))  # this module's view only
    assert {r[0] for _, r in parallel.as_done(_where, [(0,), (1,), (2,)], workers=0)} == {os.getpid()}


def test_workers_are_copies_of_this_process_unless_asked_to_start_fresh(monkeypatch):
    """By default (Linux) workers are forked: they see what this process holds. ``fresh``: new
    interpreters (spawn), which do not, and run numba's parallel loops on one thread."""
    import multiprocessing

    if "fork" not in multiprocessing.get_all_start_methods():
        assert parallel._context(False).get_start_method() == "spawn"
        pytest.skip("this system cannot fork workers")
    assert parallel._context(False).get_start_method() == "fork"
    assert parallel._context(True).get_start_method() == "spawn"
    import numba

    monkeypatch.setattr(sys.modules[__name__], "_SEEN_BY_WORKERS", ["held here"])
    forked = [r for _, r in parallel.as_done(_where, [(0,), (1,)], workers=2)]
    assert all(seen == ["held here"] and threads == numba.get_num_threads() for _, seen, threads in forked)
    fresh = [r for _, r in parallel.as_done(_where, [(0,), (1,)], workers=2, fresh=True)]
    assert all(pid != os.getpid() and seen == [] and threads == 1 for pid, seen, threads in fresh)


def test_a_pool_that_has_given_every_result_has_no_worker_left():
    """Once the last result is out, the pool's workers have ended (nothing is left running behind a
    finished batch or corpus survey)."""
    pids = {r[0] for _, r in parallel.as_done(_where, [(0,), (1,), (2,)], workers=2)}
    assert pids and os.getpid() not in pids
    alive = []
    for pid in pids:
        try:
            os.kill(pid, 0)
            alive.append(pid)
        except ProcessLookupError:
            pass
    assert alive == []


def test_a_worker_ignores_ctrl_c_and_turns_the_first_sigterm_into_an_exception(monkeypatch):
    """What each worker sets up, run here with this process's handlers put back afterwards: it says
    its process id, ignores SIGINT (the parent decides), and its SIGTERM handler raises WorkerStopped
    once, then ignores further SIGTERMs until the running task's clean-up is done; after that a task
    is not started, and SIGTERM ends the process outright again."""
    import queue
    import signal

    import numba

    saved = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)}
    threads = numba.get_num_threads()
    monkeypatch.setattr(parallel, "_stopped", False)
    try:
        said = queue.SimpleQueue()
        parallel._worker_signals(said)
        assert said.get_nowait() == os.getpid()
        assert signal.getsignal(signal.SIGINT) is signal.SIG_IGN and signal.getsignal(signal.SIGTERM) is parallel._stop_worker
        assert numba.get_num_threads() == threads  # not asked for one thread
        assert parallel._task(lambda a, b: a + b, (2, 3)) == 5
        with pytest.raises(parallel.WorkerStopped):
            parallel._stop_worker(signal.SIGTERM, None)
        assert parallel._stopped and signal.getsignal(signal.SIGTERM) is signal.SIG_IGN  # a second SIGTERM cannot cut the clean-up short
        ran = []
        with pytest.raises(parallel.WorkerStopped):
            parallel._task(ran.append, (1,))
        assert ran == [] and signal.getsignal(signal.SIGTERM) is signal.SIG_IGN
        monkeypatch.setattr(parallel, "_stopped", False)

        def told_to_stop_while_running():
            parallel._stop_worker(signal.SIGTERM, None)

        with pytest.raises(parallel.WorkerStopped):
            parallel._task(told_to_stop_while_running, ())
        assert signal.getsignal(signal.SIGTERM) is signal.SIG_DFL  # its clean-up done: a further SIGTERM ends the worker
        parallel._worker_signals(queue.SimpleQueue(), True)
        assert numba.get_num_threads() == 1
    finally:
        numba.set_num_threads(threads)
        for s, handler in saved.items():
            signal.signal(s, handler)


def _square(v: int) -> int:
    return v * v


def test_in_order_keeps_the_inputs_order_and_says_each_is_done(monkeypatch):
    ticks = []
    assert parallel.in_order(_square, [(3,), (1,), (2,)], on_done=lambda: ticks.append(1)) == [9, 1, 4]
    assert len(ticks) == 3
    monkeypatch.setattr(parallel, "as_done", lambda fn, args, workers, scheduler: iter([(1, "b"), (0, "a")]))
    assert parallel.in_order(_square, [(0,), (1,)]) == ["a", "b"]  # results put back in the inputs' order
    seen = {}
    monkeypatch.setattr(parallel, "as_done", lambda fn, args, workers, scheduler: seen.update(workers=workers) or iter(()))
    parallel.in_order(_square, [])
    assert seen == {"workers": 1}  # in this process unless asked


def test_a_cluster_runs_equal_inputs_as_separate_tasks_and_leaves_no_client_behind():
    """On a dask cluster two tasks with equal arguments are two tasks (not one result shared under one
    key, which would leave an input without its result); the client is closed when the results are in,
    and never becomes this process's default client (which would send other dask work there)."""
    distributed = pytest.importorskip("distributed")
    made = []
    real = parallel.dask_client

    def spy(address):
        made.append(real(address))
        return made[-1]

    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False, protocol="tcp", dashboard_address=None) as cluster:
        with pytest.MonkeyPatch.context() as m:
            m.setattr(parallel, "dask_client", spy)
            results = parallel.as_done(_square, [(3,), (3,), (2,)], scheduler=cluster.scheduler_address)
            got = [next(results)]
            with pytest.raises(ValueError):
                distributed.default_client()  # not while the tasks run either
            got = sorted(got + list(results))
        assert got == [(0, 9), (1, 9), (2, 4)]
        assert len(made) == 1 and made[0].status == "closed"
        with pytest.raises(ValueError):
            distributed.default_client()
