"""Benchmark workloads: synthetic data (fixed seeds), losses and their settings.

Every workload exists in three versions that must agree numerically:
basinview, the usual notebook loop over a jitted JAX function (baseline a)
and a NumPy loop with hand-derived gradients (baseline b). This module holds
what they share: the data, the loss in JAX and in NumPy, and the sizes.

The data are generated here with ``numpy.random.default_rng(seed)``; they
are scenarios of our own for timing, not reference values.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import jax.numpy as jnp
import numpy as np

__all__ = [
    "FULL",
    "QUICK",
    "LineData",
    "MlpData",
    "Sizes",
    "line_data",
    "mlp_data",
    "mlp_flatten_np",
    "mlp_init",
    "mlp_loss",
    "mlp_loss_np",
    "mlp_value_and_grad_np",
    "mse_line",
    "mse_line_np",
    "mse_matrix",
    "mse_matrix_np",
]


@dataclass(frozen=True)
class Sizes:
    """Sizes of all workloads (full run or quick smoke run)."""

    w1_rows: int
    w1_resolution: int
    w2_rows: int
    w2_resolution: int
    w3_rows: int
    w3_starts: int
    w3_rates: int
    w3_steps: int
    w4_starts: int
    w4_rates: int
    w4_steps: int
    w5_resolution: int
    w5_steps: int
    w5_rounds: int
    w6_rows: int
    w6_resolution: int
    w6_basin_resolution: tuple[int, int]
    w6_basin_steps: int
    matmul_size: int


FULL = Sizes(
    w1_rows=100_000,
    w1_resolution=200,
    w2_rows=2_000,
    w2_resolution=150,
    w3_rows=10_000,
    w3_starts=64,
    w3_rates=8,
    w3_steps=500,
    w4_starts=16,
    w4_rates=4,
    w4_steps=300,
    w5_resolution=61,
    w5_steps=400,
    w5_rounds=5,
    w6_rows=1_000_000,
    w6_resolution=300,
    w6_basin_resolution=(50, 40),
    w6_basin_steps=300,
    matmul_size=2048,
)

QUICK = Sizes(
    w1_rows=2_000,
    w1_resolution=12,
    w2_rows=200,
    w2_resolution=10,
    w3_rows=500,
    w3_starts=4,
    w3_rates=2,
    w3_steps=20,
    w4_starts=2,
    w4_rates=2,
    w4_steps=15,
    w5_resolution=21,
    w5_steps=100,
    w5_rounds=1,
    w6_rows=20_000,
    w6_resolution=20,
    w6_basin_resolution=(8, 5),
    w6_basin_steps=20,
    matmul_size=256,
)

# --------------------------------------------------------------------- linear


@dataclass(frozen=True)
class LineData:
    """A straight-line regression: ``y = 1.5 + 2 x + noise``.

    ``design`` is ``[1, x]`` for the ``X @ theta`` form of the loss.
    """

    x: np.ndarray
    y: np.ndarray
    design: np.ndarray
    solution: np.ndarray


def line_data(rows: int, seed: int = 11) -> LineData:
    """Synthetic straight-line data with ``rows`` rows (float32)."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(rows).astype(np.float32)
    y = (1.5 + 2.0 * x + 0.5 * rng.standard_normal(rows)).astype(np.float32)
    design = np.stack([np.ones(rows, np.float32), x], axis=1)
    solution = np.linalg.lstsq(design.astype(np.float64), y.astype(np.float64), rcond=None)[0]
    return LineData(x=x, y=y, design=design, solution=solution)


def mse_matrix(theta: jnp.ndarray, design: jnp.ndarray, y: jnp.ndarray) -> jnp.ndarray:
    """Mean squared error written with a design matrix: ``mean((X @ theta - y)^2)``."""
    return jnp.mean((design @ theta - y) ** 2)


def mse_line(params: dict[str, Any], x: jnp.ndarray, y: jnp.ndarray) -> jnp.ndarray:
    """The same loss written per row: ``mean((theta0 + theta1 * x - y)^2)``."""
    return jnp.mean((params["intercept"] + params["slope"] * x - y) ** 2)


def mse_matrix_np(theta: np.ndarray, design: np.ndarray, y: np.ndarray) -> tuple[float, np.ndarray]:
    """Loss and analytic gradient ``2/N X^T (X theta - y)`` in NumPy."""
    r = design @ theta - y
    return float(np.mean(r * r)), (2.0 / y.shape[0]) * (design.T @ r)


def mse_line_np(t0: float, t1: float, x: np.ndarray, y: np.ndarray) -> tuple[float, float, float]:
    """Loss and analytic partial derivatives of the per-row form in NumPy."""
    r = t0 + t1 * x - y
    return float(np.mean(r * r)), float(2.0 * np.mean(r)), float(2.0 * np.mean(r * x))


# ------------------------------------------------------------------------ MLP

HIDDEN = 16


@dataclass(frozen=True)
class MlpData:
    """Two inputs, one target: a smooth ridge plus noise."""

    x: np.ndarray
    y: np.ndarray


def mlp_data(rows: int, seed: int = 12) -> MlpData:
    """Synthetic data for the 2-16-1 tanh network (float32)."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(-2.0, 2.0, size=(rows, 2)).astype(np.float32)
    y = np.sin(1.5 * x[:, 0]) * np.cos(x[:, 1]) + 0.3 * x[:, 1]
    y = (y + 0.1 * rng.standard_normal(rows)).astype(np.float32)
    return MlpData(x=x, y=y)


def mlp_init(seed: int) -> dict[str, dict[str, np.ndarray]]:
    """Scaled Gaussian initial weights (fan-in scaling), biases zero."""
    rng = np.random.default_rng(seed)
    return {
        "hidden": {
            "w": (rng.standard_normal((2, HIDDEN)) / np.sqrt(2.0)).astype(np.float32),
            "b": np.zeros(HIDDEN, np.float32),
        },
        "out": {
            "w": (rng.standard_normal((HIDDEN, 1)) / np.sqrt(HIDDEN)).astype(np.float32),
            "b": np.zeros(1, np.float32),
        },
    }


def mlp_flatten_np(params: dict[str, Any]) -> np.ndarray:
    """Flat vector in JAX's leaf order (sorted keys: hidden.b, hidden.w, out.b, out.w)."""
    return np.concatenate(
        [
            np.ravel(params["hidden"]["b"]),
            np.ravel(params["hidden"]["w"]),
            np.ravel(params["out"]["b"]),
            np.ravel(params["out"]["w"]),
        ]
    )


def mlp_loss(params: dict[str, Any], x: jnp.ndarray, y: jnp.ndarray) -> jnp.ndarray:
    """Mean squared error of a 2-16-1 network with tanh hidden units (65 parameters)."""
    h = jnp.tanh(x @ params["hidden"]["w"] + params["hidden"]["b"])
    out = (h @ params["out"]["w"])[:, 0] + params["out"]["b"][0]
    return jnp.mean((out - y) ** 2)


def mlp_loss_np(params: dict[str, Any], x: np.ndarray, y: np.ndarray) -> float:
    """The same network's loss in NumPy."""
    h = np.tanh(x @ params["hidden"]["w"] + params["hidden"]["b"])
    out = (h @ params["out"]["w"])[:, 0] + params["out"]["b"][0]
    r = out - y
    return float(np.mean(r * r))


def mlp_value_and_grad_np(
    params: dict[str, Any], x: np.ndarray, y: np.ndarray
) -> tuple[float, dict[str, dict[str, np.ndarray]]]:
    """Loss and gradient by hand-written backpropagation in NumPy."""
    w1, b1 = params["hidden"]["w"], params["hidden"]["b"]
    w2, b2 = params["out"]["w"], params["out"]["b"]
    h = np.tanh(x @ w1 + b1)
    r = (h @ w2)[:, 0] + b2[0] - y
    d_out = (2.0 / y.shape[0]) * r
    d_h = np.outer(d_out, w2[:, 0]) * (1.0 - h * h)
    grads = {
        "hidden": {"w": x.T @ d_h, "b": d_h.sum(axis=0)},
        "out": {"w": (h.T @ d_out)[:, None], "b": np.array([d_out.sum()], dtype=r.dtype)},
    }
    return float(np.mean(r * r)), grads
