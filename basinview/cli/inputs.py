"""Reading the command line's inputs: the user's loss, parameters and data files.

Every problem is a :class:`CommandError` (a :class:`~basinview.core.BasinviewError`)
whose one-line message names the file or option and the fix; nothing is
unpickled or evaluated.
"""

from __future__ import annotations

import importlib
import json
import os
import re
import sys
import zipfile
from pathlib import Path
from typing import Any

from ..core.errors import BasinviewError

__all__ = [
    "CommandError",
    "floats",
    "load_data",
    "load_function",
    "load_params",
    "span_option",
]


class CommandError(BasinviewError):
    """Bad command-line input (file, module, option)."""


def _existing(path: str, what: str, suffixes: tuple[str, ...]) -> Path:
    p = Path(path)
    if p.suffix.lower() not in suffixes:
        raise CommandError(
            f"{what} {path!r} must be a {' or '.join(suffixes)} file; got suffix {p.suffix!r}."
        )
    if not p.exists():
        raise CommandError(
            f"{what} file {path!r} does not exist; check the path (relative to the current "
            f"folder {os.getcwd()})."
        )
    if not p.is_file():
        raise CommandError(f"{what} {path!r} is not a file; give the path of a {suffixes[0]} file.")
    return p


def _read_npz(p: Path, what: str) -> dict[str, Any]:
    import numpy as np

    if not zipfile.is_zipfile(p):
        raise CommandError(
            f"{what} {str(p)!r} is not a .npz archive; write it with numpy.savez(path, name=array)."
        )
    try:
        with np.load(p, allow_pickle=False) as npz:
            return {key: np.asarray(npz[key]) for key in npz.files}
    except ValueError as exc:
        if "pickle" in str(exc):
            raise CommandError(
                f"{what} {str(p)!r} holds object (pickled) arrays, which basinview does not load; "
                "save plain numeric arrays with numpy.savez."
            ) from None
        raise CommandError(f"cannot read {what} {str(p)!r} as .npz: {exc}") from None
    except (OSError, EOFError, zipfile.BadZipFile) as exc:
        raise CommandError(
            f"cannot read {what} {str(p)!r} as .npz ({exc}); write it with numpy.savez."
        ) from None


def _from_json(value: Any, where: str) -> Any:
    import numpy as np

    if isinstance(value, bool) or value is None or isinstance(value, str):
        raise CommandError(
            f"parameter {where} is {json.dumps(value)}; parameters must be numbers, lists of "
            "numbers or objects of them."
        )
    if isinstance(value, (int, float)):
        return float(value)
    if isinstance(value, dict):
        if not value:
            raise CommandError(f"parameter {where} is an empty object.")
        return {k: _from_json(v, f"{where}.{k}" if where else k) for k, v in value.items()}
    if isinstance(value, list):
        if not value:
            raise CommandError(f"parameter {where or 'list'} is an empty list.")
        if all(isinstance(v, (int, float, list)) and not isinstance(v, bool) for v in value):
            try:
                arr = np.asarray(value, dtype=np.float64)
            except ValueError:
                arr = None  # ragged: a list of separate leaves
            if arr is not None:
                return arr
        return [_from_json(v, f"{where}[{i}]") for i, v in enumerate(value)]
    raise CommandError(f"parameter {where} has an unsupported type {type(value).__name__}.")


def load_params(path: str) -> Any:
    """Parameters from a ``.npz`` (dict of arrays) or ``.json`` (nested numbers) file."""
    p = _existing(path, "params", (".npz", ".json"))
    if p.suffix.lower() == ".npz":
        params = _read_npz(p, "params file")
        if not params:
            raise CommandError(
                f"params file {path!r} holds no arrays; save them with numpy.savez(file, w=..., b=...)."
            )
        return params
    try:
        raw = json.loads(p.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise CommandError(f"params file {path!r} is not UTF-8 text.") from None
    except json.JSONDecodeError as exc:
        raise CommandError(
            f"params file {path!r} is not valid JSON (line {exc.lineno}, column {exc.colno}: "
            f"{exc.msg}); fix the file or write it with json.dump(params, file)."
        ) from None
    return _from_json(raw, "")


def _natural(key: str) -> list[Any]:
    return [int(t) if t.isdigit() else t for t in re.split(r"(\d+)", key)]


def load_data(path: str, keys: str | None = None) -> tuple[Any, ...]:
    """Data arrays from a ``.npz`` file, in the order of ``keys`` (comma-separated) or sorted."""
    p = _existing(path, "data", (".npz",))
    arrays = _read_npz(p, "data file")
    if not arrays:
        raise CommandError(
            f"data file {path!r} holds no arrays; save them with numpy.savez(file, x=..., y=...)."
        )
    if keys is None:
        order = sorted(arrays, key=_natural)
    else:
        order = [k.strip() for k in keys.split(",") if k.strip()]
        missing = [k for k in order if k not in arrays]
        if missing or not order:
            raise CommandError(
                f"--data-keys names {missing or 'nothing'}, not in {path!r}; its arrays are "
                f"{sorted(arrays, key=_natural)}."
            )
    return tuple(arrays[k] for k in order)


def load_function(spec: str) -> Any:
    """The callable ``FUNCTION`` of ``MODULE:FUNCTION``, importing MODULE from the current folder."""
    match = re.fullmatch(r"([A-Za-z_][\w.]*):([A-Za-z_][\w.]*)", spec)
    if not match:
        raise CommandError(f"expected MODULE:FUNCTION (e.g. mymodel:loss); got {spec!r}.")
    module_name, attr = match.groups()
    cwd = os.getcwd()
    added = cwd not in sys.path and "" not in sys.path
    if added:
        sys.path.insert(0, cwd)
    # The report writes only --out: importing the user's module must not leave
    # __pycache__ behind in their folder.
    bytecode, sys.dont_write_bytecode = sys.dont_write_bytecode, True
    try:
        module = importlib.import_module(module_name)
    except ModuleNotFoundError as exc:
        if exc.name and module_name.startswith(exc.name):
            raise CommandError(
                f"cannot find module {module_name!r} in the current folder ({cwd}) or on the "
                "Python path; run from the folder that holds it."
            ) from None
        raise CommandError(
            f"importing {module_name!r} failed: it needs the module {exc.name!r}, which is not "
            "installed."
        ) from None
    except Exception as exc:  # the user's module raised while importing
        raise CommandError(
            f"importing {module_name!r} raised {type(exc).__name__}: {exc}"
        ) from None
    finally:
        sys.dont_write_bytecode = bytecode
        if added:
            sys.path.remove(cwd)
    target: Any = module
    for part in attr.split("."):
        if not hasattr(target, part):
            names = sorted(
                n
                for n in dir(module)
                if callable(getattr(module, n, None)) and not n.startswith("_")
            )
            raise CommandError(
                f"module {module_name!r} has no {attr!r}; callables it defines: {names[:12]}."
            )
        target = getattr(target, part)
    if not callable(target):
        raise CommandError(
            f"{spec!r} is a {type(target).__name__}, not a function; name a function "
            "loss(params, *data) as MODULE:FUNCTION."
        )
    return target


def floats(text: str, what: str) -> list[float]:
    try:
        values = [float(t) for t in text.split(",") if t.strip()]
    except ValueError:
        raise CommandError(f"{what} must be numbers separated by commas; got {text!r}.") from None
    if not values:
        raise CommandError(f"{what} is empty.")
    return values


def span_option(text: str) -> Any:
    v = floats(text, "--span")
    if len(v) == 1:
        return v[0]
    if len(v) == 2:
        return (v[0], v[1])
    if len(v) == 4:
        return ((v[0], v[1]), (v[2], v[3]))
    raise CommandError(f"--span takes 1 (s), 2 (sa,sb) or 4 (a0,a1,b0,b1) numbers; got {text!r}.")
