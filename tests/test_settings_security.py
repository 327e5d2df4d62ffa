"""Settings are data, never code, and never make the tool touch other paths.

Python's audit hooks (PEP 578) report every file open, rename and removal,
every import, ``exec``/``compile``, unpickling of a global
(``pickle.find_class``) and process start. A hook installed by this module
records those events while settings are loaded, rebuilt into a view and
saved, and while the ``report`` command runs; the tests then assert what was
(not) touched. Marker files show that no payload ran: each payload would
create its marker if it were ever unpickled, evaluated or run by a shell.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import pickle
import sys
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from basinview.core import (
    BasinviewError,
    FingerprintWarning,
    Problem,
    Settings,
    SettingsError,
    axes_plane,
    compute_view,
    descend,
    random_starts,
    record_settings,
)
from basinview.core import settings as settings_module

from .conftest import himmelblau
from .integrity import folder_state

# ------------------------------------------------------------- audit events
_RECORDING: list[list[tuple[str, tuple[Any, ...]]]] = []


def _hook(event: str, args: tuple[Any, ...]) -> None:
    if _RECORDING and not event.startswith(("builtins.id", "sys._getframe", "object.")):
        _RECORDING[-1].append((event, args))


sys.addaudithook(_hook)  # hooks cannot be removed; this one records only inside `audit()`

CODE_EVENTS = (
    "exec",
    "compile",
    "import",
    "pickle.find_class",
    "marshal.loads",
    "subprocess.Popen",
    "os.system",
    "os.exec",
    "os.posix_spawn",
    "os.spawn",
    "os.fork",
    "ctypes.dlopen",
    "socket.connect",
    "urllib.Request",
)
WRITE_EVENTS = ("os.rename", "os.remove", "os.rmdir", "os.mkdir", "os.truncate", "os.chmod")


@contextlib.contextmanager
def audit():
    events: list[tuple[str, tuple[Any, ...]]] = []
    _RECORDING.append(events)
    try:
        yield events
    finally:
        _RECORDING.pop()


def opened(events) -> list[tuple[str, bool]]:
    """(path, for writing) of every file opened by path."""
    out = []
    for event, args in events:
        if event == "open" and isinstance(args[0], (str, bytes, os.PathLike)):
            mode, flags = args[1], args[2]
            writing = (mode is not None and any(c in mode for c in "wax+")) or (
                mode is None and bool(flags & (os.O_WRONLY | os.O_RDWR | os.O_CREAT))
            )
            out.append((os.fsdecode(args[0]), writing))
    return out


def assert_no_code_ran(events) -> None:
    ran = [(e, a) for e, a in events if e.startswith(CODE_EVENTS)]
    assert not ran, f"loading settings ran code: {ran[:5]}"


# ------------------------------------------------------------------- setup
@pytest.fixture(scope="module")
def recorded(tmp_path_factory):
    problem = Problem(himmelblau, {"x": 0.0, "y": 0.0})
    plane = axes_plane(problem, "x", "y")
    starts = random_starts(problem, 3, scale=2.0, seed=4)
    runs = descend(problem, starts, learning_rate=0.01, steps=30, plane=plane)
    settings = record_settings(
        problem, plane=plane, span=4.0, resolution=9, starts=starts, runs=runs
    )
    home = tmp_path_factory.mktemp("recorded")
    path = settings.save(home / "view.json")
    compute_view(problem, Settings.load(path, problem=problem))  # warm up imports and compiles
    return problem, settings


@pytest.fixture
def sandbox(tmp_path, monkeypatch):
    """A working folder (the cwd) with a secret file next to it and a marker path."""
    work = tmp_path / "work"
    work.mkdir()
    secret = tmp_path / "secret.txt"
    secret.write_text("not for basinview\n")
    monkeypatch.chdir(work)
    return work, secret, tmp_path / "PAYLOAD-RAN"


# -------------------------------------------------- never code: payloads
class _Payload:
    """Unpickling this object would create the marker file."""

    def __init__(self, marker: Path) -> None:
        self.marker = marker

    def __reduce__(self):
        return (Path.touch, (self.marker,))


def _code_strings(marker: Path) -> list[str]:
    m = str(marker)
    return [
        f"__import__('pathlib').Path({m!r}).touch()",
        f"$(touch {m})",
        f"`touch {m}`; touch {m}",
        f"{{{{ cycler.__init__.__globals__.os.system('touch {m}') }}}}",
        f"!!python/object/apply:os.system ['touch {m}']",
        f"exec(\"open({m!r}, 'w')\")",
    ]


def _with_every_string(raw: dict[str, Any], value: str) -> dict[str, Any]:
    """``raw`` with ``value`` in every string-valued field (top level and specs)."""
    out = json.loads(json.dumps(raw))
    for key in ("loss_name", "fingerprint", "dtype", "optimizer", "note", "created"):
        out[key] = value
    out["versions"] = {k: value for k in out["versions"]}
    out["plane"] = {"kind": "axes", "x": value, "y": "y"}
    out["starts"] = {"kind": "initializer", "name": value, "count": 2, "seed": 0}
    out["hyper"] = {value: [0.5]}
    return out


def _reduce_style(marker: Path) -> list[Any]:
    m = str(marker)
    return [
        {"py/reduce": [{"py/function": "os.system"}, {"py/tuple": [f"touch {m}"]}]},
        {"__reduce__": ["os.system", [f"touch {m}"]], "schema": 1},
        {"py/object": "pathlib.Path", "py/state": m},
        {"$type": "System.Diagnostics.Process", "StartInfo": {"FileName": "touch", "Arguments": m}},
        {"__class__": "subprocess.Popen", "args": ["touch", m]},
    ]


def _payload_files(folder: Path, marker: Path, raw: dict[str, Any]) -> list[Path]:
    files = []
    for protocol in (0, 2, 4, 5):
        path = folder / f"pickle{protocol}.json"
        path.write_bytes(pickle.dumps(_Payload(marker), protocol=protocol))
        files.append(path)
    for i, code in enumerate(_code_strings(marker)):
        path = folder / f"code{i}.json"
        path.write_text(json.dumps(_with_every_string(raw, code)))
        files.append(path)
    for i, obj in enumerate(_reduce_style(marker)):
        path = folder / f"reduce{i}.json"
        path.write_text(json.dumps(obj))
        files.append(path)
        nested = json.loads(json.dumps(raw))
        nested["plane"] = {"kind": "axes", "x": "x", "y": "y", "origin": obj}
        nested["starts"] = {"kind": "explicit", "points": obj}
        path = folder / f"reduce{i}-nested.json"
        path.write_text(json.dumps(nested))
        files.append(path)
    yaml = folder / "yaml.json"
    yaml.write_text(f"!!python/object/apply:os.system ['touch {marker}']\n")
    files.append(yaml)
    return files


def test_loading_never_unpickles_or_evaluates(recorded, sandbox):
    problem, settings = recorded
    work, _, marker = sandbox
    raw = json.loads(settings.to_json())
    files = _payload_files(work, marker, raw)
    assert len(files) == 21
    before = folder_state(work.parent)
    loaded = refused = 0
    for path in files:
        with audit() as events:
            try:
                again = Settings.load(path)
            except SettingsError:
                refused += 1
                again = None
            if again is not None:
                loaded += 1
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", FingerprintWarning)
                    with pytest.raises(BasinviewError):
                        compute_view(problem, again)
        assert_no_code_ran(events)
        assert [p for p, _ in opened(events)] == [str(path)], path.name
        assert not marker.exists(), f"{path.name} ran its payload"
    assert folder_state(work.parent) == before
    # Pickles, YAML and reduce-style objects are refused; code-like strings load as
    # plain text and then fail by name (no such optimizer, label or initialiser).
    assert (loaded, refused) == (len(_code_strings(marker)) + 5, 10)


def test_code_like_text_stays_text(recorded, sandbox):
    problem, settings = recorded
    _, _, marker = sandbox
    for code in _code_strings(marker):
        raw = json.loads(settings.to_json())
        raw["note"] = raw["loss_name"] = code
        with audit() as events:
            again = Settings.from_json(json.dumps(raw))
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", FingerprintWarning)
                view = compute_view(problem, again)
        assert_no_code_ran(events)
        assert again.note == code and again.loss_name == code
        np.testing.assert_array_equal(view.runs.final.shape, (3, 2))
        assert not marker.exists()


# -------------------------------------------- never too big, never too deep
def test_huge_and_deep_inputs_are_refused_cheaply(recorded, sandbox):
    _, settings = recorded
    work, _, _ = sandbox
    raw = json.loads(settings.to_json())
    cases = {
        "inf-float": json.dumps(dict(raw, grad_tol="INF")).replace('"INF"', "1e999"),
        "huge-int": json.dumps(dict(raw, steps=10**400)),
        "long-int": json.dumps(raw).replace('"seed": 0', '"seed": ' + "7" * 5000, 1),
        "deep-array": "[" * 100_000 + "]" * 100_000,
        "deep-object": '{"a":' * 50_000 + "1" + "}" * 50_000,
        "deep-spec": json.dumps(dict(raw, plane={"kind": "axes", "x": [[[[[[[[[[[[[[[[[[[[[[[[[[[[[[[[[[1]]]]]]]]]]]]]]]]]]]]]]]]]]]]]]]]]]})),
    }  # fmt: skip
    for name, text in cases.items():
        with audit() as events:
            with pytest.raises(SettingsError, match="Restore the file|nested|refuses|beyond"):
                Settings.from_json(text)
        assert_no_code_ran(events)
        assert not opened(events), name
    big = work / "big.json"
    with open(big, "wb") as fh:
        fh.truncate(100 * 2**20)  # 100 MB, sparse: no disk used
    with audit() as events:
        with pytest.raises(SettingsError, match="larger than"):
            Settings.load(big)
    assert not opened(events), "the 100 MB file was opened"
    text = " " * (settings_module.MAX_SETTINGS_BYTES + 1)
    for data in (text, text.encode()):
        with pytest.raises(SettingsError, match="limit"):
            Settings.from_json(data)


# ------------------------------------------------ never outside the paths
PATHLIKE = [
    "../../etc/passwd",
    "/etc/passwd",
    "~/.bashrc",
    "file:///etc/shadow",
    "\\\\server\\share\\settings.json",
    "C:\\Windows\\win.ini",
    "{secret}",
    "../secret.txt",
]


def test_path_like_strings_are_never_followed(recorded, sandbox):
    problem, settings = recorded
    work, secret, _ = sandbox
    source = work / "view.json"
    secret_state = (secret.read_bytes(), secret.stat().st_mtime_ns)
    raw = json.loads(settings.to_json())
    tried = 0
    for template in PATHLIKE:
        value = template.format(secret=secret)
        for field in ("loss_name", "fingerprint", "dtype", "optimizer", "note", "created",
                      "versions", "plane.x", "plane.kind", "starts.name", "starts.kind",
                      "hyper"):  # fmt: skip
            edited = json.loads(json.dumps(raw))
            if field == "versions":
                edited["versions"] = {"basinview": value}
            elif field == "hyper":
                edited["hyper"] = {value: [0.5]}
            elif field.startswith("plane."):
                edited["plane"] = {"kind": "axes", "x": "x", "y": "y", field[6:]: value}
            elif field.startswith("starts."):
                edited["starts"] = {"kind": "initializer", "name": "init", "count": 2, "seed": 0}
                edited["starts"][field[7:]] = value
            else:
                edited[field] = value
            source.write_text(json.dumps(edited))
            before = folder_state(work.parent)
            with audit() as events:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", FingerprintWarning)
                    try:
                        compute_view(problem, Settings.load(source))
                    except BasinviewError:
                        pass
            tried += 1
            assert_no_code_ran(events)
            assert [p for p, _ in opened(events)] == [str(source)], (field, value)
            assert not [e for e, _ in events if e.startswith(WRITE_EVENTS)], (field, value)
            assert folder_state(work.parent) == before
    assert tried == len(PATHLIKE) * 12
    assert (secret.read_bytes(), secret.stat().st_mtime_ns) == secret_state


def test_settings_hold_no_paths(recorded, tmp_path):
    _, settings = recorded
    names = [f for f in settings.to_dict()]
    assert not [n for n in names if any(w in n for w in ("path", "file", "dir", "url"))]
    text = settings.to_json()
    for place in (Path.cwd(), Path.home(), Path(__file__).parent, tmp_path.parent):
        assert str(place) not in text
    assert settings.loss_name == "tests.conftest.himmelblau"  # a dotted name, never a path


# ------------------------------------------------- save writes only there
def test_save_writes_only_the_given_path(recorded, tmp_path):
    _, settings = recorded
    folder = tmp_path / "out"
    folder.mkdir()
    (folder / "view.json.tmp").write_text("the user's own file\n")
    (folder / "notes.txt").write_text("notes\n")
    before = folder_state(folder)
    target = folder / "view.json"
    with audit() as events:
        settings.save(target)
    written = [p for p, w in opened(events) if w]
    assert written and all(Path(p).parent == folder for p in written)
    renames = [a for e, a in events if e == "os.rename"]
    assert [Path(a[1]) for a in renames] == [target]
    after = folder_state(folder)
    assert set(after) == set(before) | {"view.json"}
    assert all(after[k] == before[k] for k in before)  # nothing else touched
    assert Settings.load(target) == settings


def test_a_failing_write_keeps_the_old_file(recorded, tmp_path, monkeypatch):
    _, settings = recorded
    target = settings.save(tmp_path / "view.json")
    before = folder_state(tmp_path)

    class DiskFull(io.StringIO):
        def write(self, text):
            raise OSError(28, "No space left on device")

    def full_disk(fd, *args, **kwargs):
        os.close(fd)
        return DiskFull()

    monkeypatch.setattr(settings_module.os, "fdopen", full_disk)
    other = Settings.from_json(settings.to_json().replace('"note": ""', '"note": "new"'))
    with pytest.raises(SettingsError, match="previous file, if any, is unchanged"):
        other.save(target)
    assert folder_state(tmp_path) == before  # old file intact, no partial file left
    monkeypatch.undo()
    assert Settings.load(target) == settings


# ---------------------------------------------- the report writes only --out
MODEL = """\
import jax.numpy as jnp


def loss(p, x, y):
    return jnp.mean((x * p["w"] + p["b"] - y) ** 2)
"""


def _main(argv: list[str], folder: Path) -> tuple[int, str]:
    from basinview.__main__ import main

    cwd, path, modules = os.getcwd(), list(sys.path), set(sys.modules)
    err = io.StringIO()
    os.chdir(folder)
    try:
        with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(err):
            code = main(argv)
    finally:
        os.chdir(cwd)
        sys.path[:] = path
        for name in set(sys.modules) - modules:
            if name.split(".")[0] == "pathmodel":
                del sys.modules[name]
    return code, err.getvalue()


def test_report_writes_only_to_out(tmp_path):
    work = tmp_path / "work"
    (work / "reports").mkdir(parents=True)
    (work / "pathmodel.py").write_text(MODEL)
    (work / "params.json").write_text(json.dumps({"w": 0.5, "b": 0.0}))
    np.savez(work / "data.npz", x=np.linspace(0, 1, 8), y=np.linspace(1, 3, 8))
    (work / "basinview-report.html").write_text("<p>an old page of the user's</p>\n")
    out = work / "reports" / "r.html"
    argv = ["report", "pathmodel:loss", "--params", "params.json", "--data", "data.npz",
            "--out", str(out), "--resolution", "11", "--steps", "40", "--starts", "3",
            "--basin-resolution", "0", "--sweep-rates", "0",
            "--title", "../../etc/passwd"]  # fmt: skip
    before = folder_state(tmp_path)
    with audit() as events:
        code, err = _main(argv, work)
    assert code == 0, err
    # Python's own bytecode cache of the imported model is left aside here (see the
    # test below); everything else written must be the report itself.
    written = {p for p, w in opened(events) if w and "__pycache__" not in p}
    written_here = {p for p in written if str(tmp_path) in p}
    assert written_here == {str(out)}, written
    outside = {p for p in written if str(tmp_path) not in p and "__pycache__" not in p}
    assert not outside, f"wrote outside the given paths: {sorted(outside)[:5]}"
    after = folder_state(tmp_path)
    new = set(after) - set(before)
    assert {k for k in new if "__pycache__" not in k} == {"work/reports/r.html"}
    assert all(after[k] == before[k] for k in before)
    # Path-like text in the parameters is refused before anything is read or written.
    (work / "params.json").write_text(json.dumps({"w": "../../etc/passwd", "b": 0.0}))
    before = folder_state(tmp_path)
    with audit() as events:
        code, err = _main(argv, work)
    assert code == 2 and "must be numbers" in err
    assert not [p for p, _ in opened(events) if "passwd" in p]
    assert not {p for p, w in opened(events) if w and "__pycache__" not in p}
    assert folder_state(tmp_path) == before


def test_report_leaves_no_bytecode_next_to_the_users_module(tmp_path, monkeypatch):
    monkeypatch.setattr(sys, "dont_write_bytecode", False)  # as in a default interpreter
    work = tmp_path / "work"
    work.mkdir()
    (work / "pathmodel.py").write_text(MODEL)
    (work / "params.json").write_text(json.dumps({"w": "text", "b": 0.0}))
    code, err = _main(["report", "pathmodel:loss", "--params", "params.json"], work)
    assert code == 2 and "must be numbers" in err  # fails after importing the module
    assert not (work / "__pycache__").exists()
