"""The benchmark harness runs end to end in quick mode and all contenders agree.

No timing is asserted here: speed is reported by ``python -m benchmarks.run``
(ratios against the naive loops measured in the same run), never tested.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

# Several processes or a full harness run: with the slow tests (`python -m pytest -m slow`).
pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def quick_results(tmp_path_factory):
    out = tmp_path_factory.mktemp("bench") / "quick.json"
    env = dict(os.environ)
    env.pop("JAX_NUM_CPU_DEVICES", None)
    env.pop("XLA_FLAGS", None)
    done = subprocess.run(
        [sys.executable, "-m", "benchmarks.run", "--quick", "--devices", "2", "--out", str(out)],
        cwd=ROOT,
        env=env,
        capture_output=True,
        text=True,
        timeout=900,
        check=False,
    )
    assert done.returncode == 0, done.stderr[-4000:]
    assert "vs (a)" in done.stdout  # the table was printed
    return json.loads(out.read_text())


def _cases(results):
    work = results["workloads"]
    for key in ("W1", "W3"):
        for form in ("X @ theta", "theta0 + theta1 * x"):
            yield f"{key} {form}", work[key][form]
    yield "W2", work["W2"]
    yield "W4", work["W4"]


def test_machine_and_settings_are_recorded(quick_results):
    machine = quick_results["machine"]
    for key in ("date", "cpu_model", "logical_cores", "memory_gib", "jax", "jaxlib", "numpy"):
        assert machine[key] not in (None, "")
    assert quick_results["settings"]["quick"] is True
    assert quick_results["settings"]["devices"] == 2


def test_basinview_and_both_baselines_compute_the_same_numbers(quick_results):
    for name, rec in _cases(quick_results):
        # Surfaces agree to float32 rounding; sweeps accumulate rounding over steps.
        tol = 1e-5 if name.startswith(("W1", "W2")) else 1e-4
        assert rec["max_rel_diff_a"] <= tol, (name, rec["max_rel_diff_a"])
        assert rec["max_rel_diff_b"] <= tol, (name, rec["max_rel_diff_b"])
        # Two devices give exactly the numbers of one.
        assert rec["max_rel_diff_1_device"] == 0.0, name
        for contender in ("basinview", "basinview_1_device", "a_jax_loop", "b_numpy_loop"):
            assert rec[contender]["median_seconds"] > 0


def test_flops_and_memory_are_reported(quick_results):
    work = quick_results["workloads"]
    assert work["matmul"]["peak_gflops"] > 0
    for form in ("X @ theta", "theta0 + theta1 * x"):
        assert work["W1"][form]["percent_of_matmul"] > 0
    cases = work["W6"]["surfaces"] + work["W6"]["basin_maps"]
    assert len(cases) == 2
    for case in cases:
        for run in ("first_run", "second_run"):
            assert 0 < case[run]["peak_rss_mib"] < 2048
            # The kernel's RSS counters are batched per CPU (tens of pages), so a run that
            # adds nothing can read a few KiB below its start: allow 1 MiB of that noise.
            assert case[run]["added_peak_mib"] >= -1.0 or not case[run]["peak_reset"]


def test_explorer_interaction_is_measured_and_compiles_nothing_after_warm_up(quick_results):
    rec = quick_results["workloads"]["W5"]
    lr = rec["learning_rate_change"]
    assert lr["full"]["changes"] == 8
    assert 0 < lr["full"]["min_ms"] <= lr["full"]["median_ms"] <= lr["full"]["max_ms"]
    assert lr["compilations"] == 0
    mixed = rec["mixed_changes"]
    assert len(mixed["changes"]) == 20
    assert {"learning rate", "momentum", "click", "random starts"} <= set(mixed["latency"])
    # Choosing momentum in the warm-up compiles; the 20 changes after it do not.
    assert mixed["warm_up_compilations"] >= 1
    assert mixed["compilations"] == 0
    assert rec["build"]["compilations"] >= 1
