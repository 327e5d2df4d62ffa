"""Settings: a frozen, JSON-only record of everything needed to reproduce a view.

:func:`~basinview.core.analysis.compute_view` (in :mod:`.analysis`) rebuilds the view.

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
import os
import platform
import tempfile
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .._version import __version__
from .checks import check_resolution
from .descent import Runs
from .errors import FingerprintWarning, SettingsError
from .planes import Plane
from .problem import Problem
from .settings_json import MAX_SETTINGS_BYTES, SCHEMA_VERSION, fields_from_raw, parse
from .starts import Starts
from .surface import Surface, span_ranges

__all__ = [
    "SCHEMA_VERSION",
    "Settings",
    "library_versions",
    "record_settings",
]


def library_versions() -> dict[str, str]:
    """Versions of Python, basinview and the numerical libraries in use."""
    import jax
    import optax
    import pandas

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
    sizes: dict[str, int] = field(default_factory=dict)
    sharpness: dict[str, int] = field(default_factory=dict)

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
        settings = cls(**fields_from_raw(parse(text), _NAMES, _REQUIRED))
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

    @property
    def schemes(self) -> list[dict[str, Any]]:
        """The initialisation schemes of the starts (empty unless they were named sets).

        One dict per scheme: ``name``, ``kind`` (``"explicit"``, ``"random"``,
        ``"initializer"``...), ``count``, ``seed`` (None for explicit starts) and
        ``initializer`` (the initialiser's qualified name, or None). They live in
        ``starts`` (kind ``"schemes"``, see :func:`~basinview.core.scheme_starts`),
        so settings recorded before schemes existed read as before.
        """
        if self.starts.get("kind") != "schemes":
            return []
        rows = []
        for row in self.starts.get("schemes", []):
            spec = row.get("starts", {})
            rows.append(
                {
                    "name": row.get("name"),
                    "kind": spec.get("kind"),
                    "count": row.get("count"),
                    "seed": spec.get("seed"),
                    "initializer": spec.get("name") if spec.get("kind") == "initializer" else None,
                }
            )
        return rows

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


_NAMES = {f.name for f in dataclasses.fields(Settings)}
_REQUIRED = {
    f.name
    for f in dataclasses.fields(Settings)
    if f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING
}


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


def record_settings(
    problem: Problem,
    *,
    plane: Plane,
    span: Any,
    resolution: Any,
    starts: Starts,
    runs: Runs,
    note: str = "",
    surface: Surface | None = None,
) -> Settings:
    """The :class:`Settings` of a computed view (plane, surface grid, starts and runs).

    ``sizes`` records the program sizes the runs (and ``surface``, if given)
    used, so :func:`compute_view` recomputes them with the same programs.
    """
    if runs.config is None:
        raise SettingsError(
            "these runs carry no DescentConfig, so their settings cannot be recorded; "
            "record the Runs that descend returned."
        )
    cfg = runs.config.record()
    run_sizes = runs.config.sizes.record() if runs.config.sizes is not None else {}
    sizes = {**run_sizes, **((surface.sizes or {}) if surface else {})}
    return Settings(
        loss_name=problem.name,
        fingerprint=problem.fingerprint,
        n_params=problem.size,
        dtype=str(problem.dtype),
        plane=json.loads(json.dumps(plane.spec)),
        span=span_ranges(span, plane.centre),
        resolution=check_resolution(resolution),
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
        sizes=sizes,
        sharpness=dict(cfg.get("sharpness", {})),
    )
