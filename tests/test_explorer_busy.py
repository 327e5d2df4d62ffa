"""Long work in the Explorer: a worker thread, progress, cancel, and older results kept apart.

No browser: the buttons are pressed through ipywidgets' public ``click()``
and the figures read from the widget data. The worker is the one the
Explorer uses in a notebook (a thread); the tests wait on it, never sleep
for a fixed time.
"""

from __future__ import annotations

import threading

import numpy as np
import pytest

from basinview import Explorer
from basinview.explorer.tasks import Cancelled, Worker
from basinview.scenarios import beacon


@pytest.fixture(scope="module")
def problem():
    return beacon().problem


@pytest.fixture
def explorer(problem):
    return Explorer(
        problem,
        x="x",
        y="y",
        origin=np.array([5.0, 0.0]),
        span=((-7.0, 7.0), (-6.0, 6.0)),
        resolution=21,
        learning_rate=0.2,
        steps=60,
        n_starts=4,
        start_scale=4.0,
    )


def test_worker_stops_at_the_next_call_boundary_and_reports_once():
    reports, done = [], []
    started, release = threading.Event(), threading.Event()

    def task(progress):
        for i in range(100):
            progress(i, 100, "calls")
            if i == 2:
                started.set()
                release.wait(5)
        return "finished"

    worker = Worker(reports.append, lambda *a: done.append(a))
    worker.start("long", task)
    assert started.wait(5)
    worker.cancel()
    release.set()
    worker.wait(5)
    assert not worker.busy
    ((name, result, error, current, latest),) = done
    assert latest and not current
    assert name == "long" and result is None and isinstance(error, Cancelled)
    assert [r.done for r in reports] == [0, 1, 2]  # nothing ran after the cancel


def test_a_change_makes_a_running_task_not_current():
    done = []
    release = threading.Event()
    worker = Worker(lambda p: None, lambda *a: done.append(a))
    worker.start("slow", lambda progress: release.wait(5) and "value")
    worker.bump()  # a view change while it runs
    release.set()
    worker.wait(5)
    assert done == [("slow", "value", None, False, True)]


def test_basin_map_runs_in_the_worker_with_progress_and_status(explorer):
    seen = []
    explorer.progress.observe(lambda c: seen.append(c["new"]), names="value")
    explorer.basins_resolution.value = 9
    explorer.basins_button.click()
    explorer.wait(120)
    assert explorer.view.value == "basins"
    assert "basin map" in explorer.status.value and "81 starts" in explorer.status.value
    assert explorer.describe() in explorer.status.value
    assert seen and seen[-1] == explorer.progress.max  # the bar reached its end
    assert explorer.progress.layout.visibility == "hidden"  # and went away
    assert explorer.cancel_button.disabled


def test_cancel_keeps_the_last_good_view(explorer, monkeypatch):
    before = (explorer.side.traces, explorer.main.traces, explorer.main.grids)
    entered, release = threading.Event(), threading.Event()
    original = explorer.computer.basins

    def slow_basins(resolution, progress=False):
        def gate(done, total, what):
            if done == 0:
                entered.set()
                release.wait(10)  # the first compiled call "runs" until released
            progress(done, total, what)

        return original(resolution, progress=gate)

    monkeypatch.setattr(explorer.computer, "basins", slow_basins)
    explorer.basins_resolution.value = 9
    explorer.basins_button.click()
    assert entered.wait(60)
    assert not explorer.cancel_button.disabled
    explorer.cancel_button.click()
    release.set()
    explorer.wait(60)
    assert not explorer.busy
    assert "cancelled" in explorer.status.value and explorer.describe() in explorer.status.value
    assert explorer._basins is None  # nothing of the cancelled map is kept
    assert (explorer.side.traces, explorer.main.traces, explorer.main.grids) == before


def test_a_control_change_during_long_work_wins_the_status_line(explorer, monkeypatch):
    entered, release = threading.Event(), threading.Event()
    original = explorer.computer.sweep

    def slow_sweep(rates, progress=None):
        entered.set()
        release.wait(10)
        return original(rates, progress=progress)

    monkeypatch.setattr(explorer.computer, "sweep", slow_sweep)
    explorer.sweep_button.click()
    assert entered.wait(60)
    # the sweep is still running when the learning rate changes: the change cancels it
    # and waits for it to stop; the sweep's end (for the old rate) writes nothing
    threading.Timer(0.5, release.set).start()
    explorer.controls.learning_rate.value = 0.1
    explorer.wait(60)
    status = explorer.status.value
    assert "learning rate 0.1," in status and "updated runs, minima" in status
    assert "step sizes" not in status and "cancelled" not in status
    assert explorer.state.learning_rate == pytest.approx(0.1)
    assert explorer._sweep is None  # the sweep for the old rate was not kept


def test_an_error_in_long_work_reaches_the_status_line(explorer, monkeypatch):
    def broken(resolution, progress=False):
        raise RuntimeError("simulated failure in the worker")

    monkeypatch.setattr(explorer.computer, "basins", broken)
    explorer.basins_button.click()
    explorer.wait(60)
    assert "unexpected RuntimeError: simulated failure in the worker" in explorer.status.value
    assert "simulated failure" in explorer.last_error
    assert explorer.cancel_button.disabled
    with pytest.raises(RuntimeError, match="simulated"):  # called from code: raised too
        explorer.map_basins(9)
