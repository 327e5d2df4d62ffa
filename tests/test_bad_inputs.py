"""Bad-input catalogue: every bad input gets a clear error and loses nothing.

Each entry of the catalogue is data (``Case`` / ``CliCase``): an id, the bad
input in words, the error class, key words that must name the problem and
key words of the fix. For every API entry the test calls the public function,
asserts a :class:`BasinviewError` subclass whose message contains both sets
of key words, and then checks that nothing the user already had changed:
earlier result objects equal their saved copies bit for bit, the problem
still gives the same loss and the same runs, the recorded settings and the
settings file on disk are unchanged, files in the case's folder are
untouched, and the user's own arrays are still writeable and unchanged.

CLI entries run ``python -m basinview ...`` in a fresh folder and assert exit
code 2, a one-line message on stderr without a traceback, and that no file in
the folder was written, replaced or deleted.

An entry whose fix is pending may carry ``xfail="<the fix>"``; it then runs
as a strict xfail, which fails loudly once fixed so the mark gets removed.

``python -m tests.test_bad_inputs`` prints the catalogue as a Markdown table
(``python -m tools.make_docs`` writes it to docs/bad_inputs.md).
"""

from __future__ import annotations

import contextlib
import dataclasses
import html
import io
import json
import os
import pickle
import subprocess
import sys
import zipfile
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import equinox as eqx
import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest

from basinview.core import (
    BasinviewError,
    LossError,
    ParameterError,
    Plane,
    Problem,
    Settings,
    SettingsError,
    Starts,
    axes_plane,
    basin_map,
    compute_view,
    descend,
    evaluate_surface,
    find_minima,
    grid_starts,
    hessian_spectrum,
    initializer_starts,
    plane_from_spec,
    random_plane,
    random_starts,
    record_settings,
    segment_profile,
    starts_from_spec,
    step_size_sweep,
    through_plane,
)

from .conftest import callback_loss, himmelblau, quadratic
from .integrity import assert_same, folder_state, snapshot

ROOT = Path(__file__).resolve().parents[1]


# ----------------------------------------------------------------- losses
def one_argument_loss(p):
    return p["x"] ** 2 + p["y"] ** 2


def vector_loss(p):
    return jnp.stack([p["x"], p["y"]]) ** 2


def log_loss(p):
    return jnp.log(p["x"]) + p["y"] ** 2  # NaN for x < 0


def reciprocal_loss(p):
    return 1.0 / p["x"] + p["y"] ** 2  # inf at x = 0


def raising_loss(p):
    raise ZeroDivisionError("division by zero in the user's model")


def branching_loss(p):
    if p["x"] > 0:  # Python branch on a traced value
        return p["x"] ** 2
    return p["y"] ** 2


def numpy_loss(p):
    return np.sin(p["x"]) + p["y"] ** 2  # NumPy on a traced value


def integer_loss(p):
    return jnp.round(p["x"] ** 2).astype(jnp.int32)


def linear_loss(p, x, y):
    return jnp.mean((x @ p["w"] - y) ** 2)


def guarded_loss(p):
    x = eqx.error_if(p["x"], p["x"] > 3.0, "x beyond the model's valid range")
    return (x - 1.0) ** 2 + p["y"] ** 2


def holey_himmelblau(p):
    return jnp.where(p["x"] > 3.5, jnp.nan, himmelblau(p))


def raising_init(key):
    raise RuntimeError("the initialiser failed")


# ------------------------------------------------------------------ world
@dataclass
class World:
    """What a user already has when the bad input arrives."""

    problem: Problem
    plane: Plane
    starts: Any
    results: dict[str, Any]
    saved: dict[str, Any]
    settings: Settings
    settings_json: str
    settings_file: Path
    settings_file_state: tuple[bytes, int]
    value0: np.ndarray
    data_problem: Problem
    holey: Problem
    user: dict[str, np.ndarray]
    user_saved: dict[str, np.ndarray]

    def rerun(self):
        return descend(
            self.problem, self.starts, learning_rate=[0.005, 0.01], steps=300, plane=self.plane
        )


@pytest.fixture(scope="module")
def world(tmp_path_factory):
    problem = Problem(himmelblau, {"x": 0.0, "y": 0.0})
    plane = axes_plane(problem, "x", "y")
    starts = random_starts(problem, 6, scale=3.0, seed=1)
    surface = evaluate_surface(problem, plane, span=5.0, resolution=21)
    world = World(
        problem=problem,
        plane=plane,
        starts=starts,
        results={},
        saved={},
        settings=None,  # type: ignore[arg-type]
        settings_json="",
        settings_file=Path(),
        settings_file_state=(b"", 0),
        value0=np.asarray(problem.value(problem.theta0)),
        data_problem=Problem(
            quadratic, jnp.zeros(3), np.diag([1.0, 2.0, 3.0]), np.array([1.0, 0.0, -1.0])
        ),
        holey=Problem(holey_himmelblau, {"x": 0.0, "y": 0.0}),
        user={
            "origin": np.array([0.5, 0.5], dtype=np.float32),
            "d1": np.array([1.0, 1.0], dtype=np.float32),
            "points": np.array([[1.0, 2.0], [np.nan, 0.0]], dtype=np.float32),
        },
        user_saved={},
    )
    runs = world.rerun()
    minima = find_minima(problem, runs)
    world.results = {
        "surface": surface,
        "runs": runs,
        "minima": minima,
        "spectrum": hessian_spectrum(problem, minima.points[0], k=2),
        "sweep": step_size_sweep(problem, starts, learning_rates=[0.005, 0.01, 0.03], steps=150),
        "basins": basin_map(problem, plane, span=4.5, resolution=5, learning_rate=0.01, steps=300),
        "profile": segment_profile(problem, minima.points[0], minima.points[1], resolution=21),
        "starts": starts,
        "plane": plane,
    }
    world.saved = {k: snapshot(v) for k, v in world.results.items()}
    world.settings = record_settings(
        problem, plane=plane, span=5.0, resolution=21, starts=starts, runs=runs, note="kept"
    )
    world.settings_json = world.settings.to_json()
    world.settings_file = world.settings.save(tmp_path_factory.mktemp("kept") / "view.json")
    world.settings_file_state = (
        world.settings_file.read_bytes(),
        world.settings_file.stat().st_mtime_ns,
    )
    world.user_saved = {k: v.copy() for k, v in world.user.items()}
    return world


def assert_nothing_lost(w: World, folder: Path, before: dict[str, Any]) -> None:
    """Everything the user had before the failed call is still there, unchanged."""
    for name, saved in w.saved.items():
        assert_same(w.results[name], saved, name)
    np.testing.assert_array_equal(np.asarray(w.problem.value(w.problem.theta0)), w.value0)
    again = w.rerun()  # the problem still works and gives the same runs, bit for bit
    assert_same(again, w.saved["runs"], "runs after the failure")
    assert w.settings.to_json() == w.settings_json
    assert Settings.from_json(w.settings_json) == w.settings
    path = w.settings_file
    assert (path.read_bytes(), path.stat().st_mtime_ns) == w.settings_file_state
    assert folder_state(folder) == before, "files in the user's folder changed"
    for name, arr in w.user.items():
        assert arr.flags.writeable, f"the user's array {name!r} was made read-only"
        np.testing.assert_array_equal(arr, w.user_saved[name])


# --------------------------------------------------------------- catalogue
@dataclass(frozen=True)
class Case:
    """One bad input to the public API and what the error must say."""

    id: str
    bad_input: str
    call: Callable[[World, Path], Any]
    error: type[BasinviewError]
    problem: tuple[str, ...]
    fix: tuple[str, ...]
    xfail: str = ""


def _settings_text(w: World, **changes: Any) -> str:
    raw = json.loads(w.settings_json)
    raw.update(changes)
    return json.dumps(raw)


def _tampered_plane(w: World, **spec: Any) -> Settings:
    return Settings.from_json(_settings_text(w, plane=spec))


def _pickled(w: World) -> bytes:
    return pickle.dumps({"learning_rate": [0.1]}, protocol=4)


def _sparse(folder: Path, name: str, size: int) -> Path:
    path = folder / name
    with open(path, "wb") as fh:
        fh.truncate(size)
    return path


C = Case
# The catalogue is a table, one entry per few lines; keep it compact.
# fmt: off
LOSS_CASES = [
    C("loss-signature", "loss takes (params) but data are given",
      lambda w, d: Problem(one_argument_loss, {"x": 1.0, "y": 1.0}, np.ones(3)),
      LossError, ("must accept (params, *data)", "1 data argument"), ("wrap the loss",)),
    C("loss-not-callable", "a number instead of a loss function",
      lambda w, d: Problem(3.0, {"x": 1.0}),
      LossError, ("loss must be a function", "float"), ("loss(params, *data)",)),
    C("loss-non-scalar", "loss returns a vector",
      lambda w, d: Problem(vector_loss, {"x": 1.0, "y": 1.0}),
      LossError, ("must return a scalar", "(2,)"), ("Reduce it", "jnp.mean")),
    C("loss-nan-at-start", "loss is NaN at the initial parameters (log of -1)",
      lambda w, d: Problem(log_loss, {"x": -1.0, "y": 0.0}),
      LossError, ("nan", "initial parameters"), ("start from other parameters",)),
    C("loss-inf-at-start", "loss is inf at the initial parameters (1/0)",
      lambda w, d: Problem(reciprocal_loss, {"x": 0.0, "y": 0.0}),
      LossError, ("inf", "initial parameters"), ("division by zero", "start from other")),
    C("loss-python-branch", "loss branches with Python `if` on a parameter",
      lambda w, d: Problem(branching_loss, {"x": 1.0, "y": 1.0}),
      LossError, ("cannot be traced by JAX", "TracerBoolConversionError"), ("jnp.where",)),
    C("loss-numpy-call", "loss calls NumPy on a parameter",
      lambda w, d: Problem(numpy_loss, {"x": 1.0, "y": 1.0}),
      LossError, ("cannot be traced by JAX",), ("jax.numpy",)),
    C("loss-data-shapes", "data of the wrong shape for X @ w",
      lambda w, d: Problem(linear_loss, {"w": jnp.zeros(3)}, np.ones((5, 2)), np.ones(5)),
      LossError, ("do not fit the loss",), ("Check the shapes",)),
    C("loss-data-text", "a string passed as data",
      lambda w, d: Problem(linear_loss, {"w": jnp.zeros(2)}, "x.csv", np.ones(5)),
      ParameterError, ("data must be arrays", "str"), ("functools.partial",)),
    C("loss-raises", "loss raises ZeroDivisionError",
      lambda w, d: Problem(raising_loss, {"x": 1.0}),
      LossError, ("raised ZeroDivisionError",), ("loss(params, *data)",)),
    C("loss-integer-output", "loss returns an integer",
      lambda w, d: Problem(integer_loss, {"x": 1.5}),
      LossError, ("floating-point", "int32"), ("convert",)),
    C("loss-not-differentiable", "loss goes through jax.pure_callback (no gradient)",
      lambda w, d: descend(Problem(callback_loss, {"x": 1.0, "y": 1.0}), np.ones(2), steps=2),
      LossError, ("differentiat",), ("custom_jvp",)),
    C("loss-raises-at-run-time", "loss raises (equinox.error_if) only for x > 3, in descend",
      lambda w, d: descend(
          Problem(guarded_loss, {"x": 0.0, "y": 0.0}), np.array([[0.0, 0.0], [5.0, 0.0]]),
          steps=3),
      LossError, ("raised",), ("jnp.where",)),
    C("loss-raises-on-surface", "loss raises (equinox.error_if) in part of the plane",
      lambda w, d: evaluate_surface(
          Problem(guarded_loss, {"x": 0.0, "y": 0.0}),
          axes_plane(Problem(guarded_loss, {"x": 0.0, "y": 0.0}), "x", "y"),
          span=5.0, resolution=5),
      LossError, ("raised",), ("jnp.where",)),
]

PARAMETER_CASES = [
    C("params-integer", "integer parameters {'x': 1, 'y': 2}",
      lambda w, d: Problem(himmelblau, {"x": 1, "y": 2}),
      ParameterError, ("dtype int", "floating-point"), ("1.0 instead of 1",)),
    C("params-complex", "complex parameters",
      lambda w, d: Problem(lambda p: jnp.abs(p["z"]) ** 2, {"z": 1.0 + 2.0j}),
      ParameterError, ("complex",), ("Split it into real and imaginary parts",)),
    C("params-half-precision", "float16 parameters",
      lambda w, d: Problem(himmelblau, {"x": jnp.float16(1.0), "y": jnp.float16(1.0)}),
      ParameterError, ("'x' is float16", "half precision"), ("astype(jnp.float32)",)),
    C("lint-unknown-check", "a lint check name that does not exist",
      lambda w, d: Problem(himmelblau, {"x": 1.0, "y": 1.0}, lint={"ignore": ["broadcast"]}),
      ParameterError, ("unknown checks", "'broadcast'"), ("row-broadcast", "lint=False")),
    C("params-empty", "an empty parameter dict",
      lambda w, d: Problem(lambda p: 0.0, {}),
      ParameterError, ("contain no arrays",), ("Pass the parameters to explore",)),
    C("params-text-leaf", "a string as a parameter value",
      lambda w, d: Problem(lambda p: p["x"], {"x": "1.0"}),
      ParameterError, ("'x' is a str",), ("must be arrays",)),
    C("start-other-pytree", "a start with a missing key",
      lambda w, d: descend(w.problem, {"x": 0.0}),
      ParameterError, ("structure differs",), ("pytree shaped like the initial parameters",)),
    C("start-leaf-shape", "a start whose leaf has the wrong shape",
      lambda w, d: descend(w.problem, {"x": jnp.ones(2), "y": 0.0}),
      ParameterError, ("leaf 'x' has shape (2,)", "expected ()"),
      ("shape it has in the initial parameters",)),
    C("start-flat-length", "a flat start of length 3 for 2 parameters",
      lambda w, d: descend(w.problem, np.zeros(3)),
      ParameterError, ("must have 2 entries", "(3,)"), ("vector of length 2",)),
    C("start-nan", "a start array (the user's own) containing NaN",
      lambda w, d: descend(w.problem, w.user["points"]),
      ParameterError, ("start 1 contains NaN",), ("must be finite",)),
    C("starts-none", "an empty (0, n) start array",
      lambda w, d: descend(w.problem, np.zeros((0, 2))),
      ParameterError, ("non-empty", "(0, 2)"), ("(S, n) array",)),
    C("label-unknown", "an unknown coordinate label 'z'",
      lambda w, d: axes_plane(w.problem, "z", "y"),
      ParameterError, ("unknown coordinate label 'z'",), ("problem.labels",)),
    C("label-not-text", "coordinate labels given as numbers",
      lambda w, d: axes_plane(w.problem, 0, 1),
      ParameterError, ("must be a string", "int"), ("problem.labels",)),
    C("label-twice", "the same coordinate twice",
      lambda w, d: axes_plane(w.problem, "x", "x"),
      ParameterError, ("must differ", "'x' twice"), ("Choose two different labels",)),
]

PLANE_CASES = [
    C("plane-zero-direction", "a zero-length direction",
      lambda w, d: Plane(w.user["origin"], np.zeros(2, np.float32), w.user["d1"]),
      ParameterError, ("direction d1 is zero",), ("two non-zero directions",)),
    C("plane-parallel", "parallel directions (the user's own arrays)",
      lambda w, d: Plane(w.user["origin"], w.user["d1"], w.user["d1"]),
      ParameterError, ("parallel", "a line, not a plane"), ("Choose two different",)),
    C("plane-inf-direction", "a direction containing inf",
      lambda w, d: Plane(w.user["origin"], np.array([np.inf, 0.0]), w.user["d1"]),
      ParameterError, ("not finite",), ("two non-zero directions",)),
    C("plane-collinear-points", "three points on one line for through_plane",
      lambda w, d: through_plane(w.problem, np.zeros(2), np.ones(2), 2 * np.ones(2)),
      ParameterError, ("lie on one line",), ("third point off the line",)),
    C("plane-zero-scale", "a filter-normalised random plane at an all-zero origin",
      lambda w, d: random_plane(
          Problem(lambda p: jnp.sum(p["w"] ** 2) + 1.0, {"w": jnp.zeros((2, 2))})),
      ParameterError, ("origin is zero",), ("normalise='none'",)),
    C("plane-one-parameter", "an axes plane of a one-parameter problem",
      lambda w, d: axes_plane(Problem(lambda p: (p - 1.0) ** 2, 0.0), "theta", "theta"),
      ParameterError, ("one parameter", "needs a plane"), ("segment_profile", "descend(problem, starts)")),
    C("plane-one-parameter-random", "a random plane (the CLI's default) of a one-parameter problem",
      lambda w, d: random_plane(Problem(lambda p: (p - 1.0) ** 2, 0.0)),
      ParameterError, ("one parameter",), ("at least two parameters",)),
    C("plane-normalisation", "an unknown normalisation 'unit'",
      lambda w, d: random_plane(w.problem, normalise="unit"),
      ParameterError, ("normalise must be one of", "'unit'"), ("'filter', 'layer', 'none'",)),
    C("plane-seed", "a negative seed",
      lambda w, d: random_plane(w.problem, seed=-1),
      ParameterError, ("seed", "-1"), ("non-negative integer",)),
    C("plane-other-problem", "a plane of a 3-parameter problem for a surface",
      lambda w, d: evaluate_surface(w.problem, axes_plane(w.data_problem, *w.data_problem.labels[:2])),
      ParameterError, ("3 coordinates", "problem has 2"), ("build the plane from this problem",)),
    C("plane-other-problem-descent", "a plane of a 3-parameter problem for descend",
      lambda w, d: descend(w.problem, np.zeros(2),
                           plane=axes_plane(w.data_problem, *w.data_problem.labels[:2])),
      ParameterError, ("3 coordinates",), ("build the plane from this problem",)),
    C("plane-spec-kind", "a plane spec of unknown kind",
      lambda w, d: plane_from_spec(w.problem, {"kind": "magic"}),
      ParameterError, ("unknown plane kind 'magic'",), ("use its .spec",)),
    C("plane-spec-field", "a plane spec with an extra field",
      lambda w, d: plane_from_spec(w.problem, {"kind": "hessian", "reach": 3}),
      ParameterError, ("has no fields ['reach']",), ("use its .spec",)),
]

SURFACE_CASES = [
    C("span-absurd", "span 1e20 (a grid no float can resolve)",
      lambda w, d: evaluate_surface(w.problem, w.plane, span=1e20),
      ParameterError, ("absurdly large",), ("choose",)),
    C("span-negative", "a negative half-width",
      lambda w, d: evaluate_surface(w.problem, w.plane, span=-1.0),
      ParameterError, ("min < max",), ("half-width s must be positive",)),
    C("span-text", "span given as text 'big'",
      lambda w, d: evaluate_surface(w.problem, w.plane, span="big"),
      ParameterError, ("span",), ("number",)),
    C("resolution-huge", "resolution 10**6 per axis (10^12 points)",
      lambda w, d: evaluate_surface(w.problem, w.plane, resolution=10**6),
      ParameterError, ("between 2 and 4001", "1000000"), ("zoom in with span",)),
    C("resolution-fraction", "resolution 10.5",
      lambda w, d: evaluate_surface(w.problem, w.plane, resolution=10.5),
      ParameterError, ("resolution", "10.5"), ("an integer or a pair of integers",)),
    C("segment-nan", "a segment end point with NaN",
      lambda w, d: segment_profile(w.problem, np.array([np.nan, 0.0]), np.ones(2)),
      ParameterError, ("segment endpoints",), ("must be finite",)),
    C("segment-extend", "a negative extension of the segment",
      lambda w, d: segment_profile(w.problem, np.zeros(2), np.ones(2), extend=-1.0),
      ParameterError, ("extend", "-1"), ("between 0 and 10",)),
]

DESCENT_CASES = [
    C("lr-zero", "learning rate 0",
      lambda w, d: descend(w.problem, w.starts, learning_rate=0.0),
      ParameterError, ("learning_rate = 0.0",), ("must be positive",)),
    C("lr-negative", "learning rate -0.1",
      lambda w, d: descend(w.problem, w.starts, learning_rate=-0.1),
      ParameterError, ("learning_rate = -0.1", "out of range"), ("must be positive",)),
    C("lr-nan", "learning rate NaN",
      lambda w, d: descend(w.problem, w.starts, learning_rate=float("nan")),
      ParameterError, ("learning_rate = nan",), ("must be positive",)),
    C("lr-text", "learning rate 'fast'",
      lambda w, d: descend(w.problem, w.starts, learning_rate="fast"),
      ParameterError, ("must be a number", "'fast'"), ("Write it as a number",)),
    C("lr-complex", "learning rate 0.1+1j",
      lambda w, d: descend(w.problem, w.starts, learning_rate=0.1 + 1j),
      ParameterError, ("complex",), ("real part",)),
    C("lr-empty", "an empty list of learning rates",
      lambda w, d: descend(w.problem, w.starts, learning_rate=[]),
      ParameterError, ("at least one value",), ("Give a number",)),
    C("lr-bool", "learning rate True",
      lambda w, d: descend(w.problem, w.starts, learning_rate=True),
      ParameterError, ("must be a number", "True"), ("Write it as a number",)),
    C("steps-zero", "a step budget of 0",
      lambda w, d: descend(w.problem, w.starts, steps=0),
      ParameterError, ("steps", "got 0"), ("between 1 and 1000000",)),
    C("steps-float", "a step budget of 10.0",
      lambda w, d: descend(w.problem, w.starts, steps=10.0),
      ParameterError, ("steps", "10.0"), ("positive integer",)),
    C("steps-huge", "a step budget of 10**9 (records would exhaust memory)",
      lambda w, d: descend(w.problem, w.starts, steps=10**9),
      ParameterError, ("steps", "1000000000"), ("between 1 and 1000000",)),
    C("momentum-range", "momentum 1.5",
      lambda w, d: descend(w.problem, w.starts, optimizer="momentum", hyper={"momentum": 1.5}),
      ParameterError, ("momentum = 1.5", "out of range"), ("[0.0, 1.0)",)),
    C("hyper-unknown", "a hyper-parameter the rule does not have",
      lambda w, d: descend(w.problem, w.starts, hyper={"beta": 0.5}),
      ParameterError, ("no hyper-parameter ['beta']",), ("its hyper-parameters are",)),
    C("optimizer-unknown", "optimizer name 'sgdx'",
      lambda w, d: descend(w.problem, w.starts, optimizer="sgdx"),
      ParameterError, ("unknown optimizer 'sgdx'",), ("choose one of",)),
    C("optimizer-type", "optimizer given as a number",
      lambda w, d: descend(w.problem, w.starts, optimizer=3),
      ParameterError, ("got int",), ("a rule name",)),
    C("batch-too-large", "minibatches of 50 rows from 3 rows of data",
      lambda w, d: descend(w.data_problem, np.zeros(3), batch_size=50),
      ParameterError, ("batch_size", "50"), ("integer from 1 to 3",)),
    C("batch-without-data", "minibatches for a problem without data",
      lambda w, d: descend(w.problem, w.starts, batch_size=4),
      ParameterError, ("minibatches need data",), ("batch_size=None",)),
    C("tolerance-negative", "grad_tol -1",
      lambda w, d: descend(w.problem, w.starts, grad_tol=-1.0),
      ParameterError, ("grad_tol", "-1"), ("non-negative",)),
    C("divergence-factor-zero", "divergence_factor 0",
      lambda w, d: descend(w.problem, w.starts, divergence_factor=0.0),
      ParameterError, ("divergence_factor",), ("must be positive",)),
    C("seed-too-large", "a minibatch seed of 2**40",
      lambda w, d: descend(w.problem, w.starts, seed=2**40, steps=5),
      ParameterError, ("seed",), ("2**32",)),
]

ANALYSIS_CASES = [
    C("hessian-k", "k = 0 eigenpairs",
      lambda w, d: hessian_spectrum(w.problem, w.problem.theta0, k=0),
      ParameterError, ("k must be", "got 0"), ("integer from 1 to 2",)),
    C("hessian-method", "an unknown eigen-solver 'power'",
      lambda w, d: hessian_spectrum(w.problem, w.problem.theta0, method="power"),
      ParameterError, ("method", "'power'"), ("'auto', 'exact' or 'lanczos'",)),
    C("hessian-nan-point", "a curvature point containing NaN",
      lambda w, d: hessian_spectrum(w.problem, np.array([np.nan, 1.0])),
      ParameterError, ("contains NaN",), ("finite point",)),
    C("hessian-in-a-gap", "a curvature point where the loss is NaN",
      lambda w, d: hessian_spectrum(w.holey, np.array([4.0, 0.0])),
      ParameterError, ("the loss is nan at this point",),
      ("choose a point where the loss is finite",)),
    C("sweep-empty", "a step-size sweep without rates",
      lambda w, d: step_size_sweep(w.problem, w.starts, learning_rates=[]),
      ParameterError, ("at least one value",), ("learning_rates=",)),
    C("sweep-negative", "a sweep including a negative rate",
      lambda w, d: step_size_sweep(w.problem, w.starts, learning_rates=[-1.0, 0.01]),
      ParameterError, ("learning_rate", "-1.0"), ("must be positive",)),
    C("sweep-hyper-list", "a sweep with a list of momenta",
      lambda w, d: step_size_sweep(w.problem, w.starts, learning_rates=[0.01],
                                   optimizer="momentum", hyper={"momentum": [0.5, 0.9]}),
      ParameterError, ("one value per other hyper-parameter",), ("sweep them separately",)),
    C("basins-rates", "a basin map with two learning rates",
      lambda w, d: basin_map(w.problem, w.plane, learning_rate=[0.01, 0.02]),
      ParameterError, ("one learning rate",), ("once per rate",)),
    C("basins-resolution", "a basin map of 5000 x 5000 starts",
      lambda w, d: basin_map(w.problem, w.plane, resolution=5000),
      ParameterError, ("between 2 and 4001",), ("zoom in with span",)),
    C("minima-other-runs", "runs of a 2-parameter problem with a 3-parameter problem",
      lambda w, d: find_minima(w.data_problem, w.results["runs"]),
      ParameterError, ("2 parameters", "has 3"), ("Pass the problem the runs were made with",)),
    C("starts-grid-huge", "a 4000 x 4000 grid of starts",
      lambda w, d: grid_starts(w.plane, resolution=4000),
      ParameterError, ("more than 1000000 starts",), ("lower the resolution",)),
    C("starts-count", "zero random starts",
      lambda w, d: random_starts(w.problem, 0),
      ParameterError, ("count", "got 0"), ("integer from 1 to",)),
    C("starts-initialiser-raises", "an initialiser that raises",
      lambda w, d: initializer_starts(w.problem, raising_init, 2),
      ParameterError, ("raised RuntimeError",), ("runs on its own",)),
    C("starts-spec-field", "a random-starts spec without its count",
      lambda w, d: starts_from_spec(w.problem, {"kind": "random", "seed": 0, "scale": 1.0}),
      ParameterError, ("lacks the field 'count'",), ("Rebuild the starts",)),
    C("starts-user-array", "Starts built on the user's own array containing NaN",
      lambda w, d: Starts(w.user["points"], {"kind": "explicit"}),
      ParameterError, ("contains NaN",), ("must be finite",)),
]

SETTINGS_CASES = [
    C("settings-truncated", "settings JSON cut off in the middle",
      lambda w, d: Settings.from_json(w.settings_json[: len(w.settings_json) // 2]),
      SettingsError, ("not valid JSON", "truncated"), ("Restore the file",)),
    C("settings-empty", "an empty settings text",
      lambda w, d: Settings.from_json(""),
      SettingsError, ("not valid JSON",), ("Restore the file",)),
    C("settings-not-object", "a JSON list instead of an object",
      lambda w, d: Settings.from_json("[1, 2]"),
      SettingsError, ("must be an object", "list"), ("record the view again",)),
    C("settings-newer", "schema 99 (written by a newer version)",
      lambda w, d: Settings.from_json(_settings_text(w, schema=99)),
      SettingsError, ("schema 99", "newer basinview"), ("Upgrade basinview",)),
    C("settings-steps-negative", "a tampered step budget -4",
      lambda w, d: Settings.from_json(_settings_text(w, steps=-4)),
      SettingsError, ("'steps'", "-4"), ("Restore the file",)),
    C("settings-steps-huge", "a tampered step budget 10**12",
      lambda w, d: Settings.from_json(_settings_text(w, steps=10**12)),
      SettingsError, ("'steps'", "at most 1000000"), ("Restore the file",)),
    C("settings-rate-text", "learning rates tampered into strings",
      lambda w, d: Settings.from_json(_settings_text(w, learning_rate=["0.1"])),
      SettingsError, ("'learning_rate'", "finite numbers"), ("Restore the file",)),
    C("settings-unknown-field", "an extra field 'command'",
      lambda w, d: Settings.from_json(_settings_text(w, command="rm -rf /")),
      SettingsError, ("unknown fields ['command']",), ("Restore the file",)),
    C("settings-missing-field", "the optimizer field removed",
      lambda w, d: Settings.from_json(
          json.dumps({k: v for k, v in json.loads(w.settings_json).items() if k != "optimizer"})),
      SettingsError, ("lacks the fields ['optimizer']",), ("Restore the file",)),
    C("settings-duplicate-key", "a key given twice",
      lambda w, d: Settings.from_json(w.settings_json.replace('"seed"', '"seed": 1, "seed"', 1)),
      SettingsError, ("repeats the key 'seed'",), ("Restore the file",)),
    C("settings-nan", "NaN written into the JSON",
      lambda w, d: Settings.from_json(w.settings_json.replace('"grad_tol": ', '"grad_tol": NaN, "x": ', 1)),
      SettingsError, ("NaN",), ("Restore the file",)),
    C("settings-seed-range", "a seed of 2**40",
      lambda w, d: Settings.from_json(_settings_text(w, seed=2**40)),
      SettingsError, ("'seed'", "4294967295"), ("Restore the file",)),
    C("settings-not-utf8", "binary bytes instead of text",
      lambda w, d: Settings.from_json(b"\xff\xfe\x00garbage"),
      SettingsError, ("not UTF-8",), ("Settings.save()",)),
    C("settings-pickle", "a pickle instead of JSON",
      lambda w, d: Settings.from_json(_pickled(w)),
      SettingsError, ("pickle", "never unpickles"), ("Settings.save()",)),
    C("settings-deep", "JSON nested 100 000 levels deep",
      lambda w, d: Settings.from_json("[" * 100_000 + "]" * 100_000),
      SettingsError, ("nested",), ("Restore the file",)),
    C("settings-long-integer", "an integer of 5000 digits",
      lambda w, d: Settings.from_json('{"schema": 1, "steps": ' + "9" * 5000 + "}"),
      SettingsError, ("refuses to read", "digits"), ("Restore the file",)),
    C("settings-other-problem", "settings of a 2-parameter problem for a 3-parameter one",
      lambda w, d: Settings.from_json(w.settings_json, problem=w.data_problem),
      SettingsError, ("2 parameters", "has 3"), ("Load them with the problem",)),
    C("settings-path-as-label", "'../../etc/passwd' as a plane coordinate label",
      lambda w, d: compute_view(w.problem, _tampered_plane(w, kind="axes", x="../../etc/passwd", y="y")),
      SettingsError, ("'plane' cannot be rebuilt", "unknown coordinate label"), ("problem.labels",)),
    C("settings-spec-type", "a plane seed tampered into text",
      lambda w, d: compute_view(w.problem, _tampered_plane(w, kind="random", seed="1")),
      SettingsError, ("'seed' must be int",), ("use its .spec",)),
    C("settings-load-missing", "loading a file that does not exist",
      lambda w, d: Settings.load(d / "nowhere.json"),
      SettingsError, ("no settings file",), ("check the path",)),
    C("settings-load-folder", "loading a folder",
      lambda w, d: Settings.load(d),
      SettingsError, ("is a folder",), ("give the path of the .json file",)),
    C("settings-load-huge", "loading a 100 MB file",
      lambda w, d: Settings.load(_sparse(d.parent, "huge.json", 100 * 2**20)),
      SettingsError, ("larger than",), ("give the path of the .json file",)),
    C("settings-save-suffix", "saving to view.pkl",
      lambda w, d: w.settings.save(d / "view.pkl"),
      SettingsError, ("end in .json", "view.pkl"), ("name like view.json",)),
    C("settings-save-no-folder", "saving into a folder that does not exist",
      lambda w, d: w.settings.save(d / "missing" / "view.json"),
      SettingsError, ("does not exist",), ("create it first",)),
    C("settings-save-onto-folder", "saving onto a folder named like a file",
      lambda w, d: w.settings.save(d / "folder.json"),
      SettingsError, ("is a folder",), ("give a file name ending in .json",)),
    C("settings-save-nan", "saving settings holding NaN over the kept file",
      lambda w, d: dataclasses.replace(w.settings, grad_tol=float("nan")).save(w.settings_file),
      SettingsError, ("NaN or inf",), ("finite",)),
]
# fmt: on
del C

API_CASES: list[Case] = (
    LOSS_CASES
    + PARAMETER_CASES
    + PLANE_CASES
    + SURFACE_CASES
    + DESCENT_CASES
    + ANALYSIS_CASES
    + SETTINGS_CASES
)

# ------------------------------------------------------------ widget entries
@dataclass(frozen=True)
class WidgetCase:
    """One bad input given to the Explorer (a control or a method) and what it must say.

    ``act(explorer, folder)`` either sets controls (the error must appear in
    the status line) or calls a method (the error must be raised). Either way
    the last good view, the recorded snapshots and the user's files stay.
    """

    id: str
    bad_input: str
    act: Callable[[Any, Path], Any]
    problem: tuple[str, ...]
    fix: tuple[str, ...]
    error: type[BasinviewError] = BasinviewError
    xfail: str = ""


def _control(name: str, value: Any) -> Callable[[Any, Path], None]:
    def act(ex: Any, folder: Path) -> None:
        getattr(ex.controls, name).value = value

    return act


def _set(**changes: Any) -> Callable[[Any, Path], None]:
    return lambda ex, folder: ex.set(**changes)


def _failing_update(ex: Any, folder: Path) -> None:
    original = ex.computer.update

    def broken(state):
        raise RuntimeError("simulated failure inside a callback")

    ex.computer.update = broken
    try:
        ex.controls.steps.value = ex.state.steps + 7
    finally:
        ex.computer.update = original


W = WidgetCase
# fmt: off
WIDGET_CASES: list[WidgetCase] = [
    W("widget-same-axes", "x axis set to the y axis's coordinate", _control("x_label", "y"),
      ("must differ",), ("choose two different",)),
    W("widget-no-starts", "random starts set to 0 with no clicked starts", _control("n_starts", 0),
      ("no starts",), ("above 0", "click the map")),
    W("widget-steps-zero", "steps set to 0", _set(steps=0),
      ("steps",), ("between 1 and",)),
    W("widget-negative-rate", "learning rate set to -1", _set(learning_rate=-1.0),
      ("learning_rate", "out of range"), ("must be positive",)),
    W("widget-huge-resolution", "resolution 100,000 per axis", _set(resolution=100_000),
      ("resolution", "100000"), ("zoom in with span",)),
    W("widget-empty-span", "a span whose range has min = max", _set(span=((1.0, 1.0), (0.0, 1.0))),
      ("min < max",), ("must be positive",)),
    W("widget-zero-spread", "start spread 0", _set(start_scale=0.0),
      ("scale",), ("positive number",)),
    W("widget-unknown-optimizer", "optimizer name not known", _set(optimizer="adamax"),
      ("unknown optimizer 'adamax'",), ("choose one of", "optax")),
    W("widget-degenerate-random-plane", "filter-normalised random plane where a leaf is zero",
      _control("plane_kind", "random"), ("parallel",), ("normalise='none'",)),
    W("widget-callback-raises", "an exception inside a widget callback", _failing_update,
      ("unexpected RuntimeError", "simulated failure"), ("last good settings",)),
    W("widget-save-wrong-suffix", "save_snapshot to a .pkl name",
      lambda ex, d: ex.save_snapshot(d / "view.pkl"), ("end in .json",), ("view.json",), SettingsError),
    W("widget-save-no-folder", "save_snapshot into a folder that does not exist",
      lambda ex, d: ex.save_snapshot(d / "missing" / "view.json"), ("missing",), ("create",), SettingsError),
    W("widget-from-other-plane", "Explorer.from_settings on settings of a plane through three points",
      lambda ex, d: type(ex).from_settings(ex.problem, _through_settings(ex)),
      ("'through' plane",), ("compute_view",), ParameterError),
]
# fmt: on
del W


def _through_settings(ex: Any) -> Settings:
    raw = json.loads(ex.computer.settings().to_json())
    raw["plane"] = {"kind": "through", "points": [[1.0, 1.0], [5.0, 3.0], [5.0, -3.0]]}
    return Settings.from_json(json.dumps(raw))


def _params_by_id(cases: list[Any]) -> list[Any]:
    return [
        pytest.param(
            c,
            id=c.id,
            marks=[pytest.mark.xfail(strict=True, reason=c.xfail)] if c.xfail else [],
        )
        for c in cases
    ]


def _contains_all(text: str, words: tuple[str, ...]) -> list[str]:
    low = text.lower()
    return [w for w in words if w.lower() not in low]


def _user_folder(tmp_path: Path) -> Path:
    folder = tmp_path / "user"
    folder.mkdir()
    (folder / "notes.txt").write_text("my notes\n")
    (folder / "view.json.tmp").write_text("the user's own file\n")
    (folder / "folder.json").mkdir()
    return folder


@pytest.mark.parametrize("case", _params_by_id(API_CASES))
def test_bad_input_is_explained_and_loses_nothing(world, case, tmp_path):
    folder = _user_folder(tmp_path)
    before = folder_state(folder)
    with pytest.raises(BasinviewError) as info:
        case.call(world, folder)
    message = str(info.value)
    assert isinstance(info.value, case.error), f"{type(info.value).__name__}: {message}"
    assert not _contains_all(message, case.problem), f"does not name the problem: {message}"
    assert not _contains_all(message, case.fix), f"does not say how to fix it: {message}"
    assert_nothing_lost(world, folder, before)


def test_the_loss_check_can_fail(world, tmp_path):
    """assert_nothing_lost notices a changed result, file, setting or frozen user array."""
    folder = _user_folder(tmp_path)
    before = folder_state(folder)
    assert_nothing_lost(world, folder, before)
    runs = world.results["runs"]
    changed = dataclasses.replace(runs, losses=np.where(np.isnan(runs.losses), 0.0, runs.losses))
    breaks = [
        dataclasses.replace(world, results={**world.results, "runs": changed}),
        dataclasses.replace(world, settings=dataclasses.replace(world.settings, note="edited")),
        dataclasses.replace(world, user={**world.user, "d1": np.zeros(2, np.float32)}),
    ]
    frozen = world.user["origin"].copy()
    frozen.setflags(write=False)
    breaks.append(dataclasses.replace(world, user={**world.user, "origin": frozen}))
    for broken in breaks:
        with pytest.raises(AssertionError):
            assert_nothing_lost(broken, folder, before)
    (folder / "notes.txt").write_text("overwritten\n")
    with pytest.raises(AssertionError, match="files in the user's folder changed"):
        assert_nothing_lost(world, folder, before)


def test_catalogue_is_large_and_ids_are_unique():
    ids = [c.id for c in CATALOGUE]
    assert len(ids) == len(set(ids))
    assert len(API_CASES) >= 25


@pytest.fixture(scope="module")
def explorer_problem():
    from basinview.scenarios import beacon

    return beacon().problem


@pytest.mark.parametrize("case", _params_by_id(WIDGET_CASES))
def test_bad_widget_input_keeps_the_last_good_view(explorer_problem, case, tmp_path):
    from basinview import Explorer

    ex = Explorer(explorer_problem, x="x", y="y", origin=np.array([5.0, 0.0]), span=6.0, resolution=21, steps=60, n_starts=3, start_scale=3.0)
    snapshot = ex.record("kept")
    folder = _user_folder(tmp_path)
    before_files = folder_state(folder)
    shown = lambda: (ex.main.traces, ex.main.grids, ex.main.plot_layout)
    state, figure, table = ex.state, shown(), ex.snapshots.copy()
    raised = None
    try:
        case.act(ex, folder)
    except BasinviewError as exc:
        raised = exc
    if raised is not None:
        assert isinstance(raised, case.error), f"{type(raised).__name__}: {raised}"
        message = str(raised)
    else:
        message = html.unescape(ex.status.value)
        assert "⚠" in message, f"no error shown: {message}"
    assert not _contains_all(message, case.problem), f"does not name the problem: {message}"
    assert not _contains_all(message, case.fix), f"does not say how to fix it: {message}"
    # nothing lost: view, controls, snapshots, files
    assert ex.state == state
    assert shown() == figure
    pd.testing.assert_frame_equal(ex.snapshots, table)
    assert ex.log[0] == snapshot
    assert ex.controls.read(ex.state) == state
    assert folder_state(folder) == before_files
    # and the widget still works
    ex.controls.learning_rate.value = 0.3
    assert ex.state.learning_rate == pytest.approx(0.3)


# ------------------------------------------------------------------ the CLI
@dataclass(frozen=True)
class CliCase:
    """One bad command line: it must exit with 2 and one clear line on stderr."""

    id: str
    bad_input: str
    argv: tuple[str, ...]
    problem: tuple[str, ...]
    fix: tuple[str, ...]
    xfail: str = ""


MODEL_SOURCE = """\
import jax.numpy as jnp


def loss(p, x, y):
    return jnp.mean((x * p["w"] + p["b"] - y) ** 2)


def raising(p, x, y):
    raise ZeroDivisionError("bad model")


not_a_function = 3
"""


def _cli_folder(root: Path) -> Path:
    """A folder with a model, good and bad input files, and a file that is not a report."""
    root.mkdir(parents=True, exist_ok=True)
    (root / "usermodel.py").write_text(MODEL_SOURCE)
    (root / "params.json").write_text(json.dumps({"w": 0.5, "b": 0.0}))
    np.savez(root / "data.npz", x=np.linspace(0, 1, 8), y=np.linspace(1, 3, 8))
    (root / "broken.json").write_text('{"w": 0.5, "b": ')
    (root / "words.json").write_text(json.dumps({"w": "half", "b": 0.0}))
    (root / "broken.npz").write_bytes(b"PK\x03\x04 not really a zip")
    np.savez(root / "objects.npz", x=np.array([{"a": 1}, None], dtype=object), y=np.ones(2))
    with zipfile.ZipFile(root / "bare.npz", "w"):
        pass
    (root / "notes.html").write_text("<html>my own page, not a report</html>\n")
    return root


R = ("report", "usermodel:loss", "--params", "params.json", "--data", "data.npz")
K = CliCase
# fmt: off
CLI_CASES = [
    K("cli-no-command", "no subcommand", (),
      ("required", "command"), ("usage",)),
    K("cli-unknown-command", "an unknown subcommand 'plot'", ("plot",),
      ("invalid choice", "'plot'"), ("choose from",)),
    K("cli-starts-text", "demo --starts abc", ("demo", "--starts", "abc"),
      ("--starts", "invalid int value"), ("'abc'",)),
    K("cli-starts-zero", "demo --starts 0", ("demo", "--starts", "0", "--out", "d.html"),
      ("count", "got 0"), ("integer from 1 to",)),
    K("cli-out-suffix", "demo --out notes.txt", ("demo", "--out", "notes.txt"),
      ("end in .html",), ("Choose a name like report.html",)),
    K("cli-function-spec", "report with 'usermodel' (no :function)",
      ("report", "usermodel", "--params", "params.json"),
      ("expected MODULE:FUNCTION",), ("e.g. mymodel:loss",)),
    K("cli-module-missing", "report with a module that is not there",
      ("report", "nomodel:loss", "--params", "params.json"),
      ("cannot find module 'nomodel'",), ("run from the folder that holds it",)),
    K("cli-function-missing", "report with a function the module lacks",
      ("report", "usermodel:lost", "--params", "params.json"),
      ("has no 'lost'",), ("callables it defines",)),
    K("cli-not-a-function", "report with a module attribute that is a number",
      ("report", "usermodel:not_a_function", "--params", "params.json"),
      ("not a function",), ("MODULE:FUNCTION",)),
    K("cli-params-missing", "--params file that does not exist",
      ("report", "usermodel:loss", "--params", "nothere.json"),
      ("does not exist",), ("check the path",)),
    K("cli-params-truncated", "--params JSON cut off", (*R[:3], "broken.json", *R[4:]),
      ("not valid JSON", "broken.json"), ("fix the file",)),
    K("cli-params-words", "--params holding a string value", (*R[:3], "words.json", *R[4:]),
      ("\"half\"",), ("must be numbers",)),
    K("cli-params-not-zip", "--params .npz that is not a zip file",
      (*R[:3], "broken.npz", *R[4:]),
      ("not a .npz archive", "broken.npz"), ("write it with numpy.savez",)),
    K("cli-data-missing", "--data file that does not exist", (*R[:5], "nodata.npz"),
      ("does not exist",), ("check the path",)),
    K("cli-data-pickled", "--data holding object (pickled) arrays", (*R[:5], "objects.npz"),
      ("object (pickled) arrays",), ("save plain numeric arrays",)),
    K("cli-data-empty", "--data .npz with no arrays", (*R[:5], "bare.npz"),
      ("no arrays",), ("numpy.savez",)),
    K("cli-data-keys", "--data-keys naming arrays the file lacks",
      (*R, "--data-keys", "inputs,targets"),
      ("names ['inputs', 'targets']",), ("its arrays are",)),
    K("cli-out-not-report", "--out pointing at the user's own HTML page",
      (*R, "--out", "notes.html"),
      ("not a basinview report", "left untouched"), ("Choose another path",)),
    K("cli-out-no-folder", "--out in a folder that does not exist",
      (*R, "--out", "missing/report.html"),
      ("does not exist",), ("create it first",)),
    K("cli-loss-raises", "a loss that raises", ("report", "usermodel:raising", *R[2:]),
      ("raised ZeroDivisionError",), ("loss(params, *data)",)),
    K("cli-rate-negative", "--learning-rate -1", (*R, "--learning-rate", "-1"),
      ("learning_rate", "out of range"), ("must be positive",)),
    K("cli-plane-label", "--plane with an unknown label", (*R, "--plane", "w,z"),
      ("unknown coordinate label 'z'",), ("problem.labels",)),
]
# fmt: on
del K

CATALOGUE: list[Any] = API_CASES + CLI_CASES + WIDGET_CASES


SUBPROCESS_IDS = ("cli-no-command", "cli-starts-zero", "cli-params-words")
"""Entries also run as a real ``python -m basinview`` process (the rest run ``main()``)."""


def _run_in_process(case: CliCase, folder: Path) -> tuple[int, str]:
    """``main(argv)`` in ``folder``: exit code and stderr; sys.path and modules restored."""
    from basinview.__main__ import main

    cwd, path, modules = os.getcwd(), list(sys.path), set(sys.modules)
    err = io.StringIO()
    os.chdir(folder)
    try:
        with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(err):
            try:
                code = main(list(case.argv))
            except SystemExit as exc:  # argparse
                code = exc.code
    finally:
        os.chdir(cwd)
        sys.path[:] = path
        for name in set(sys.modules) - modules:
            if name.split(".")[0] == "usermodel":
                del sys.modules[name]
    return int(code), err.getvalue()


def _run_process(case: CliCase, folder: Path) -> tuple[int, str]:
    env = dict(os.environ, PYTHONPATH=str(ROOT), JAX_PLATFORMS="cpu")
    proc = subprocess.run(
        [sys.executable, "-m", "basinview", *case.argv],
        cwd=folder,
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
    )
    return proc.returncode, proc.stderr


@pytest.fixture(scope="module")
def cli_processes(tmp_path_factory):
    """The SUBPROCESS_IDS entries, run as real processes in parallel."""
    base = tmp_path_factory.mktemp("cli-process")
    cases = [c for c in CLI_CASES if c.id in SUBPROCESS_IDS]

    def run(case: CliCase) -> tuple[int, str, dict, dict]:
        folder = _cli_folder(base / case.id)
        before = folder_state(folder)
        code, err = _run_process(case, folder)
        return code, err, before, folder_state(folder)

    with ThreadPoolExecutor(max_workers=len(cases)) as pool:
        return dict(zip([c.id for c in cases], pool.map(run, cases)))


def _check_cli(case: CliCase, code: int, err: str, before: dict, after: dict) -> None:
    err = err.strip()
    assert code == 2, f"exit {code}: {err[-2000:]}"
    assert "Traceback" not in err, err[-2000:]
    lines = err.splitlines()
    last = lines[-1] if lines else ""
    assert last.startswith("basinview") and "error:" in last, err
    assert len(lines) <= 3, f"more than a usage line and one message: {err}"
    text = err if case.id in ("cli-no-command", "cli-starts-text") else last
    assert not _contains_all(text, case.problem), f"does not name the problem: {err}"
    assert not _contains_all(text, case.fix), f"does not say how to fix it: {err}"
    for key in [k for k in after if k.startswith("__pycache__")]:
        del after[key]  # Python's own import cache of the user's module
    assert after == before, "the command wrote, replaced or deleted a file"


@pytest.mark.parametrize("case", _params_by_id(CLI_CASES))
def test_bad_command_line_is_one_clear_line(case, tmp_path):
    folder = _cli_folder(tmp_path / "cli")
    before = folder_state(folder)
    code, err = _run_in_process(case, folder)
    _check_cli(case, code, err, before, folder_state(folder))


@pytest.mark.parametrize("case", _params_by_id([c for c in CLI_CASES if c.id in SUBPROCESS_IDS]))
def test_bad_command_line_in_a_real_process(cli_processes, case):
    code, err, before, after = cli_processes[case.id]
    _check_cli(case, code, err, before, after)


# -------------------------------------------------------------- the table
def catalogue_markdown() -> str:
    """The catalogue as a Markdown table (for docs/bad_inputs.md)."""
    rows = [
        "| id | bad input | error | message names | message says (fix) |",
        "|---|---|---|---|---|",
    ]
    for c in CATALOGUE:
        if isinstance(c, WidgetCase):
            error = "status line" if c.error is BasinviewError else c.error.__name__
        else:
            error = c.error.__name__ if isinstance(c, Case) else "exit 2"
        status = f" **xfail: {c.xfail}**" if c.xfail else ""
        rows.append(
            f"| `{c.id}` | {c.bad_input} | {error} | "
            + ", ".join(f"`{w}`" for w in c.problem)
            + " | "
            + ", ".join(f"`{w}`" for w in c.fix)
            + status
            + " |"
        )
    return "\n".join(rows)


# docs/bad_inputs.md is this table, written by `python -m tools.make_docs`;
# tests/test_docs.py checks that the committed file matches it.


if __name__ == "__main__":
    print(catalogue_markdown())
