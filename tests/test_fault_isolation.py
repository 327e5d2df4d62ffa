"""Fault isolation: faults injected into batches, grids and losses stay where they are.

Faults injected here, and how many (``FAULTS`` below is the ledger; each test
asserts its own counts, so the table in docs/testing.md is checked data):

* runs that diverge (learning rate far beyond the stability bound), runs that
  start where the loss is NaN or inf, and runs that walk into such a region
  mid-run, all inside one batch of 256 runs;
* grid points and segment points where the loss is NaN or inf;
* basin-map starts in a NaN region;
* runs that step out of the loss's domain (a log barrier gives NaN there:
  the JAX way of "raising" for some inputs at run time);
* diverging runs beside minibatch runs;
* property-based mixed batches (hypothesis): at least one diverging
  learning rate per example, for gradient descent, heavy ball and Nesterov.

"Alone" means: the run with no other run in its batch. A batch of one is a
differently compiled program (no vector lanes), and XLA rounds it
differently at the level of a few ulp (measured: float32 values within
3e-6 relative, identical statuses and stop steps). So each run is compared
bit for bit with a batch of the same shape that holds only copies of that
run, and to rounding with a true batch of one.
"""

from __future__ import annotations

import jax.numpy as jnp
import numpy as np
import pytest
import sklearn.datasets
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from basinview.core import (
    DIVERGED_LABEL,
    Problem,
    axes_plane,
    basin_map,
    descend,
    evaluate_surface,
    find_minima,
    hessian_spectrum,
    segment_profile,
)

from .conftest import himmelblau, quadratic
from .test_descent_vs_numpy import np_gd, np_heavy_ball, np_nesterov
from .test_reference_minima import HIMMELBLAU_MINIMA

# These tests repeat learning rates on purpose (a clean batch with the same run
# numbers as a faulty one); descend warns that repeats redo work.
pytestmark = pytest.mark.filterwarnings("ignore:learning_rate repeats the values")

# Fault ledger: what was injected, how often. Each test asserts its own entries.
FAULTS = {
    "batch-start-in-nan-or-inf": (
        "runs of the 256-run batch starting where the loss is NaN/inf",
        40,
    ),
    "batch-learning-rate-beyond-bound": ("runs of the batch with lr 0.5 or 3.0 (beyond 2/L)", 128),
    "batch-walk-into-nan": ("runs of the batch that walk into the NaN region mid-run", 26),
    "surface-nan-points": ("grid points of a 48 x 48 surface where the loss is NaN", 480),
    "surface-inf-points": ("grid points where the loss is +inf (gaps too)", 228),
    "profile-nan-points": ("points of a segment profile inside the NaN region", 47),
    "basin-starts-in-nan": ("basin-map starts (of 121) in the NaN or inf region", 31),
    "domain-exits": ("runs that step out of a log barrier's domain (NaN)", 16),
    "minibatch-diverging": ("diverging runs beside minibatch runs", 4),
}


def fault_count(key: str) -> int:
    return FAULTS[key][1]


def _holey(p):
    """Himmelblau, NaN where x > 3.5 and +inf where y < -4.5 (and x <= 3.5)."""
    f = himmelblau(p)
    f = jnp.where(p["y"] < -4.5, jnp.inf, f)
    return jnp.where(p["x"] > 3.5, jnp.nan, f)


def _rows_equal(a, b, r, s) -> None:
    """Run ``r`` of ``a`` equals run ``s`` of ``b`` bit for bit, in every record."""
    for name in ("losses", "grad_norms", "path", "off_plane", "cosines", "final"):
        x, y = getattr(a, name)[r], getattr(b, name)[s]
        assert np.array_equal(x, y, equal_nan=True), f"{name} of run {r} differs"
    assert a.status[r] == b.status[s] and a.stop_step[r] == b.stop_step[s]


# ------------------------------------------------------------- a big batch
@pytest.fixture(scope="module")
def batch():
    problem = Problem(_holey, {"x": 0.0, "y": 0.0})
    plane = axes_plane(problem, "x", "y")
    starts = np.random.default_rng(7).uniform(-5.0, 5.0, size=(64, 2)).astype(np.float32)
    rates = [0.002, 0.005, 0.5, 3.0]
    runs = descend(problem, starts, learning_rate=rates, steps=150, plane=plane)
    return problem, plane, starts, rates, runs


def test_the_batch_holds_the_injected_faults(batch):
    _, _, starts, _, runs = batch
    assert len(runs) == 256
    bad_start = (starts[:, 0] > 3.5) | (starts[:, 1] < -4.5)
    assert bad_start[runs.start_index].sum() == fault_count("batch-start-in-nan-or-inf")
    assert (runs.status[bad_start[runs.start_index]] == "diverged").all()
    assert (runs.stop_step[bad_start[runs.start_index]] == 0).all()
    high = runs.hyper["learning_rate"] >= 0.5
    assert high.sum() == fault_count("batch-learning-rate-beyond-bound")
    assert (runs.status[high] == "diverged").all()  # lr >= 0.5 > 2 / L near every minimum
    walked = (runs.status == "diverged") & ~high & ~bad_start[runs.start_index]
    assert walked.sum() == fault_count("batch-walk-into-nan")
    for r in np.flatnonzero(walked):  # they stopped where they stepped into the region
        assert runs.stop_step[r] > 0 and np.isnan(runs.losses[r, runs.stop_step[r]])
    counted = (
        fault_count("batch-start-in-nan-or-inf")
        + fault_count("batch-learning-rate-beyond-bound")
        + fault_count("batch-walk-into-nan")
        - (high & bad_start[runs.start_index]).sum()  # bad start and high rate: counted twice
    )
    assert (runs.status == "diverged").sum() == counted
    assert (runs.status != "diverged").sum() >= 64


def test_every_run_equals_itself_alone_bit_for_bit(batch):
    problem, plane, starts, _, runs = batch
    size = len(runs)
    for r in range(size):
        s, lr = runs.start_index[r], float(runs.hyper["learning_rate"][r])
        alone = descend(
            problem, np.repeat(starts[s : s + 1], size, 0), learning_rate=lr, steps=150, plane=plane
        )
        _rows_equal(runs, alone, r, 0)
        _rows_equal(alone, alone, size - 1, 0)  # every copy is the same run


def test_every_run_equals_a_batch_of_one_to_rounding(batch):
    problem, plane, starts, _, runs = batch
    for r in range(len(runs)):
        s, lr = runs.start_index[r], float(runs.hyper["learning_rate"][r])
        one = descend(problem, starts[s : s + 1], learning_rate=lr, steps=150, plane=plane)
        assert one.status[0] == runs.status[r] and one.stop_step[0] == runs.stop_step[r]
        stop = runs.stop_step[r]
        if runs.status[r] != "diverged":
            scale = np.maximum(1.0, np.abs(runs.losses[r, : stop + 1]))
            assert np.all(
                np.abs(one.losses[0, : stop + 1] - runs.losses[r, : stop + 1]) <= 1e-4 * scale
            )
            np.testing.assert_allclose(one.final[0], runs.final[r], rtol=1e-4, atol=1e-5)


def test_removing_every_fault_changes_no_other_run(batch):
    """The same batch with no fault at all: bad starts swapped for a good one, the wild
    rates for safe ones, and the loss without its NaN/inf regions. Every run that was
    healthy in the faulty batch is unchanged, bit for bit."""
    _, _, starts, _, runs = batch
    healthy = runs.status != "diverged"
    clean_starts = starts.copy()
    bad_start = (starts[:, 0] > 3.5) | (starts[:, 1] < -4.5)
    clean_starts[bad_start] = starts[runs.start_index[np.flatnonzero(healthy)[0]]]
    clean_problem = Problem(himmelblau, {"x": 0.0, "y": 0.0})
    clean = descend(
        clean_problem,
        clean_starts,
        learning_rate=[0.002, 0.005, 0.002, 0.005],
        steps=150,
        plane=axes_plane(clean_problem, "x", "y"),
    )
    assert (clean.status != "diverged").all()  # no fault left
    for r in np.flatnonzero(healthy):
        _rows_equal(runs, clean, r, r)


# ---------------------------------------------------- NaN regions in views
@pytest.fixture(scope="module")
def holey():
    problem = Problem(_holey, {"x": 0.0, "y": 0.0})
    return problem, axes_plane(problem, "x", "y")


def test_nan_and_inf_regions_are_gaps_in_the_surface(holey):
    problem, plane = holey
    surface = evaluate_surface(problem, plane, span=6.0, resolution=48)
    nan_region = (surface.a > 3.5)[None, :] & np.ones((48, 1), bool)
    inf_region = (surface.b < -4.5)[:, None] & ~nan_region
    assert nan_region.sum() == fault_count("surface-nan-points")
    assert inf_region.sum() == fault_count("surface-inf-points")
    np.testing.assert_array_equal(np.isnan(surface.loss), nan_region | inf_region)
    clean_problem = Problem(himmelblau, {"x": 0.0, "y": 0.0})
    clean = evaluate_surface(
        clean_problem, axes_plane(clean_problem, "x", "y"), span=6.0, resolution=48
    )
    ok = ~(nan_region | inf_region)
    np.testing.assert_array_equal(surface.loss[ok], clean.loss[ok])
    a, b, low = surface.grid_minimum()  # still works, and is a real point of the slice
    assert a <= 3.5 and b >= -4.5 and np.isfinite(low)
    profile = segment_profile(problem, np.array([0.0, 0.0]), np.array([5.2, 0.0]), resolution=81)
    inside = 5.2 * profile.t > 3.5
    assert inside.sum() == fault_count("profile-nan-points")
    np.testing.assert_array_equal(np.isnan(profile.loss), inside)


def test_basin_map_and_minima_work_around_a_nan_region(holey):
    problem, plane = holey
    basins = basin_map(problem, plane, span=5.0, resolution=11, learning_rate=0.01, steps=600)
    in_hole = (basins.a > 3.5)[None, :] | (basins.b < -4.5)[:, None]
    assert in_hole.sum() == fault_count("basin-starts-in-nan")
    assert (basins.label[in_hole] == DIVERGED_LABEL).all()
    found = basins.minima
    minima = found.points[found.kind == "minimum"]
    # Source: the three Himmelblau minima with x <= 3.5 (tests/test_reference_minima.py);
    # the fourth, (3.584, -1.848), lies inside the NaN region and cannot be reached.
    reachable = [m for m in HIMMELBLAU_MINIMA if m[0] <= 3.5]
    for m in reachable:
        assert np.min(np.linalg.norm(minima - np.asarray(m), axis=1)) < 1e-2
    assert np.all(minima[:, 0] <= 3.5)
    spectrum = hessian_spectrum(problem, minima[0], k=2)
    assert spectrum.lambda_min > 0
    # Starts whose clean run never enters the region behave exactly as without it.
    clean_problem = Problem(himmelblau, {"x": 0.0, "y": 0.0})
    clean = basin_map(
        clean_problem,
        axes_plane(clean_problem, "x", "y"),
        span=5.0,
        resolution=11,
        learning_rate=0.01,
        steps=600,
    )
    runs, ref = basins.runs, clean.runs
    for r in range(len(ref)):
        path = ref.trajectory(r)
        if ref.status[r] != "diverged" and np.all(path[:, 0] <= 3.5) and np.all(path[:, 1] >= -4.5):
            np.testing.assert_array_equal(runs.losses[r], ref.losses[r])
    found_again = find_minima(problem, runs)
    np.testing.assert_array_equal(found_again.assignment, basins.label.ravel())


# ----------------------------------------- losses that fail for some inputs
def _barrier(p):
    """A log barrier: defined for |x_i| < 1, NaN outside (log of a negative)."""
    return jnp.sum(p**2) - jnp.sum(jnp.log1p(-(p**2)))


def _np_barrier(x):
    with np.errstate(invalid="ignore", divide="ignore"):
        return float(np.sum(x**2) - np.sum(np.log1p(-(x**2))))


def _np_barrier_grad(x):
    with np.errstate(invalid="ignore", divide="ignore"):
        return 2 * x + 2 * x / (1 - x**2)


def test_runs_that_leave_the_domain_stop_there_and_nothing_else_moves(x64):
    problem = Problem(_barrier, jnp.zeros(3))
    starts = np.random.default_rng(3).uniform(-0.9, 0.9, size=(8, 3))
    rates = [0.05, 0.1, 0.45, 0.9]
    runs = descend(problem, starts, learning_rate=rates, steps=60, grad_tol=0.0, loss_tol=0.0)
    # Reference: plain NumPy gradient descent on the same function (common practice:
    # x+ = x - lr grad f(x)); it leaves the domain at the same step.
    exits = 0
    for r in range(len(runs)):
        x = starts[runs.start_index[r]].copy()
        lr = runs.hyper["learning_rate"][r]
        stop, status = 60, "max_steps"
        for k in range(1, 61):
            with np.errstate(invalid="ignore", over="ignore"):
                x = x - lr * _np_barrier_grad(x)
            if not np.isfinite(_np_barrier(x)):
                stop, status = k, "diverged"
                break
        assert runs.status[r] == status and runs.stop_step[r] == stop, r
        exits += status == "diverged"
    assert exits == fault_count("domain-exits")
    # Same shape without the runs that leave: the others are unchanged, bit for bit.
    stays = runs.status != "diverged"
    keep_rate = [lr if lr <= 0.1 else 0.05 for lr in rates]
    clean = descend(problem, starts, learning_rate=keep_rate, steps=60, grad_tol=0.0, loss_tol=0.0)
    for r in np.flatnonzero(stays):
        _rows_equal(runs, clean, r, r)


# ------------------------------------------------------------- minibatches
@pytest.fixture(scope="module")
def diabetes():
    # Source: scikit-learn ships the diabetes data (Efron et al. 2004, Ann. Statist.
    # 32:407-499): 442 patients, 10 standardised features.
    data = sklearn.datasets.load_diabetes()
    x = data.data.astype(np.float32)
    y = ((data.target - data.target.mean()) / data.target.std()).astype(np.float32)

    def mse(p, x, y):
        return jnp.mean((x @ p["w"] + p["b"] - y) ** 2)

    return Problem(mse, {"w": jnp.zeros(10), "b": jnp.zeros(())}, x, y)


def test_minibatch_runs_are_reproducible_and_isolated(diabetes):
    starts = np.random.default_rng(5).standard_normal((4, 11)).astype(np.float32)
    kw = {"steps": 80, "batch_size": 32, "seed": 11}
    mixed = descend(diabetes, starts, learning_rate=[0.5, 1e4], **kw)
    diverged = mixed.status == "diverged"
    assert diverged.sum() == fault_count("minibatch-diverging")
    assert not diverged[:4].any()
    again = descend(diabetes, starts, learning_rate=[0.5, 1e4], **kw)
    for r in range(len(mixed)):
        _rows_equal(mixed, again, r, r)  # same call, same bits
    clean = descend(diabetes, starts, learning_rate=[0.5, 0.5], **kw)
    for r in range(4):
        _rows_equal(mixed, clean, r, r)  # diverging neighbours change nothing
    # Runs from the same start see the same minibatches (documented): equal step-0
    # minibatch loss across learning rates; a copy of a start at another index draws
    # other minibatches; another seed draws others too.
    np.testing.assert_array_equal(mixed.losses[:4, 0], mixed.losses[4:, 0])
    twins = descend(diabetes, np.repeat(starts[:1], 2, 0), learning_rate=0.5, **kw)
    assert twins.losses[0, 0] != twins.losses[1, 0]
    other_seed = descend(
        diabetes, starts, learning_rate=[0.5, 1e4], steps=80, batch_size=32, seed=12
    )
    assert not np.array_equal(other_seed.losses[:4], mixed.losses[:4], equal_nan=True)


# --------------------------------------------------- property-based checks
REFERENCE = {"gradient_descent": np_gd, "momentum": np_heavy_ball, "nesterov": np_nesterov}


def _bound(rule: str, lam: float, beta: float) -> float:
    """Largest stable learning rate on a quadratic with top eigenvalue ``lam``.

    Source: gradient descent 2 / L (common practice); heavy ball 2 (1 + b) / L
    (Polyak 1964); Nesterov (2 + 2 b) / ((1 + 2 b) L) (from memory, the textbook
    stability region of Nesterov's method on quadratics).
    """
    if rule == "gradient_descent":
        return 2.0 / lam
    if rule == "momentum":
        return 2.0 * (1.0 + beta) / lam
    return (2.0 + 2.0 * beta) / ((1.0 + 2.0 * beta) * lam)


def _reference(a, b, x0, rule, lr, beta, steps, div):
    """NumPy run with basinview's documented stopping rules, tolerances 0: diverged when
    the loss is not finite or has risen more than div * max(1, |f0|) above the start;
    converged when the gradient is exactly 0 and the loss did not change; frozen after."""
    with np.errstate(all="ignore"):
        xs = REFERENCE[rule](a, b, x0.copy(), lr, steps, momentum=beta)
        f = np.array([0.5 * x @ a @ x - b @ x for x in xs])
        g = np.array([np.linalg.norm(a @ x - b) for x in xs])
    threshold = div * max(abs(f[0]), 1.0)
    for k in range(1, steps + 1):
        if not np.isfinite(f[k]) or not np.isfinite(g[k]) or f[k] - f[0] > threshold:
            return f[: k + 1], k, "diverged"
        if g[k] == 0 and f[k] == f[k - 1]:
            return f[: k + 1], k, "converged"
    return f, steps, "max_steps"


@st.composite
def mixed_case(draw):
    n = draw(st.integers(2, 5))
    rng = np.random.default_rng(draw(st.integers(0, 2**31 - 1)))
    m = rng.standard_normal((n, n))
    a = m @ m.T / n + draw(st.floats(0.05, 2.0)) * np.eye(n)
    b = rng.standard_normal(n)
    starts = rng.standard_normal((draw(st.integers(1, 4)), n)) * draw(st.floats(0.5, 5.0))
    rule = draw(st.sampled_from(sorted(REFERENCE)))
    beta = draw(st.floats(0.0, 0.9)) if rule != "gradient_descent" else 0.0
    lam = float(np.linalg.eigvalsh(a)[-1])
    stable = draw(st.floats(0.05, 0.9)) * _bound(rule, lam, beta)
    # Three times the largest bound of the three rules: diverges under every rule.
    wild = 3.0 * 2.0 * (1.0 + beta) / lam * draw(st.floats(1.0, 3.0))
    return a, b, starts, rule, beta, [stable, wild]


def _run_property(dtype, max_examples):
    ledger = {"examples": 0, "runs": 0, "diverged": 0}
    steps, div = 40, 1e3

    @settings(
        max_examples=max_examples,
        deadline=None,
        derandomize=True,
        suppress_health_check=[HealthCheck.too_slow],
    )
    @given(case=mixed_case())
    def check(case):
        a, b, starts, rule, beta, rates = case
        hyper = {"momentum": beta} if rule != "gradient_descent" else {}
        problem = Problem(quadratic, jnp.zeros(len(b), dtype), a.astype(dtype), b.astype(dtype))
        kw = {"optimizer": rule, "hyper": hyper, "steps": steps, "grad_tol": 0.0,
              "loss_tol": 0.0, "divergence_factor": div}  # fmt: skip
        mixed = descend(problem, starts, learning_rate=rates, **kw)
        clean = descend(problem, starts, learning_rate=[rates[0], rates[0]], **kw)
        s = len(starts)
        for r in range(len(mixed)):
            ref, stop, status = _reference(
                a, b, starts[mixed.start_index[r]], rule, mixed.hyper["learning_rate"][r], beta,
                steps, div,
            )  # fmt: skip
            if dtype == np.float64:
                assert mixed.status[r] == status and mixed.stop_step[r] == stop
                np.testing.assert_allclose(mixed.losses[r, : stop + 1], ref, rtol=1e-9, atol=1e-9)
                assert np.isnan(mixed.losses[r, stop + 1 :]).all()
            elif status != "diverged":
                assert mixed.status[r] != "diverged"
                done = mixed.stop_step[r]  # float32 may reach an exact fixed point earlier
                scale = np.maximum(1.0, np.abs(ref[: done + 1]))
                assert np.all(np.abs(mixed.losses[r, : done + 1] - ref[: done + 1]) <= 2e-4 * scale)
            else:
                assert mixed.status[r] == "diverged" and abs(mixed.stop_step[r] - stop) <= 1
        assert (mixed.status[s:] == "diverged").all()  # the wild rate diverges every run
        for r in range(s):  # and changes nothing in the stable runs, bit for bit
            _rows_equal(mixed, clean, r, r)
        ledger["examples"] += 1
        ledger["runs"] += len(mixed)
        ledger["diverged"] += int((mixed.status == "diverged").sum())

    check()
    return ledger


@pytest.mark.slow
def test_mixed_batches_equal_a_numpy_reference_step_by_step(x64):
    ledger = _run_property(np.float64, max_examples=12)
    assert ledger["examples"] == 12
    assert ledger["diverged"] >= ledger["examples"]  # at least one fault per example


def test_mixed_float32_batches_equal_the_reference_to_rounding():
    ledger = _run_property(np.float32, max_examples=6)
    assert ledger["examples"] == 6
    assert ledger["diverged"] >= ledger["examples"]


def test_fault_ledger_is_listed_in_the_testing_docs():
    from pathlib import Path

    text = (Path(__file__).resolve().parents[1] / "docs" / "testing.md").read_text()
    missing = [key for key in FAULTS if f"`{key}`" not in text]
    assert not missing, f"add the fault counts {missing} to docs/testing.md"


if __name__ == "__main__":
    for key, (what, count) in FAULTS.items():
        print(f"| `{key}` | {what} | {count} |")
