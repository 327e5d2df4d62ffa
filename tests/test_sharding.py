"""Batches split across devices and into vectorised groups give the same numbers.

JAX fixes its CPU device count when it starts, so the multi-device checks
run in a fresh interpreter with ``XLA_FLAGS=--xla_force_host_platform_device_count=4``.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import jax.numpy as jnp
import numpy as np
import pytest

from basinview.core import (
    ParameterError,
    Problem,
    axes_plane,
    count_compilations,
    descend,
    evaluate_surface,
    use_all_cores,
)
from basinview.core.sharding import available_cores, batch_devices

ROOT = Path(__file__).resolve().parent.parent


def _run(script: str, env_extra: dict[str, str]) -> str:
    env = dict(os.environ)
    env.pop("JAX_NUM_CPU_DEVICES", None)
    env.pop("XLA_FLAGS", None)
    env.update(env_extra)
    done = subprocess.run(
        [sys.executable, "-c", textwrap.dedent(script)],
        cwd=ROOT,
        env=env,
        capture_output=True,
        text=True,
        timeout=600,
        check=False,
    )
    assert done.returncode == 0, done.stderr[-4000:]
    return done.stdout


FOUR_DEVICES = {"XLA_FLAGS": "--xla_force_host_platform_device_count=4"}

SHARDED = """
import numpy as np
import jax, jax.numpy as jnp
from basinview.core import (Problem, axes_plane, random_plane, evaluate_surface, descend,
                            grid_starts)

assert len(jax.devices()) == 4, jax.devices()
rng = np.random.default_rng(7)

# A quadratic bowl: the surface has a closed form.
a_mat = np.array([[3.0, 1.0, 0.0], [1.0, 2.0, 0.5], [0.0, 0.5, 1.0]], np.float32)
def bowl(w, a):
    return 0.5 * w @ (a @ w)
quad = Problem(bowl, jnp.zeros(3), a_mat)
plane = axes_plane(quad, "theta[0]", "theta[1]")
one = evaluate_surface(quad, plane, span=1.5, resolution=(37, 23), devices=1)
four = evaluate_surface(quad, plane, span=1.5, resolution=(37, 23))
assert np.array_equal(one.loss, four.loss)
aa, bb = np.meshgrid(one.a, one.b)
# Source: closed form of a quadratic form on the (w0, w1) plane (numpy).
closed = 0.5 * (a_mat[0, 0] * aa**2 + 2 * a_mat[0, 1] * aa * bb + a_mat[1, 1] * bb**2)
np.testing.assert_allclose(four.loss, closed, rtol=1e-5, atol=1e-6)

# A small tanh network on enough rows that a sweep needs several calls.
x = rng.uniform(-2, 2, (2000, 2)).astype(np.float32)
y = (np.sin(1.5 * x[:, 0]) * np.cos(x[:, 1])).astype(np.float32)
def net(p, x, y):
    h = jnp.tanh(x @ p["w1"] + p["b1"])
    return jnp.mean(((h @ p["w2"])[:, 0] + p["b2"] - y) ** 2)
def init(seed):
    r = np.random.default_rng(seed)
    return {"w1": r.standard_normal((2, 16)).astype(np.float32) / 1.4,
            "b1": np.zeros(16, np.float32),
            "w2": r.standard_normal((16, 1)).astype(np.float32) / 4,
            "b2": np.float32(0.0)}
mlp = Problem(net, init(0), x, y)
mplane = random_plane(mlp, seed=1)
s1 = evaluate_surface(mlp, mplane, span=1.0, resolution=29, devices=1)
s4 = evaluate_surface(mlp, mplane, span=1.0, resolution=29)
assert np.array_equal(s1.loss, s4.loss)

starts = np.stack([mlp.flatten(init(s)) for s in range(1, 12)])
for optimizer in ("gradient_descent", "momentum", "adam"):
    kw = dict(optimizer=optimizer, learning_rate=[0.01, 0.1, 5.0], steps=60, plane=mplane)
    r1 = descend(mlp, starts, devices=1, **kw)
    r4 = descend(mlp, starts, **kw)
    for field in ("losses", "grad_norms", "path", "off_plane", "cosines", "final"):
        assert np.array_equal(getattr(r1, field), getattr(r4, field), equal_nan=True), field
    assert list(r1.status) == list(r4.status)
    assert np.array_equal(r1.stop_step, r4.stop_step)
# The 33 runs did not fit one call, so they were split over all four devices.
used = {len(k[-2]) for k in mlp._compiled if k[0] == "descent"}
assert 4 in used, used

# A basin map: descent from a grid of starts on the plane.
grid = grid_starts(mplane, span=1.0, resolution=(9, 7))
b1 = descend(mlp, grid, learning_rate=0.1, steps=40, plane=mplane, devices=1)
b4 = descend(mlp, grid, learning_rate=0.1, steps=40, plane=mplane)
assert np.array_equal(b1.final, b4.final) and np.array_equal(b1.losses, b4.losses, equal_nan=True)

# Chunked data under sharding.
chunked = Problem(net, init(0), x, y, data_chunk_rows=300, reduction="mean")
c1 = evaluate_surface(chunked, random_plane(chunked, seed=1), span=1.0, resolution=15, devices=1)
c4 = evaluate_surface(chunked, random_plane(chunked, seed=1), span=1.0, resolution=15)
assert np.array_equal(c1.loss, c4.loss)
print("ok")
"""


@pytest.mark.slow
def test_four_devices_give_the_numbers_of_one():
    assert _run(SHARDED, FOUR_DEVICES).strip().endswith("ok")


def test_use_all_cores_before_and_after_jax_starts():
    script = """
    import jax, numpy as np
    from basinview.core import use_all_cores, ParameterError, Problem
    assert use_all_cores(3) == 3
    assert len(jax.devices()) == 3
    Problem(lambda p: (p - 1.0) ** 2, 0.0)  # JAX has started now
    assert use_all_cores(3) == 3
    try:
        use_all_cores(2)
    except ParameterError as exc:
        assert "Restart the kernel" in str(exc) and "JAX_NUM_CPU_DEVICES=2" in str(exc)
    else:
        raise AssertionError("no error")
    print("ok")
    """
    assert _run(script, {}).strip().endswith("ok")
    default = """
    import jax
    from basinview.core import use_all_cores
    from basinview.core.sharding import available_cores
    assert use_all_cores() == available_cores() == len(jax.devices())
    print("ok")
    """
    assert _run(default, {}).strip().endswith("ok")


def test_device_arguments_are_checked():
    assert len(batch_devices(None)) >= 1
    assert available_cores() >= 1
    for bad in (0, 10_000, "all", [0], True):
        with pytest.raises(ParameterError, match="devices"):
            batch_devices(bad)
    with pytest.raises(ParameterError, match="count"):
        use_all_cores(0)


def test_tuned_batches_keep_the_numbers_and_compile_once(rng):
    x = rng.standard_normal((400, 2)).astype(np.float32)
    y = (x @ np.array([1.5, -0.5], np.float32) + 0.2).astype(np.float32)

    def loss(p, x, y):
        return jnp.mean((x @ p["w"] + p["b"] - y) ** 2)

    tuned = Problem(loss, {"w": jnp.zeros(2), "b": 0.0}, x, y)
    plane = axes_plane(tuned, "w[0]", "w[1]")
    reference = evaluate_surface(tuned, plane, span=2.0, resolution=31, chunk_size=1)
    surface = evaluate_surface(tuned, plane, span=2.0, resolution=31, tune=True)
    np.testing.assert_allclose(surface.loss, reference.loss, rtol=2e-6)
    assert ("surface-chunk",) in tuned._cache  # timed once, kept with the problem
    assert surface.sizes["surface_chunk"] == tuned._cache[("surface-chunk",)]
    starts = rng.standard_normal((40, 3)).astype(np.float32)
    kw = dict(learning_rate=[0.05, 0.3], steps=80, plane=plane, tune=True)
    runs = descend(tuned, starts, **kw)
    assert any(k[0] == "descent-group" for k in tuned._cache if isinstance(k, tuple))
    # Source: numpy least squares; every stable run ends at the fit.
    w_ls = np.linalg.lstsq(np.c_[np.ones(400), x], y, rcond=None)[0]
    np.testing.assert_allclose(runs.final[40:], np.tile(w_ls, (40, 1)), atol=2e-3)
    with count_compilations() as counter:
        evaluate_surface(tuned, plane.with_origin(np.ones(3)), span=1.0, resolution=31, tune=True)
        descend(tuned, starts + 1.0, **kw)
    assert counter.count == 0
