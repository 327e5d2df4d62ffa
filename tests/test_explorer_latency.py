"""W8's benchmark runs at smoke size and its structural facts hold (no timing asserted).

``python -m benchmarks.explorer_latency`` measures how fast the Explorer
answers a change; here the same functions run on the quickstart's problem
at tiny sizes (11 x 11 surface, 20 steps), and the test checks what must
hold whatever the machine's speed: after a warm-up over the run-count
buckets, no start count from 1 to 64 compiles anything, nor do learning-rate
and plane changes; each change reran exactly the stages it needs; the
stage breakdown nests inside the measured change; and the record has every
field the docs table reads.
"""

from __future__ import annotations

import json

import pytest

from benchmarks.docs import latency_markdown
from benchmarks.explorer_latency import latency_record

# Several processes or a full harness run: with the slow tests (`python -m pytest -m slow`).
pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def record():
    return latency_record(quick=True, scenarios=["quickstart"])


@pytest.fixture(scope="module")
def quickstart(record):
    return record["scenarios"]["quickstart"]


def test_start_counts_1_to_64_compile_nothing_after_the_warm_up(quickstart):
    counts = quickstart["start_count_change"]
    # Goal of issue 13 (W8): start counts 1-64 compile nothing after warm-up.
    assert sorted(counts["order"]) == list(range(1, 65))
    assert counts["changes"] == 64
    assert sorted(map(int, counts["compilations_by_runs"])) == list(range(1, 65))
    assert counts["compilations"] == 0, counts["compilations_by_runs"]
    # The counter does see the Explorer's programs: buckets above the padding
    # floor compile once each in the warm-up (a zero above is not a blind counter).
    assert counts["run_floor"] >= 1
    assert counts["warm_up_compilations"] >= 1


def test_rate_and_plane_changes_compile_nothing_and_rerun_only_their_stages(quickstart):
    rate = quickstart["learning_rate_change"]
    assert rate["compilations"] == 0
    # A learning rate changes the runs and what is found from them, not the slice.
    assert rate["stages_run"] == ["minima", "runs"]
    for kind in ("random_plane_new_seed", "axes_plane_new_pair"):
        plane = quickstart["plane_change"][kind]
        assert plane["compilations"] == 0, kind
        assert plane["stages_run"] == ["minima", "plane", "runs", "starts", "surface"], kind


def test_the_breakdown_nests_inside_each_change(quickstart):
    for summary in (
        quickstart["learning_rate_change"],
        quickstart["plane_change"]["random_plane_new_seed"],
        quickstart["plane_change"]["axes_plane_new_pair"],
    ):
        parts = summary["breakdown_median_ms"]
        assert all(parts[p] >= 0 for p in parts if p != "other"), parts
        # every part is timed inside the change, so what is left is never negative
        assert summary["other_min_ms"] > -0.05, summary
        assert parts["figure_build"] > 0 and parts["to_plot_model"] > 0
        assert summary["min_ms"] <= summary["median_ms"] <= summary["max_ms"]


def test_the_record_has_what_the_docs_table_and_notes_read(record, quickstart):
    text = json.dumps(record)  # plain JSON, as the results file is written
    again = json.loads(text)
    for key in ("date", "cpu_model", "logical_cores", "jax"):
        assert again["machine"][key] not in (None, "")
    assert len(again["machine"]["load_average_at_start"]) == 3
    assert len(again["machine"]["load_average_at_end"]) == 3
    table = "\n".join(latency_markdown(again))
    assert "## W8" in table
    median = quickstart["learning_rate_change"]["median_ms"]
    assert f"| {median:.0f} ms |" in table or f"| {median:.3g} ms |" in table
    assert table.count("| quickstart (2 parameters) |") == 4
    assert again["verdict"]["quickstart"]["start_count_goal_met"] is True
    assert any(n.startswith("quickstart: learning-rate change") for n in again["notes"])
    bare = quickstart["bare_descent"]
    assert bare["runs"] == quickstart["view"]["n_starts"] and bare["steps"] == 20
    costs = quickstart["figure_costs"]
    assert costs["traces"] > costs["runs"] > 0  # a path per run, and the surface
