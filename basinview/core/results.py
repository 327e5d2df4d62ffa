"""Results files: an :class:`Analysis` written as one ``.npz`` archive, and read back.

The archive holds plain arrays only (NumPy's ``.npy`` members; read with
``allow_pickle=False``, so nothing is ever unpickled) and one JSON header,
stored as the UTF-8 bytes of the member ``header``::

    {"format": "basinview-results", "version": 1,
     "fingerprint": ..., "settings_fingerprint": ..., "n_params": ..., "dtype": ...,
     "labels": [...], "settings": {...Settings JSON...}, "run": {...},
     "parts": {"surface": {"__type__": "Surface", "a": {"__array__": "surface/a"}, ...}, ...}}

Every part of the analysis (surface, starts, runs, minima, basin map,
profile) is a frozen dataclass of the core; the header describes its
fields: JSON values as they are, arrays as ``{"__array__": NAME}`` (strings
as fixed-width text arrays, ``"object": true`` when the field held Python
strings), nested results as objects with their ``__type__``. Fields that
hold program objects (``Runs.config``) are written as null. A reader keeps
the fields it knows, so a file stays readable when a result gains a field.

:func:`save_results` writes to a temporary file in the same folder and
renames it over the target: the file is complete or absent.
:func:`load_results` rebuilds the :class:`Analysis` that the figures, the
report and the Explorer read.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
import tempfile
import warnings
import zipfile
from pathlib import Path
from typing import Any

import numpy as np

from .analysis import Analysis
from .basins import BasinMap
from .errors import FingerprintWarning, ResultsFileError
from .minima import Minima
from .planes import Plane
from .problem import Problem
from .runs import Runs
from .settings import Settings
from .starts import Starts
from .surface import Profile, Surface

__all__ = ["RESULTS_FORMAT", "RESULTS_VERSION", "load_results", "save_results"]

RESULTS_FORMAT = "basinview-results"
RESULTS_VERSION = 1
_TYPES: dict[str, type] = {
    t.__name__: t for t in (Plane, Surface, Starts, Runs, Minima, BasinMap, Profile)
}
_PARTS = ("plane", "surface", "starts", "runs", "minima", "basin_map", "profile")
_SKIPPED = {"config"}  # program objects, rebuilt from the settings when needed


def _pack(value: Any, name: str, arrays: dict[str, np.ndarray]) -> Any:
    if isinstance(value, np.ndarray):
        entry: dict[str, Any] = {"__array__": name}
        if value.dtype == object:
            value = np.asarray(value.astype(str))
            entry["object"] = True
        arrays[name] = value
        return entry
    if dataclasses.is_dataclass(value) and type(value).__name__ in _TYPES:
        out: dict[str, Any] = {"__type__": type(value).__name__}
        for f in dataclasses.fields(value):
            if f.name in _SKIPPED:
                out[f.name] = None
            else:
                out[f.name] = _pack(getattr(value, f.name), f"{name}/{f.name}", arrays)
        return out
    if isinstance(value, dict):
        return {str(k): _pack(v, f"{name}/{k}", arrays) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_pack(v, f"{name}/{i}", arrays) for i, v in enumerate(value)]
    if isinstance(value, np.generic):
        return value.item()
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    raise ResultsFileError(
        f"{name} holds a {type(value).__name__}, which a results file cannot hold."
    )


def save_results(
    path: str | os.PathLike[str],
    analysis: Analysis,
    problem: Problem,
    *,
    run: dict[str, Any] | None = None,
) -> Path:
    """Write ``analysis`` (computed on ``problem``) to the ``.npz`` file ``path``, atomically.

    Args:
        path: the file, ending in ``.npz``; its folder must exist.
        analysis: the results (sweeps are not written).
        problem: the problem they were computed on (its fingerprint and labels are kept).
        run: JSON-ready facts about the run (processes, devices, seconds).
    """
    target = Path(path)
    if target.suffix.lower() != ".npz":
        raise ResultsFileError(f"results files end in .npz; got {str(target)!r}.")
    if not target.parent.is_dir():
        raise ResultsFileError(
            f"the folder {str(target.parent)!r} does not exist; create it first or choose "
            "another path."
        )
    arrays: dict[str, Any] = {}
    parts = {
        part: _pack(getattr(analysis, part), part, arrays)
        for part in _PARTS
        if getattr(analysis, part) is not None
    }
    settings = analysis.settings
    settings_json = settings.to_json(indent=None) if settings is not None else None
    header = {
        "format": RESULTS_FORMAT,
        "version": RESULTS_VERSION,
        "fingerprint": problem.fingerprint,
        "settings_fingerprint": (
            hashlib.sha256(settings_json.encode()).hexdigest() if settings_json else None
        ),
        "n_params": problem.size,
        "dtype": str(problem.dtype),
        "labels": list(problem.labels),
        "loss_name": problem.name,
        "settings": json.loads(settings_json) if settings_json else None,
        "profile_labels": list(analysis.profile_labels) if analysis.profile_labels else None,
        "run": run or {},
        "parts": parts,
    }
    text = json.dumps(header, allow_nan=True, sort_keys=True)
    arrays["header"] = np.frombuffer(text.encode("utf-8"), dtype=np.uint8)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".partial", dir=target.parent)
    tmp = Path(tmp_name)
    try:
        with os.fdopen(fd, "wb") as fh:
            np.savez(fh, **arrays)
            fh.flush()
            os.fsync(fh.fileno())
        tmp.replace(target)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise ResultsFileError(
            f"could not write results to {str(target)!r} ({exc.strerror or exc}); nothing was "
            "written there. Check the path, its permissions and the free space."
        ) from None
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return target


def _unpack(entry: Any, arrays: Any, where: str) -> Any:
    if isinstance(entry, list):
        return [_unpack(v, arrays, f"{where}[{i}]") for i, v in enumerate(entry)]
    if not isinstance(entry, dict):
        return entry
    if "__array__" in entry:
        name = entry["__array__"]
        if name not in arrays:
            raise ResultsFileError(f"the results file lacks the array {name!r} ({where}).")
        value = np.asarray(arrays[name])
        return value.astype(object) if entry.get("object") else value
    if "__type__" in entry:
        kind = _TYPES.get(entry["__type__"])
        if kind is None:
            raise ResultsFileError(f"{where} is of unknown type {entry['__type__']!r}.")
        known = {f.name for f in dataclasses.fields(kind)}
        fields = {}
        for k, v in entry.items():
            if k in known:
                value = _unpack(v, arrays, f"{where}.{k}")
                fields[k] = tuple(value) if isinstance(value, list) else value
        try:
            return kind(**fields)
        except (TypeError, ValueError) as exc:
            raise ResultsFileError(f"{where} cannot be rebuilt ({exc}).") from None
    return {k: _unpack(v, arrays, f"{where}.{k}") for k, v in entry.items()}


def load_results(path: str | os.PathLike[str], *, problem: Problem | None = None) -> Analysis:
    """The :class:`Analysis` a results file holds (as written by ``python -m basinview run``).

    Args:
        path: the ``.npz`` file.
        problem: optionally, the problem the results are for: a different
            parameter count is an error, other data or initial parameters warn
            (:class:`FingerprintWarning`).

    Returns:
        The analysis, with its :class:`Settings`; ``runs.config`` is None (the
        settings record the descent arguments).

    Example (after ``python -m basinview run ... --out basins.npz``)::

        import basinview as bv
        result = bv.load_results("basins.npz")
        bv.write_report("basins.html", result)
        bv.figures.basin_figure(result.basin_map)
    """
    p = Path(path)
    if not p.is_file():
        raise ResultsFileError(
            f"no results file at {str(p)!r}; check the path (written by python -m basinview "
            "run ... --out FILE.npz)."
        )
    if not zipfile.is_zipfile(p):
        raise ResultsFileError(f"{str(p)!r} is not a results file (not a .npz archive).")
    try:
        with np.load(p, allow_pickle=False) as npz:
            arrays = {k: npz[k] for k in npz.files}
    except (ValueError, OSError, EOFError, zipfile.BadZipFile) as exc:
        raise ResultsFileError(f"cannot read {str(p)!r} as a results file ({exc}).") from None
    if "header" not in arrays:
        raise ResultsFileError(f"{str(p)!r} is a .npz archive but not a basinview results file.")
    try:
        header = json.loads(bytes(arrays["header"]).decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ResultsFileError(f"the header of {str(p)!r} is not valid JSON ({exc}).") from None
    if not isinstance(header, dict) or header.get("format") != RESULTS_FORMAT:
        raise ResultsFileError(f"{str(p)!r} is not a basinview results file.")
    version = header.get("version")
    if not isinstance(version, int) or version > RESULTS_VERSION:
        raise ResultsFileError(
            f"{str(p)!r} is a results file of version {version!r}; this basinview reads up to "
            f"version {RESULTS_VERSION}. Upgrade basinview to read it."
        )
    if problem is not None:
        if problem.size != header.get("n_params"):
            raise ResultsFileError(
                f"these results are for a problem with {header.get('n_params')} parameters; "
                f"this problem has {problem.size}."
            )
        if problem.fingerprint != header.get("fingerprint"):
            warnings.warn(
                f"these results were computed for other data or initial parameters "
                f"(fingerprint {header.get('fingerprint')}, this problem {problem.fingerprint}).",
                FingerprintWarning,
                stacklevel=2,
            )
    settings = None
    if header.get("settings") is not None:
        settings = Settings.from_json(json.dumps(header["settings"]))
    parts = {k: _unpack(v, arrays, k) for k, v in header.get("parts", {}).items() if k in _PARTS}
    labels = header.get("profile_labels")
    return Analysis(settings=settings, profile_labels=tuple(labels) if labels else None, **parts)


def results_header(path: str | os.PathLike[str]) -> dict[str, Any]:
    """The JSON header of a results file (format, fingerprints, settings, run facts)."""
    with np.load(Path(path), allow_pickle=False) as npz:
        return dict(json.loads(bytes(npz["header"]).decode("utf-8")))
