"""nenv.serve.parallel on its own: what a Ctrl-C does to tasks already running in worker processes."""

from __future__ import annotations

import time
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
