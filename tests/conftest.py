"""Shared fixtures: float64 scope, reference data, small loss functions."""

from __future__ import annotations

from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np
import pytest

DATA = Path(__file__).parent / "data"


@pytest.fixture
def x64():
    """Run the test body with 64-bit floats enabled, restoring the flag after."""
    with jax.enable_x64(True):
        yield


def himmelblau(p):
    x, y = p["x"], p["y"]
    return (x**2 + y - 11) ** 2 + (x + y**2 - 7) ** 2


def rosenbrock(p):
    return 100.0 * (p[1] - p[0] ** 2) ** 2 + (1.0 - p[0]) ** 2


def quadratic(theta, a, b):
    """0.5 theta' A theta - b' theta with A symmetric positive definite."""
    return 0.5 * theta @ (a @ theta) - b @ theta


def read_nist_certified(path: Path) -> dict[str, float]:
    """Certified parameter estimates (B0, B1, ...) from a NIST StRD file."""
    values: dict[str, float] = {}
    for line in path.read_text().splitlines():
        parts = line.split()
        if len(parts) >= 2 and parts[0].startswith("B") and parts[0][1:].isdigit():
            try:
                values[parts[0]] = float(parts[1].replace("D", "E"))
            except ValueError:
                continue
    return values


@pytest.fixture
def rng():
    return np.random.default_rng(12345)


__all__ = ["DATA", "himmelblau", "jnp", "quadratic", "read_nist_certified", "rosenbrock"]


def callback_loss(p):
    """x^2 + y^2 with x^2 from NumPy in a host callback: JAX evaluates it but cannot
    differentiate it."""
    value = jax.pure_callback(
        lambda x: np.asarray(x**2, np.float32),
        jax.ShapeDtypeStruct((), jnp.float32),
        p["x"],
        vmap_method="sequential",
    )
    return value + p["y"] ** 2
