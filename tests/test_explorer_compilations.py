"""Explorer changes reuse compiled programs: values are traced, run counts bucketed.

No timing here (speed is measured by ``python -m benchmarks.run --only W5``):
these tests count XLA compilations while the controls are moved the way a
user moves them, and check that every change still took effect.
"""

from __future__ import annotations

import numpy as np
import pytest

from basinview import Explorer
from basinview.core import count_compilations, descend, run_padding_floor
from basinview.scenarios import beacon


@pytest.fixture
def explorer():
    problem = beacon().problem  # a fresh problem: its compile memo starts empty
    return Explorer(
        problem,
        x="x",
        y="y",
        origin=np.array([5.0, 0.0]),
        span=((-7.0, 7.0), (-6.0, 6.0)),
        resolution=21,
        learning_rate=0.2,
        steps=150,
        n_starts=6,
        start_scale=4.0,
    )


def _click(explorer, a, b):
    message = {"kind": "click", "x": a, "y": b, "uid": "slice-surface"}
    explorer.main.receive(explorer.main, message, [])


def _momentum(explorer):
    (control,) = explorer.controls.hyper_box.children
    assert control.description == "momentum"
    return control


def test_rate_momentum_and_start_changes_compile_nothing_after_warm_up(explorer):
    c = explorer.controls
    with count_compilations() as warm_up:
        c.optimizer.value = "momentum"  # another update rule: another program
        c.n_starts.value = 8  # run-count bucket 8 (6 runs use bucket 6)
        c.n_starts.value = 6
    assert warm_up.count >= 1  # the counter sees the Explorer's compilations

    changes = [
        (lambda: setattr(c.learning_rate, "value", 0.1), 6),
        (lambda: setattr(_momentum(explorer), "value", 0.5), 6),
        (lambda: _click(explorer, 8.0, 4.0), 7),
        (lambda: setattr(c.n_starts, "value", 5), 6),
        (lambda: setattr(c.start_seed, "value", 3), 6),
        (lambda: setattr(c.start_scale, "value", 2.0), 6),
        (lambda: _click(explorer, 2.0, -4.0), 7),
        (lambda: setattr(c.learning_rate, "value", 0.05), 7),
        (lambda: setattr(_momentum(explorer), "value", 0.8), 7),
        (lambda: c.clear_clicks.click(), 5),
        (lambda: setattr(c.n_starts, "value", 8), 8),
        (lambda: setattr(c.learning_rate, "value", 0.3), 8),
    ]
    runs_after = []
    with count_compilations() as counter:
        for change, _ in changes:
            before = explorer.results.runs
            change()
            after = explorer.results.runs
            assert "⚠" not in explorer.status.value, explorer.status.value
            assert after is not before  # descent ran again
            runs_after.append(len(after))
    assert counter.count == 0
    assert runs_after == [n for _, n in changes]

    state = explorer.state
    assert state.optimizer == "momentum"
    assert state.learning_rate == pytest.approx(0.3)
    assert state.hyper_dict == {"momentum": pytest.approx(0.8)}
    assert (state.n_starts, state.start_seed, state.start_scale) == (8, 3, 2.0)
    # The reused program ran with the new values: the same numbers as a direct call.
    runs = explorer.results.runs
    np.testing.assert_allclose(runs.hyper["learning_rate"], 0.3)
    np.testing.assert_allclose(runs.hyper["momentum"], 0.8)
    direct = descend(
        explorer.problem,
        explorer.results.starts,
        optimizer="momentum",
        learning_rate=0.3,
        hyper={"momentum": 0.8},
        steps=150,
        plane=explorer.results.plane,
    )
    np.testing.assert_array_equal(runs.final, direct.final)
    np.testing.assert_array_equal(runs.status, direct.status)


def test_run_counts_up_to_the_padding_floor_share_one_program(explorer):
    # The beacon is small, so the Explorer pads every sweep to 16 runs: any
    # start count from 1 to 16 runs the program the first view compiled.
    assert run_padding_floor(explorer.problem) == 16
    c = explorer.controls
    with count_compilations() as within:
        for n in (1, 3, 12, 16):
            c.n_starts.value = n
            assert len(explorer.results.runs) == n
    assert within.count == 0
    with count_compilations() as first:
        c.n_starts.value = 20  # 20 runs: the next bucket (24), not compiled yet
    assert first.count == 1
    assert len(explorer.results.runs) == 20
    with count_compilations() as again:
        c.n_starts.value = 24
        c.n_starts.value = 17  # padded to the same bucket of 24
        c.learning_rate.value = 0.4
    assert again.count == 0
    assert len(explorer.results.runs) == 17
