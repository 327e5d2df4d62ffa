"""Reading settings JSON: parsing and field-by-field validation, never evaluation.

The text is parsed with :mod:`json` (no pickle, no eval, no YAML tags), with
limits on size, nesting depth and integer size, then every field is checked
for its type and range. Errors are :class:`SettingsError` with a repair hint.
"""

from __future__ import annotations

import json
import math
from typing import Any

from .checks import check_resolution
from .descent import MAX_STEPS
from .errors import SettingsError
from .surface import span_ranges

__all__ = [
    "MAX_DEPTH",
    "MAX_INTEGER",
    "MAX_SEED",
    "MAX_SETTINGS_BYTES",
    "SCHEMA_VERSION",
    "fields_from_raw",
    "parse",
]

SCHEMA_VERSION = 1
MAX_SETTINGS_BYTES = 64 * 2**20
MAX_DEPTH = 32
"""Deepest nesting of objects and lists a settings record may have."""
MAX_INTEGER = 2**53
"""Largest integer a settings record may hold (beyond it JSON readers disagree)."""
MAX_SEED = 2**32 - 1
"""Largest seed: descent seeds are unsigned 32-bit integers."""
REPAIR = "Restore the file from a copy, or record the view again with record_settings()."
_PICKLE_MAGIC = (b"\x80\x02", b"\x80\x03", b"\x80\x04", b"\x80\x05")


def _bad(message: str) -> SettingsError:
    """A SettingsError for a record that was edited or damaged, with the repair hint."""
    return SettingsError(f"{message} {REPAIR}")


def parse(text: str | bytes) -> Any:
    """Parse settings text into a raw dict: size, encoding, JSON, nesting and numbers checked."""
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
                "Settings.save() writes. " + REPAIR
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
            " The text ends before the record closes: was the file truncated?" if truncated else ""
        )
        raise _bad(
            f"settings are not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg}).{hint}"
        ) from None
    except SettingsError:
        raise
    except ValueError as exc:  # e.g. an integer with thousands of digits
        raise _bad(f"settings JSON holds a value Python refuses to read ({exc}).") from None
    _check_tree(raw)
    return raw


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


def fields_from_raw(raw: Any, names: set[str], required: set[str]) -> dict[str, Any]:
    """Validated keyword arguments for Settings from a parsed record.

    Args:
        raw: the parsed JSON.
        names: every field name of Settings.
        required: the fields without a default.
    """
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
    unknown = sorted(set(raw) - names)
    if unknown:
        raise _bad(
            f"settings JSON has unknown fields {unknown}; it was edited or is not basinview's."
        )
    missing = sorted(required - set(raw))
    if missing:
        raise _bad(f"settings JSON lacks the fields {missing}; was it truncated or edited?")
    span_raw = _expect(raw, "span", (list,), "[[a_min, a_max], [b_min, b_max]]")
    try:
        span = span_ranges(span_raw)
    except Exception as exc:
        raise _bad(f"settings field 'span' is invalid: {exc}") from None
    res_raw = _expect(raw, "resolution", (list,), "[ra, rb]")
    if not all(isinstance(r, int) and not isinstance(r, bool) for r in res_raw):
        raise _bad(f"settings field 'resolution' must hold integers; got {res_raw!r}.")
    try:
        resolution = check_resolution(tuple(res_raw))
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
    sizes = raw.get("sizes", {})
    if not isinstance(sizes, dict) or not all(
        isinstance(v, int) and not isinstance(v, bool) and 0 <= v <= MAX_INTEGER
        for v in sizes.values()
    ):
        raise _bad("settings field 'sizes' must map names to non-negative integers.")
    sharpness = raw.get("sharpness", {})
    if not isinstance(sharpness, dict) or not all(
        k in ("every", "iterations", "first_iterations")
        and isinstance(v, int)
        and not isinstance(v, bool)
        and 1 <= v <= MAX_STEPS
        for k, v in sharpness.items()
    ) or (sharpness and "every" not in sharpness):
        raise _bad(
            "settings field 'sharpness' must be empty or hold 'every' (and optionally "
            f"'iterations', 'first_iterations'), integers from 1 to {MAX_STEPS}."
        )
    plane = _expect(raw, "plane", (dict,), "an object")
    starts = _expect(raw, "starts", (dict,), "an object")
    for key, spec in (("plane", plane), ("starts", starts)):
        if not isinstance(spec.get("kind"), str):
            raise _bad(f"settings field {key!r} needs a 'kind' string.")
    return dict(
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
        sizes=dict(sizes),
        sharpness=dict(sharpness),
    )
