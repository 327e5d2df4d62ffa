"""Program sizes from the cost model: deterministic, never a chunk of 1 for a mid-sized
network, few compilations on a first call, large work split into several calls."""

from __future__ import annotations

import itertools
import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import sklearn.datasets

from basinview.core import (
    Problem,
    count_compilations,
    descend,
    evaluate_points,
    evaluate_surface,
    random_plane,
    step_size_sweep,
)
from basinview.core.cost_model import chunk_size_for, loss_cost
from basinview.core.points import points_sizes

ROOT = Path(__file__).resolve().parents[1]


def _mlp_problem(rows: int | None = None) -> Problem:
    # Source: sklearn.datasets.load_digits (8x8 digit images shipped with scikit-learn).
    x, y = sklearn.datasets.load_digits(return_X_y=True)
    x = (x / 16.0).astype(np.float32)[:rows]
    t = np.eye(10, dtype=np.float32)[y][:rows]
    sizes = [64, 128, 128, 10]
    rng = np.random.default_rng(0)
    params = [
        {"w": jnp.asarray(rng.standard_normal((a, b)) / np.sqrt(a), jnp.float32), "b": jnp.zeros(b)}
        for a, b in itertools.pairwise(sizes)
    ]

    def loss(p, x, t):
        h = x
        for layer in p[:-1]:
            h = jnp.tanh(h @ layer["w"] + layer["b"])
        z = h @ p[-1]["w"] + p[-1]["b"]
        return -jnp.mean(jnp.sum(t * jax.nn.log_softmax(z), axis=1))

    return Problem(loss, params, x, t)


def test_flops_of_a_matrix_vector_loss_follow_the_2mk_count():
    # common practice: an (m, k) @ (k,) product costs 2 m k floating-point operations.
    x = np.ones((100, 8), np.float32)
    prob = Problem(lambda w, x: jnp.sum(x @ w), jnp.zeros(8), x)
    flops = loss_cost(prob).flops
    assert 2 * 100 * 8 <= flops <= 2 * 100 * 8 + 200  # the product plus the sum


def test_a_mid_sized_network_gets_a_vectorised_chunk_without_compiling():
    prob = _mlp_problem()
    assert prob.size == 64 * 128 + 128 + 128 * 128 + 128 + 128 * 10 + 10  # 26,122 parameters
    with count_compilations() as counter:
        chunk = chunk_size_for(prob)
        plan = points_sizes(prob, 801 * 801)
    assert counter.count == 0  # read off the traced program only
    assert chunk >= 16
    assert plan.chunk == chunk and plan.block % chunk == 0
    assert plan.block < 801 * 801  # a large grid takes several calls
    assert points_sizes(prob, 801 * 801) == plan  # the same sizes every time


def test_first_surface_and_first_sweep_compile_at_most_two_programs():
    prob = _mlp_problem(rows=400)
    plane = random_plane(prob, seed=0)
    with count_compilations() as surface:
        evaluate_surface(prob, plane, span=1.0, resolution=9)
    assert surface.count <= 2
    fresh = _mlp_problem(rows=400)
    with count_compilations() as sweep:
        step_size_sweep(fresh, fresh.params, learning_rates=[0.1, 1.0], steps=10)
    assert sweep.count <= 2


def _bowl() -> Problem:
    return Problem(lambda p: (p[0] - 1.0) ** 2 + 3.0 * jnp.sin(p[1]) ** 2, jnp.zeros(2))


def test_a_large_grid_runs_in_several_calls_with_the_one_call_values():
    prob = _bowl()
    ab = np.random.default_rng(1).uniform(-3, 3, (200_000, 2)).astype(np.float32)
    origin, d1, d2 = np.zeros(2), np.eye(2)[0], np.eye(2)[1]
    plan = points_sizes(prob, len(ab), devices=1)
    assert -(-len(ab) // plan.block) >= 3  # split into several calls
    split = evaluate_points(prob, origin, d1, d2, ab, devices=1)
    whole = evaluate_points(
        prob, origin, d1, d2, ab, devices=1,
        sizes={"surface_chunk": plan.chunk, "surface_block": 2**18},
    )  # fmt: skip
    np.testing.assert_array_equal(split, whole)
    # The exact values (independent of the engine).
    np.testing.assert_allclose(
        split, (ab[:, 0] - 1) ** 2 + 3 * np.sin(ab[:, 1]) ** 2, rtol=2e-6, atol=1e-6
    )


def test_runs_split_over_several_calls_equal_one_call():
    prob = _bowl()
    starts = np.random.default_rng(2).uniform(-2, 2, (40, 2)).astype(np.float32)
    kw = {"learning_rate": [0.05, 0.2], "steps": 60, "devices": 1}
    many = descend(prob, starts, sizes={"descent_runs_per_call": 8, "descent_group": 0}, **kw)
    one = descend(prob, starts, **kw)
    assert one.config.sizes.runs_per_call >= 80 > many.config.sizes.runs_per_call
    for name in ("final", "losses", "path", "stop_step", "status"):
        np.testing.assert_array_equal(getattr(many, name), getattr(one, name))


class _Interrupting:
    """A stand-in progress bar that presses Ctrl-C after its second update."""

    def __init__(self, *args, **kwargs):
        self.n = 0

    def update(self, n=1):
        self.n += n
        if self.n == 2:
            raise KeyboardInterrupt

    def close(self):
        pass


def test_an_interrupt_between_calls_leaves_earlier_results_and_the_problem_intact(monkeypatch):
    prob = _bowl()
    plane = random_plane(prob, seed=0, normalise="none")
    before = evaluate_surface(prob, plane, span=2.0, resolution=801)
    kept = before.loss.copy()
    monkeypatch.setattr("tqdm.auto.tqdm", _Interrupting)
    with pytest.raises(KeyboardInterrupt):
        evaluate_surface(prob, plane, span=2.0, resolution=801, progress=True)
    monkeypatch.undo()
    np.testing.assert_array_equal(before.loss, kept)
    with count_compilations() as counter:
        after = evaluate_surface(prob, plane, span=2.0, resolution=801)
    assert counter.count == 0
    np.testing.assert_array_equal(after.loss, kept)


_SESSION = textwrap.dedent(
    """
    import hashlib, json, sys
    import jax.numpy as jnp, numpy as np
    from basinview.core import (Problem, Settings, compute_view, descend, evaluate_surface,
                                random_plane, random_starts, record_settings)

    def loss(p, x, y):
        return jnp.mean((jnp.tanh(x @ p["w"]) @ p["v"] - y) ** 2)

    rng = np.random.default_rng(0)
    x = rng.standard_normal((64, 5)).astype(np.float32)
    y = np.sin(x[:, 0]).astype(np.float32)
    prob = Problem(loss, {"w": jnp.zeros((5, 6)) + 0.1, "v": jnp.zeros(6)}, x, y)
    mode, path = sys.argv[1], sys.argv[2]

    def digest(surface, runs):
        h = hashlib.sha256(surface.loss.tobytes())
        for a in (runs.final, runs.losses, runs.path):
            h.update(np.ascontiguousarray(a).tobytes())
        return h.hexdigest()

    if mode == "record":
        plane = random_plane(prob, seed=3)
        starts = random_starts(prob, 5, scale=0.5, seed=1)
        surface = evaluate_surface(prob, plane, span=1.0, resolution=33, tune=True)
        runs = descend(prob, starts, learning_rate=[0.05, 0.2], steps=40, plane=plane, tune=True)
        s = record_settings(prob, plane=plane, span=1.0, resolution=33, starts=starts,
                            runs=runs, surface=surface)
        open(path, "w").write(s.to_json())
        print(json.dumps({"digest": digest(surface, runs), "sizes": s.sizes}))
    else:
        view = compute_view(prob, Settings.from_json(open(path).read()))
        print(json.dumps({"digest": digest(view.surface, view.runs),
                          "sizes": {**view.runs.config.sizes.record(), **view.surface.sizes}}))
    """
)


def _session(*args: str) -> dict:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    out = subprocess.run(
        [sys.executable, "-c", _SESSION, *args], capture_output=True, text=True, env=env,
        timeout=300, check=True,
    )  # fmt: skip
    return json.loads(out.stdout.strip().splitlines()[-1])


@pytest.mark.slow
def test_recorded_sizes_give_bit_identical_results_in_a_new_session(tmp_path):
    path = str(tmp_path / "view.json")
    recorded = _session("record", path)
    assert set(recorded["sizes"]) == {
        "surface_chunk", "surface_block", "descent_runs_per_call", "descent_group",
    }  # fmt: skip
    replayed = _session("replay", path)
    assert replayed["sizes"] == recorded["sizes"]
    assert replayed["digest"] == recorded["digest"]
