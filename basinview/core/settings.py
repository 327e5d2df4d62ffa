"""Settings: a frozen, JSON-only record of everything needed to reproduce a view.

A :class:`Settings` holds the plane, span and resolution of the slice, the
starts, the optimiser and its hyper-parameters, learning rates, step budget,
tolerances and seeds, plus the loss's qualified name, a fingerprint of the
data and initial parameters and the library versions. It round-trips
exactly through JSON. Loading never unpickles or evaluates anything: the
file is data, validated field by field, and settings hold no file paths.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import json
import math
import os
import platform
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .descent import Runs, descend
from .errors import FingerprintWarning, SettingsError
from .planes import Plane, plane_from_spec
from .problem import Problem
from .starts import Starts, starts_from_spec
from .surface import Surface, _ranges, _resolution, evaluate_surface

__all__ = [
    "SCHEMA_VERSION",
    "Settings",
    "View",
    "compute_view",
    "library_versions",
    "record_settings",
]

SCHEMA_VERSION = 1
MAX_SETTINGS_BYTES = 64 * 2**20


def library_versions() -> dict[str, str]:
    """Versions of Python, basinview and the numerical libraries in use."""
    import jax
    import optax
    import pandas

    from .. import __version__

    return {
        "basinview": __version__,
        "python": platform.python_version(),
        "jax": jax.__version__,
        "numpy": np.__version__,
        "optax": optax.__version__,
        "pandas": pandas.__version__,
    }


@dataclass(frozen=True)
class Settings:
    """Everything needed to reproduce a view. Build with :func:`record_settings`."""

    loss_name: str
    fingerprint: str
    n_params: int
    dtype: str
    plane: dict[str, Any]
    span: tuple[tuple[float, float], tuple[float, float]]
    resolution: tuple[int, int]
    starts: dict[str, Any]
    optimizer: str
    learning_rate: tuple[float, ...]
    hyper: dict[str, tuple[float, ...]]
    steps: int
    grad_tol: float
    loss_tol: float
    divergence_factor: float
    batch_size: int | None
    seed: int
    note: str = ""
    created: str = ""
    versions: dict[str, str] = field(default_factory=dict)
    schema: int = SCHEMA_VERSION

    # --------------------------------------------------------------- JSON
    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict (lists instead of tuples)."""
        return json.loads(self.to_json())

    def to_json(self, *, indent: int | None = 2) -> str:
        """The settings as JSON text (exact round trip with :meth:`from_json`)."""
        data = {f.name: _jsonable(getattr(self, f.name)) for f in dataclasses.fields(self)}
        try:
            return json.dumps(data, indent=indent, allow_nan=False, sort_keys=True)
        except ValueError as exc:
            raise SettingsError(
                f"settings contain NaN or inf and cannot be written as JSON: {exc}"
            ) from None

    @classmethod
    def from_json(cls, text: str | bytes, *, problem: Problem | None = None) -> Settings:
        """Parse settings JSON; validate every field. Warns if ``problem`` differs."""
        if isinstance(text, bytes):
            try:
                text = text.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise SettingsError(f"settings are not UTF-8 text: {exc}") from None
        if len(text) > MAX_SETTINGS_BYTES:
            raise SettingsError(
                f"settings text is {len(text)} bytes; the limit is {MAX_SETTINGS_BYTES}."
            )
        try:
            raw = json.loads(text, object_pairs_hook=_no_duplicates, parse_constant=_no_constants)
        except json.JSONDecodeError as exc:
            body = text.strip()
            truncated = body.startswith("{") and not body.endswith("}")
            hint = (
                " The text ends before the record closes: was the file truncated?"
                if truncated
                else ""
            )
            raise SettingsError(
                f"settings are not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg}).{hint}"
            ) from None
        settings = _from_raw(raw)
        if problem is not None:
            settings.check(problem)
        return settings

    def save(self, path: str | os.PathLike[str]) -> Path:
        """Write the JSON to ``path`` (only there) and return the path."""
        target = Path(path)
        if target.suffix.lower() != ".json":
            raise SettingsError(f"settings files end in .json; got {str(target)!r}.")
        text = self.to_json()
        tmp = target.with_name(target.name + ".tmp")
        tmp.write_text(text + "\n", encoding="utf-8")
        tmp.replace(target)
        return target

    @classmethod
    def load(cls, path: str | os.PathLike[str], *, problem: Problem | None = None) -> Settings:
        """Read settings JSON from ``path``."""
        p = Path(path)
        if not p.is_file():
            raise SettingsError(f"no settings file at {str(p)!r}.")
        if p.stat().st_size > MAX_SETTINGS_BYTES:
            raise SettingsError(
                f"{str(p)!r} is larger than {MAX_SETTINGS_BYTES} bytes; not a settings file."
            )
        return cls.from_json(p.read_bytes(), problem=problem)

    # ------------------------------------------------------------ checks
    def check(self, problem: Problem) -> bool:
        """Whether ``problem`` is the one these settings were recorded for.

        Warns (:class:`FingerprintWarning`) when the data or initial
        parameters differ; raises when the parameter count differs.
        """
        if problem.size != self.n_params:
            raise SettingsError(
                f"these settings are for a problem with {self.n_params} parameters; this "
                f"problem has {problem.size}."
            )
        if problem.fingerprint != self.fingerprint:
            warnings.warn(
                f"these settings were recorded for other data or initial parameters "
                f"(fingerprint {self.fingerprint}, this problem {problem.fingerprint}); "
                "results may differ from the recorded view.",
                FingerprintWarning,
                stacklevel=3,
            )
            return False
        return True


def _jsonable(value: Any) -> Any:
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating,)):
        return float(value)
    return value


def _no_duplicates(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in pairs:
        if key in out:
            raise SettingsError(
                f"settings JSON repeats the key {key!r}; the file was edited or corrupted."
            )
        out[key] = value
    return out


def _no_constants(name: str) -> Any:
    raise SettingsError(f"settings JSON contains {name}, which is not valid JSON.")


def _expect(raw: dict[str, Any], key: str, kinds: tuple[type, ...], what: str) -> Any:
    value = raw[key]
    if isinstance(value, bool) and bool not in kinds:
        raise SettingsError(f"settings field {key!r} must be {what}; got {value!r}.")
    if not isinstance(value, kinds):
        raise SettingsError(
            f"settings field {key!r} must be {what}; got {type(value).__name__} {value!r}."
        )
    return value


def _number(key: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise SettingsError(f"settings field {key!r} must hold finite numbers; got {value!r}.")
    return float(value)


def _numbers(key: str, value: Any) -> tuple[float, ...]:
    if not isinstance(value, list) or not value:
        raise SettingsError(
            f"settings field {key!r} must be a non-empty list of numbers; got {value!r}."
        )
    return tuple(_number(key, v) for v in value)


def _from_raw(raw: Any) -> Settings:
    if not isinstance(raw, dict):
        raise SettingsError(f"settings JSON must be an object; got {type(raw).__name__}.")
    schema = raw.get("schema")
    if isinstance(schema, bool) or not isinstance(schema, int):
        raise SettingsError(
            "settings JSON has no integer 'schema' field; this is not a basinview settings record."
        )
    if schema > SCHEMA_VERSION:
        raise SettingsError(
            f"these settings use schema {schema}, written by a newer basinview; this version "
            f"reads schema {SCHEMA_VERSION}. Upgrade basinview to read them."
        )
    if schema < 1:
        raise SettingsError(f"settings schema {schema} is not valid.")
    names = {f.name for f in dataclasses.fields(Settings)}
    unknown = sorted(set(raw) - names)
    if unknown:
        raise SettingsError(
            f"settings JSON has unknown fields {unknown}; it was edited or is not basinview's."
        )
    required = {
        f.name
        for f in dataclasses.fields(Settings)
        if f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING
    }
    missing = sorted(required - set(raw))
    if missing:
        raise SettingsError(
            f"settings JSON lacks the fields {missing}; was it truncated or edited?"
        )
    span_raw = _expect(raw, "span", (list,), "[[a_min, a_max], [b_min, b_max]]")
    try:
        span = _ranges(span_raw)
    except Exception as exc:
        raise SettingsError(f"settings field 'span' is invalid: {exc}") from None
    res_raw = _expect(raw, "resolution", (list,), "[ra, rb]")
    if not all(isinstance(r, int) and not isinstance(r, bool) for r in res_raw):
        raise SettingsError(f"settings field 'resolution' must hold integers; got {res_raw!r}.")
    try:
        resolution = _resolution(tuple(res_raw))
    except Exception as exc:
        raise SettingsError(f"settings field 'resolution' is invalid: {exc}") from None
    hyper_raw = _expect(raw, "hyper", (dict,), "an object of lists")
    batch = raw["batch_size"]
    if batch is not None and (isinstance(batch, bool) or not isinstance(batch, int) or batch < 1):
        raise SettingsError(
            f"settings field 'batch_size' must be null or a positive integer; got {batch!r}."
        )
    steps = _expect(raw, "steps", (int,), "a positive integer")
    if steps < 1:
        raise SettingsError(f"settings field 'steps' must be positive; got {steps}.")
    versions = raw.get("versions", {})
    if not isinstance(versions, dict) or not all(isinstance(v, str) for v in versions.values()):
        raise SettingsError("settings field 'versions' must map names to version strings.")
    plane = _expect(raw, "plane", (dict,), "an object")
    starts = _expect(raw, "starts", (dict,), "an object")
    for key, spec in (("plane", plane), ("starts", starts)):
        if not isinstance(spec.get("kind"), str):
            raise SettingsError(f"settings field {key!r} needs a 'kind' string.")
    return Settings(
        loss_name=_expect(raw, "loss_name", (str,), "a string"),
        fingerprint=_expect(raw, "fingerprint", (str,), "a string"),
        n_params=_expect(raw, "n_params", (int,), "an integer"),
        dtype=_expect(raw, "dtype", (str,), "a string"),
        plane=plane,
        span=span,
        resolution=resolution,
        starts=starts,
        optimizer=_expect(raw, "optimizer", (str,), "a string"),
        learning_rate=_numbers("learning_rate", raw["learning_rate"]),
        hyper={str(k): _numbers(f"hyper.{k}", v) for k, v in hyper_raw.items()},
        steps=steps,
        grad_tol=_number("grad_tol", raw["grad_tol"]),
        loss_tol=_number("loss_tol", raw["loss_tol"]),
        divergence_factor=_number("divergence_factor", raw["divergence_factor"]),
        batch_size=batch,
        seed=_expect(raw, "seed", (int,), "an integer"),
        note=_expect(raw, "note", (str,), "a string") if "note" in raw else "",
        created=_expect(raw, "created", (str,), "a string") if "created" in raw else "",
        versions=dict(versions),
        schema=schema,
    )


def record_settings(
    problem: Problem,
    *,
    plane: Plane,
    span: Any,
    resolution: Any,
    starts: Starts,
    runs: Runs,
    note: str = "",
) -> Settings:
    """The :class:`Settings` of a computed view (plane, surface grid, starts and runs)."""
    cfg = runs.config
    return Settings(
        loss_name=problem.name,
        fingerprint=problem.fingerprint,
        n_params=problem.size,
        dtype=str(problem.dtype),
        plane=json.loads(json.dumps(plane.spec)),
        span=_ranges(span),
        resolution=_resolution(resolution),
        starts=json.loads(json.dumps(starts.spec)),
        optimizer=cfg["optimizer"],
        learning_rate=tuple(float(x) for x in cfg["learning_rate"]),
        hyper={k: tuple(float(x) for x in v) for k, v in cfg["hyper"].items()},
        steps=int(cfg["steps"]),
        grad_tol=float(cfg["grad_tol"]),
        loss_tol=float(cfg["loss_tol"]),
        divergence_factor=float(cfg["divergence_factor"]),
        batch_size=cfg["batch_size"],
        seed=int(cfg["seed"]),
        note=note,
        created=_dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        versions=library_versions(),
    )


@dataclass(frozen=True, eq=False)
class View:
    """A computed view: the plane, the surface on it, the starts and the runs."""

    settings: Settings
    plane: Plane
    surface: Surface
    starts: Starts
    runs: Runs


def compute_view(
    problem: Problem,
    settings: Settings,
    *,
    optimizer: Any = None,
    initializers: dict[str, Callable[[Any], Any]] | None = None,
) -> View:
    """Recompute the view that ``settings`` describe, on ``problem``.

    Args:
        problem: the problem (warns if its fingerprint differs from the record).
        settings: the record.
        optimizer: the update rule object when the record names a custom
            (optax) rule; built-in rules are found by name.
        initializers: initialiser functions by name, when the starts came
            from one.
    """
    settings.check(problem)
    plane = plane_from_spec(problem, settings.plane)
    surface = evaluate_surface(problem, plane, span=settings.span, resolution=settings.resolution)
    starts = starts_from_spec(problem, settings.starts, plane=plane, initializers=initializers)
    runs = descend(
        problem,
        starts,
        optimizer=optimizer if optimizer is not None else settings.optimizer,
        learning_rate=list(settings.learning_rate),
        hyper={k: list(v) for k, v in settings.hyper.items()},
        steps=settings.steps,
        plane=plane,
        grad_tol=settings.grad_tol,
        loss_tol=settings.loss_tol,
        divergence_factor=settings.divergence_factor,
        batch_size=settings.batch_size,
        seed=settings.seed,
    )
    return View(settings=settings, plane=plane, surface=surface, starts=starts, runs=runs)
