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
import tempfile
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .descent import MAX_STEPS, Runs, descend
from .errors import FingerprintWarning, ParameterError, SettingsError
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
MAX_DEPTH = 32
"""Deepest nesting of objects and lists a settings record may have."""
MAX_INTEGER = 2**53
"""Largest integer a settings record may hold (beyond it JSON readers disagree)."""
MAX_SEED = 2**32 - 1
"""Largest seed: descent seeds are unsigned 32-bit integers."""
_REPAIR = "Restore the file from a copy, or record the view again with record_settings()."
_PICKLE_MAGIC = (b"\x80\x02", b"\x80\x03", b"\x80\x04", b"\x80\x05")


def _bad(message: str) -> SettingsError:
    """A SettingsError for a record that was edited or damaged, with the repair hint."""
    return SettingsError(f"{message} {_REPAIR}")


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
                f"settings contain NaN or inf and cannot be written as JSON ({exc}). Replace "
                "them with finite values, e.g. dataclasses.replace(settings, grad_tol=1e-6); "
                "nothing was written."
            ) from None

    @classmethod
    def from_json(cls, text: str | bytes, *, problem: Problem | None = None) -> Settings:
        """Parse settings JSON; validate every field. Warns if ``problem`` differs."""
        if len(text) > MAX_SETTINGS_BYTES:
            raise SettingsError(
                f"settings text is {len(text)} bytes; the limit is {MAX_SETTINGS_BYTES}. "
                "A settings record is a few kilobytes of JSON: pass the text that "
                "Settings.to_json() or Settings.save() wrote."
            )
        if isinstance(text, bytes):
            if text.startswith(_PICKLE_MAGIC):
                raise SettingsError(
                    "these bytes look like a Python pickle, not settings JSON; basinview "
                    "never unpickles. Record the view with record_settings() and save it "
                    "with Settings.save()."
                )
            try:
                text = text.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise SettingsError(
                    f"settings are not UTF-8 text ({exc}); a settings file is the JSON that "
                    "Settings.save() writes. " + _REPAIR
                ) from None
        try:
            raw = json.loads(text, object_pairs_hook=_no_duplicates, parse_constant=_no_constants)
        except RecursionError:
            raise _bad(
                f"settings JSON is nested too deeply (a record nests at most {MAX_DEPTH} "
                "levels); it was not written by basinview."
            ) from None
        except json.JSONDecodeError as exc:
            body = text.strip()
            truncated = body.startswith("{") and not body.endswith("}")
            hint = (
                " The text ends before the record closes: was the file truncated?"
                if truncated
                else ""
            )
            raise _bad(
                f"settings are not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg}).{hint}"
            ) from None
        except SettingsError:
            raise
        except ValueError as exc:  # e.g. an integer with thousands of digits
            raise _bad(f"settings JSON holds a value Python refuses to read ({exc}).") from None
        _check_tree(raw)
        settings = _from_raw(raw)
        if problem is not None:
            settings.check(problem)
        return settings

    def save(self, path: str | os.PathLike[str]) -> Path:
        """Write the JSON to ``path`` (only there) and return the path."""
        target = Path(path)
        if target.suffix.lower() != ".json":
            raise SettingsError(
                f"settings files end in .json; got {str(target)!r}. Choose a name like view.json."
            )
        if target.is_dir():
            raise SettingsError(
                f"{str(target)!r} is a folder; give a file name ending in .json inside it."
            )
        if not target.parent.is_dir():
            raise SettingsError(
                f"the folder {str(target.parent)!r} does not exist; create it first or choose "
                "another path."
            )
        text = self.to_json()
        # Write a uniquely named sibling, then rename it over the target: a failed save
        # leaves the old file (and any file of the user's) exactly as it was.
        fd, tmp_name = tempfile.mkstemp(
            prefix=f".{target.name}.", suffix=".partial", dir=target.parent
        )
        tmp = Path(tmp_name)
        try:
            with os.fdopen(fd, "w", encoding="utf-8") as fh:
                fh.write(text + "\n")
            tmp.replace(target)
        except OSError as exc:
            tmp.unlink(missing_ok=True)
            raise SettingsError(
                f"could not write settings to {str(target)!r} ({exc.strerror or exc}); the "
                "previous file, if any, is unchanged. Check the path and its permissions."
            ) from None
        except BaseException:
            tmp.unlink(missing_ok=True)
            raise
        return target

    @classmethod
    def load(cls, path: str | os.PathLike[str], *, problem: Problem | None = None) -> Settings:
        """Read settings JSON from ``path``."""
        p = Path(path)
        if p.is_dir():
            raise SettingsError(
                f"{str(p)!r} is a folder, not a settings file; give the path of the .json "
                "file that Settings.save() wrote."
            )
        if not p.is_file():
            raise SettingsError(
                f"no settings file at {str(p)!r}; check the path (settings are written by "
                "Settings.save(path))."
            )
        if p.stat().st_size > MAX_SETTINGS_BYTES:
            raise SettingsError(
                f"{str(p)!r} is larger than {MAX_SETTINGS_BYTES} bytes; not a settings file. "
                "Give the path of the .json file that Settings.save() wrote."
            )
        try:
            data = p.read_bytes()
        except OSError as exc:
            raise SettingsError(
                f"cannot read {str(p)!r} ({exc.strerror or exc}); check its permissions."
            ) from None
        return cls.from_json(data, problem=problem)

    # ------------------------------------------------------------ checks
    def check(self, problem: Problem) -> bool:
        """Whether ``problem`` is the one these settings were recorded for.

        Warns (:class:`FingerprintWarning`) when the data or initial
        parameters differ; raises when the parameter count differs.
        """
        if problem.size != self.n_params:
            raise SettingsError(
                f"these settings are for a problem with {self.n_params} parameters; this "
                f"problem has {problem.size}. Load them with the problem (loss, parameters "
                "and data) they were recorded for."
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
            raise _bad(f"settings JSON repeats the key {key!r}; the file was edited or corrupted.")
        out[key] = value
    return out


def _no_constants(name: str) -> Any:
    raise _bad(f"settings JSON contains {name}, which is not valid JSON.")


def _expect(raw: dict[str, Any], key: str, kinds: tuple[type, ...], what: str) -> Any:
    value = raw[key]
    if isinstance(value, bool) and bool not in kinds:
        raise _bad(f"settings field {key!r} must be {what}; got {value!r}.")
    if not isinstance(value, kinds):
        raise _bad(f"settings field {key!r} must be {what}; got {type(value).__name__} {value!r}.")
    return value


def _number(key: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise _bad(f"settings field {key!r} must hold finite numbers; got {value!r}.")
    return float(value)


def _numbers(key: str, value: Any) -> tuple[float, ...]:
    if not isinstance(value, list) or not value:
        raise _bad(f"settings field {key!r} must be a non-empty list of numbers; got {value!r}.")
    return tuple(_number(key, v) for v in value)


def _check_tree(raw: Any) -> None:
    """Refuse records nested deeper than MAX_DEPTH or holding absurd integers (iteratively)."""
    stack = [(raw, 1)]
    while stack:
        value, depth = stack.pop()
        if depth > MAX_DEPTH:
            raise _bad(
                f"settings JSON is nested deeper than {MAX_DEPTH} levels; it was not written "
                "by basinview."
            )
        if isinstance(value, dict):
            stack.extend((v, depth + 1) for v in value.values())
        elif isinstance(value, list):
            stack.extend((v, depth + 1) for v in value)
        elif isinstance(value, int) and not isinstance(value, bool) and abs(value) > MAX_INTEGER:
            raise _bad(
                f"settings JSON holds the integer {str(value)[:20]}... ({len(str(abs(value)))} "
                f"digits), beyond {MAX_INTEGER}; no basinview setting is that large."
            )


def _integer(raw: dict[str, Any], key: str, low: int, high: int) -> int:
    value = _expect(raw, key, (int,), f"an integer from {low} to {high}")
    if not low <= value <= high:
        raise _bad(f"settings field {key!r} must be an integer from {low} to {high}; got {value}.")
    return value


def _from_raw(raw: Any) -> Settings:
    if not isinstance(raw, dict):
        raise _bad(f"settings JSON must be an object; got {type(raw).__name__}.")
    schema = raw.get("schema")
    if isinstance(schema, bool) or not isinstance(schema, int):
        raise SettingsError(
            "settings JSON has no integer 'schema' field; this is not a basinview settings "
            "record. Load a file written by Settings.save()."
        )
    if schema > SCHEMA_VERSION:
        raise SettingsError(
            f"these settings use schema {schema}, written by a newer basinview; this version "
            f"reads schema {SCHEMA_VERSION}. Upgrade basinview to read them."
        )
    if schema < 1:
        raise _bad(f"settings schema {schema} is not valid (schemas start at 1).")
    names = {f.name for f in dataclasses.fields(Settings)}
    unknown = sorted(set(raw) - names)
    if unknown:
        raise _bad(
            f"settings JSON has unknown fields {unknown}; it was edited or is not basinview's."
        )
    required = {
        f.name
        for f in dataclasses.fields(Settings)
        if f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING
    }
    missing = sorted(required - set(raw))
    if missing:
        raise _bad(f"settings JSON lacks the fields {missing}; was it truncated or edited?")
    span_raw = _expect(raw, "span", (list,), "[[a_min, a_max], [b_min, b_max]]")
    try:
        span = _ranges(span_raw)
    except Exception as exc:
        raise _bad(f"settings field 'span' is invalid: {exc}") from None
    res_raw = _expect(raw, "resolution", (list,), "[ra, rb]")
    if not all(isinstance(r, int) and not isinstance(r, bool) for r in res_raw):
        raise _bad(f"settings field 'resolution' must hold integers; got {res_raw!r}.")
    try:
        resolution = _resolution(tuple(res_raw))
    except Exception as exc:
        raise _bad(f"settings field 'resolution' is invalid: {exc}") from None
    hyper_raw = _expect(raw, "hyper", (dict,), "an object of lists")
    batch = raw["batch_size"]
    if batch is not None and (isinstance(batch, bool) or not isinstance(batch, int) or batch < 1):
        raise _bad(
            f"settings field 'batch_size' must be null or a positive integer; got {batch!r}."
        )
    steps = _expect(raw, "steps", (int,), "a positive integer")
    if steps < 1:
        raise _bad(f"settings field 'steps' must be positive; got {steps}.")
    if steps > MAX_STEPS:
        raise _bad(f"settings field 'steps' must be at most {MAX_STEPS}; got {steps}.")
    versions = raw.get("versions", {})
    if not isinstance(versions, dict) or not all(isinstance(v, str) for v in versions.values()):
        raise _bad("settings field 'versions' must map names to version strings.")
    plane = _expect(raw, "plane", (dict,), "an object")
    starts = _expect(raw, "starts", (dict,), "an object")
    for key, spec in (("plane", plane), ("starts", starts)):
        if not isinstance(spec.get("kind"), str):
            raise _bad(f"settings field {key!r} needs a 'kind' string.")
    return Settings(
        loss_name=_expect(raw, "loss_name", (str,), "a string"),
        fingerprint=_expect(raw, "fingerprint", (str,), "a string"),
        n_params=_integer(raw, "n_params", 1, MAX_INTEGER),
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
        seed=_integer(raw, "seed", 0, MAX_SEED),
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
    try:
        plane = plane_from_spec(problem, settings.plane)
    except ParameterError as exc:
        raise SettingsError(f"settings field 'plane' cannot be rebuilt: {exc}") from None
    surface = evaluate_surface(problem, plane, span=settings.span, resolution=settings.resolution)
    try:
        starts = starts_from_spec(problem, settings.starts, plane=plane, initializers=initializers)
    except ParameterError as exc:
        raise SettingsError(f"settings field 'starts' cannot be rebuilt: {exc}") from None
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
