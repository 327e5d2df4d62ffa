"""NIST StRD nonlinear regression: fits from both certified starts.

Source: National Institute of Standards and Technology, Statistical Reference
Datasets, nonlinear regression section (files copied to tests/data/, see
SOURCES.md). Each file gives the model, data, two starting points and the
certified parameters and standard deviations.

Method (as a modeller would do it with basinview): parameters are rescaled by
the start (b = start * u, u0 = 1), descent runs on u, and find_minima polishes
the end point with Newton steps. Plain gradient descent with step
1 / lambda_max(H(u0)) is used where it reaches the basin from both starts;
Adam where plain descent stalls on the far start (REFERENCES.md B notes that
plain GD is hopeless on several of these problems).
"""

from __future__ import annotations

import re
from pathlib import Path

import jax.numpy as jnp
import numpy as np
import pytest

from basinview.core import Problem, descend, find_minima, hessian_spectrum, standard_errors

from .conftest import DATA

MODELS = {
    # y = b1*(1-exp[-b2*x])
    "Misra1a": lambda b, x: b[0] * (1 - jnp.exp(-b[1] * x)),
    # y = exp(-b1*x)/(b2+b3*x)
    "Chwirut2": lambda b, x: jnp.exp(-b[0] * x) / (b[1] + b[2] * x),
    # y = b1*x**b2
    "DanWood": lambda b, x: b[0] * x ** b[1],
    # y = b1*(1-exp[-b2*x])
    "BoxBOD": lambda b, x: b[0] * (1 - jnp.exp(-b[1] * x)),
    # y = b1 / (1+exp[b2-b3*x])
    "Rat42": lambda b, x: b[0] / (1 + jnp.exp(b[1] - b[2] * x)),
    # y = b1*exp(-b2*x) + b3*exp(-(x-b4)**2/b5**2) + b6*exp(-(x-b7)**2/b8**2)
    "Gauss1": lambda b, x: b[0] * jnp.exp(-b[1] * x)
    + b[2] * jnp.exp(-((x - b[3]) ** 2) / b[4] ** 2)
    + b[5] * jnp.exp(-((x - b[6]) ** 2) / b[7] ** 2),
    # y = (b1+b2*x+b3*x**2) / (1+b4*x+b5*x**2)
    "Kirby2": lambda b, x: (b[0] + b[1] * x + b[2] * x**2) / (1 + b[3] * x + b[4] * x**2),
}

# How each file is fitted: (optimizer, learning rate or None for 1/lambda_max, steps).
METHOD = {
    "DanWood": ("gradient_descent", None, 20000),
    "Rat42": ("gradient_descent", None, 20000),
    "Gauss1": ("gradient_descent", None, 20000),
    "Misra1a": ("adam", 0.01, 50000),
    "Chwirut2": ("adam", 0.01, 50000),
    "BoxBOD": ("adam", 0.01, 50000),
    "Kirby2": ("adam", 0.01, 50000),
}


def parse_nist(path: Path):
    """Starts, certified values and standard deviations, and (x, y) from a StRD file."""
    lines = path.read_text().splitlines()
    start1, start2, cert, sd = [], [], [], []
    for line in lines[:60]:
        m = re.match(r"\s*b(\d+)\s*=\s*(\S+)\s+(\S+)\s+(\S+)\s+(\S+)", line)
        if m:
            start1.append(float(m.group(2)))
            start2.append(float(m.group(3)))
            cert.append(float(m.group(4)))
            sd.append(float(m.group(5)))
    m = re.search(r"Data\s+\(lines\s+(\d+)\s+to\s+(\d+)\)", "\n".join(lines[:20]))
    first, last = int(m.group(1)), int(m.group(2))
    rows = np.array([list(map(float, line.split())) for line in lines[first - 1 : last]])
    return np.array(start1), np.array(start2), np.array(cert), np.array(sd), rows[:, 1], rows[:, 0]


# The default run fits one dataset of each NIST difficulty (Misra1a lower, Kirby2 average,
# Rat42 higher); the other three run with the slow tests (`python -m pytest -m slow`).
SLOW_DATASETS = {"BoxBOD", "Chwirut2", "Gauss1"}


@pytest.mark.parametrize(
    "name",
    [
        pytest.param(n, marks=pytest.mark.slow) if n in SLOW_DATASETS else n
        for n in sorted(MODELS)
    ],
)
@pytest.mark.parametrize("which", [1, 2])
def test_certified_parameters_from_both_starts(x64, name, which):
    start1, start2, cert, sd, x, y = parse_nist(DATA / f"{name}.dat")
    start = start1 if which == 1 else start2
    model = MODELS[name]

    def rss(u, x, y):
        return jnp.sum((y - model(start * u, x)) ** 2)

    def residuals(u, x, y):
        return y - model(start * u, x)

    prob = Problem(rss, jnp.ones(len(start)), x, y)
    optimizer, lr, steps = METHOD[name]
    if lr is None:
        lr = 1.0 / hessian_spectrum(prob, prob.theta0, k=1).lambda_max
    runs = descend(prob, prob.theta0, optimizer=optimizer, learning_rate=lr, steps=steps, grad_tol=1e-10, loss_tol=0.0)
    assert runs.status[0] != "diverged"
    minima = find_minima(prob, runs, include_unconverged=True, refine_steps=30)
    assert len(minima) == 1
    assert minima.kind[0] == "minimum"
    fitted = start * minima.points[0]
    # Certified to 11 digits; >= 7 significant digits recovered.
    np.testing.assert_allclose(fitted, cert, rtol=1e-7)
    # Certified standard deviations = sqrt(s^2 diag((J'J)^-1)), s^2 = RSS/(n - p)
    # (REFERENCES.md B, verified to 8-11 digits): reproduced from the curvature at the fit.
    se_u = standard_errors(prob, minima.points[0], residuals)
    np.testing.assert_allclose(se_u * np.abs(start), sd, rtol=1e-6)
