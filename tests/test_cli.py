"""Command line: the demo and the report of a user's own loss, and every bad input."""

from __future__ import annotations

import json
import re
import subprocess
import sys
import textwrap
import zipfile

import numpy as np
import pytest

from basinview.__main__ import load_data, load_params, main
from basinview.report import MARKER

MODEL = textwrap.dedent(
    """
    import jax.numpy as jnp

    def loss(params, x, y):
        return jnp.mean((params["w"] * x + params["b"] - y) ** 2)

    NOT_A_FUNCTION = 3
    """
)


@pytest.fixture
def user_dir(tmp_path, monkeypatch):
    """A folder with a user's module, parameters and data; the current directory."""
    name = f"usermodel_{tmp_path.name.replace('-', '_')}"
    (tmp_path / f"{name}.py").write_text(MODEL)
    (tmp_path / "params.json").write_text(json.dumps({"w": 0.0, "b": 0.0}))
    rng = np.random.default_rng(7)
    x = np.linspace(-1.0, 1.0, 25)
    y = 2.0 * x + 0.5 + 0.1 * rng.standard_normal(x.size)
    np.savez(tmp_path / "data.npz", x=x, y=y)
    monkeypatch.chdir(tmp_path)
    return tmp_path, name, x, y


def test_demo_prints_the_analysis_and_writes_the_report(tmp_path):
    out = tmp_path / "demo.html"
    proc = subprocess.run(
        [sys.executable, "-m", "basinview", "demo", "--starts", "6", "--out", str(out)],
        capture_output=True,
        text=True,
        timeout=300,
        cwd=tmp_path,
    )
    assert proc.returncode == 0, proc.stderr
    text = proc.stdout
    assert "Runs by learning rate" in text
    assert "Where converged runs ended" in text
    # The scenario's two mirror-image minima are both found (rounded positions).
    assert "4.97" in text and "2.97" in text
    assert "-2.78" in text
    assert "Caution:" in text
    # every letter the summary names is a row of a printed table
    summary = text[text.index("Summary:") :]
    tables = text[: text.index("Summary:")]
    named = set(re.findall(r"\b([A-Z]{1,2}) \((?:minimum|saddle|maximum|degenerate)", summary))
    named |= set(re.findall(r"\b([A-Z]{1,2}) \d+%", summary))
    assert named, summary
    rows = set(re.findall(r"^\s*([A-Z]{1,2})\s+(?:minimum|saddle|maximum|degenerate)\s", tables, re.M))
    assert named <= rows, (named, rows)
    assert f"Report written to {out.resolve()}" in text
    page = out.read_text(encoding="utf-8")
    assert page.startswith(MARKER)
    for key in ("slice", "relief", "basins", "sweep", "curves", "profile"):
        assert f'id="bv-{key}"' in page
    assert "id='bv-settings'" in page
    # nothing else was written next to it
    assert sorted(p.name for p in tmp_path.iterdir()) == ["demo.html"]


def test_unknown_command_fails_with_usage():
    out = subprocess.run(
        [sys.executable, "-m", "basinview", "plot"], capture_output=True, text=True
    )
    assert out.returncode == 2
    assert "invalid choice" in out.stderr


def test_report_of_a_users_least_squares_fit(user_dir, capsys):
    folder, name, x, y = user_dir
    code = main(
        [
            "report",
            f"{name}:loss",
            "--params",
            "params.json",
            "--data",
            "data.npz",
            "--learning-rate",
            "0.3",
            "--steps",
            "400",
            "--starts",
            "4",
            "--basin-resolution",
            "5",
            "--sweep-rates",
            "4",
            "--span",
            "3",
            "--resolution",
            "21",
            "--out",
            "fit.html",
        ]
    )
    captured = capsys.readouterr()
    assert code == 0, captured.err
    # Source: numpy.polyfit, the closed-form least-squares line (reference library).
    w_ref, b_ref = np.polyfit(x, y, 1)
    lines = captured.out.splitlines()
    row = lines[lines.index("Where converged runs ended (rounded):") + 2].split()
    b, w = float(row[0]), float(row[1])
    assert abs(b - b_ref) <= 0.006 and abs(w - w_ref) <= 0.006
    page = (folder / "fit.html").read_text(encoding="utf-8")
    assert page.startswith(MARKER) and f"{name}:loss" in page
    assert sorted(p.name for p in folder.iterdir() if p.suffix == ".html") == ["fit.html"]


def expect_bad(argv, capsys, fragment):
    code = main(argv)
    err = capsys.readouterr().err
    assert code == 2, err
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("basinview: error: ")
    assert "Traceback" not in err
    assert fragment in lines[0], lines[0]


def test_bad_files_give_one_line_errors(user_dir, capsys):
    folder, name, _, _ = user_dir
    fn = f"{name}:loss"
    base = ["report", fn, "--data", "data.npz", "--out", "r.html", "--params"]
    expect_bad([*base, "nothere.json"], capsys, "does not exist")
    (folder / "params.txt").write_text("w=0")
    expect_bad([*base, "params.txt"], capsys, "must be a .npz or .json file")
    (folder / "folder.json").mkdir()
    expect_bad([*base, "folder.json"], capsys, "is not a file")
    (folder / "broken.json").write_text('{"w": 0.0, "b": ')
    expect_bad([*base, "broken.json"], capsys, "not valid JSON (line 1")
    (folder / "words.json").write_text('{"w": "zero", "b": 0.0}')
    expect_bad([*base, "words.json"], capsys, 'parameter w is "zero"')
    (folder / "fake.npz").write_text("not a zip archive")
    expect_bad([*base, "fake.npz"], capsys, "is not a .npz archive")
    np.savez(folder / "objects.npz", w=np.array([{"a": 1}], dtype=object))
    expect_bad([*base, "objects.npz"], capsys, "object (pickled) arrays")
    ok = ["report", fn, "--params", "params.json", "--out", "r.html", "--data"]
    expect_bad(
        [*ok, "missing.npz"], capsys, "data file 'missing.npz' does not exist; check the path"
    )
    with zipfile.ZipFile(folder / "bare.npz", "w"):
        pass
    expect_bad([*ok, "bare.npz"], capsys, "holds no arrays; save them with numpy.savez")
    expect_bad([*ok, "data.npz", "--data-keys", "x,z"], capsys, "--data-keys names ['z']")
    assert not (folder / "r.html").exists()


def test_bad_functions_give_one_line_errors(user_dir, capsys):
    folder, name, _, _ = user_dir
    tail = ["--params", "params.json", "--data", "data.npz", "--out", "r.html"]
    expect_bad(["report", name, *tail], capsys, "expected MODULE:FUNCTION")
    expect_bad(["report", "no_such_module_here:loss", *tail], capsys, "cannot find module")
    expect_bad(["report", f"{name}:lost", *tail], capsys, "has no 'lost'; callables it defines")
    expect_bad(["report", f"{name}:NOT_A_FUNCTION", *tail], capsys, "is a int, not a function")
    (folder / f"{name}_bad.py").write_text("raise RuntimeError('cannot start')\n")
    expect_bad(["report", f"{name}_bad:loss", *tail], capsys, "raised RuntimeError: cannot start")
    (folder / f"{name}_dep.py").write_text("import a_package_that_is_not_installed\n")
    expect_bad(["report", f"{name}_dep:loss", *tail], capsys, "needs the module")


def test_bad_shapes_and_options_give_one_line_errors(user_dir, capsys):
    folder, name, _, _ = user_dir
    fn = f"{name}:loss"
    np.savez(folder / "ragged.npz", x=np.ones(3), y=np.ones(5))
    base = ["report", fn, "--params", "params.json"]
    expect_bad([*base, "--data", "ragged.npz", "--out", "r.html"], capsys, "do not fit the loss")
    expect_bad([*base, "--out", "r.html"], capsys, "data argument")
    ok = [*base, "--data", "data.npz"]
    expect_bad([*ok, "--out", "r.html", "--plane", "w,c"], capsys, "unknown coordinate label 'c'")
    expect_bad([*ok, "--out", "r.html", "--plane", "w"], capsys, "two parameter labels")
    expect_bad([*ok, "--out", "r.html", "--span", "1,2,3"], capsys, "--span takes")
    expect_bad([*ok, "--out", "r.html", "--span", "wide"], capsys, "--span must be numbers")
    expect_bad([*ok, "--out", "r.html", "--learning-rate", "fast"], capsys, "--learning-rate")
    expect_bad([*ok, "--out", "r.html", "--steps", "0"], capsys, "--steps must be at least 1")
    expect_bad([*ok, "--out", "r.html", "--data-keys", "x"], capsys, "data argument")


def test_bad_output_paths_give_one_line_errors_and_touch_nothing(user_dir, capsys):
    folder, name, _, _ = user_dir
    ok = ["report", f"{name}:loss", "--params", "params.json", "--data", "data.npz"]
    expect_bad([*ok, "--out", "nowhere/r.html"], capsys, "does not exist")
    expect_bad([*ok, "--out", "r.pdf"], capsys, "end in .html")
    mine = folder / "mine.html"
    mine.write_text("<p>keep me</p>")
    expect_bad([*ok, "--out", "mine.html"], capsys, "not a basinview report")
    assert mine.read_text() == "<p>keep me</p>"
    expect_bad(["demo", "--out", "mine.html"], capsys, "not a basinview report")
    assert mine.read_text() == "<p>keep me</p>"
    assert not (folder / "nowhere").exists()


def test_bad_input_exit_code_and_no_traceback_in_a_real_process(tmp_path):
    proc = subprocess.run(
        [sys.executable, "-m", "basinview", "report", "nomodule_xyz:loss", "--params", "p.json"],
        capture_output=True,
        text=True,
        cwd=tmp_path,
        timeout=120,
    )
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert proc.stderr.strip().count("\n") == 0
    assert "cannot find module 'nomodule_xyz'" in proc.stderr


def test_loaders_read_nested_json_and_ordered_npz(tmp_path):
    (tmp_path / "p.json").write_text(
        json.dumps(
            {"layer": {"w": [[1, 2], [3, 4]], "b": [0.5, 0.5]}, "scale": 2, "parts": [[1], [2, 3]]}
        )
    )
    params = load_params(str(tmp_path / "p.json"))
    assert params["layer"]["w"].shape == (2, 2) and params["scale"] == 2.0
    assert isinstance(params["parts"], list) and params["parts"][1].tolist() == [2.0, 3.0]
    np.savez(tmp_path / "d.npz", *[np.full(2, i) for i in range(12)])
    data = load_data(str(tmp_path / "d.npz"))
    # numpy.savez names positional arrays arr_0, arr_1, ...: arr_2 comes before arr_10
    assert [int(a[0]) for a in data] == list(range(12))
    picked = load_data(str(tmp_path / "d.npz"), "arr_3,arr_1")
    assert [int(a[0]) for a in picked] == [3, 1]


LINEAR = textwrap.dedent(
    """
    import jax.numpy as jnp

    def loss(params, x, y):
        return jnp.mean((x @ params["w"] + params["b"] - y) ** 2)
    """
)


@pytest.fixture
def zero_dir(tmp_path, monkeypatch):
    """A linear model of three features whose starting weights are all zero."""
    name = f"zeromodel_{tmp_path.name.replace('-', '_')}"
    (tmp_path / f"{name}.py").write_text(LINEAR)
    (tmp_path / "zeros.json").write_text(json.dumps({"w": [0.0, 0.0, 0.0], "b": 0.0}))
    (tmp_path / "near.json").write_text(json.dumps({"w": [0.5, -1.0, 0.2], "b": 0.1}))
    rng = np.random.default_rng(3)
    x = rng.standard_normal((40, 3))
    y = x @ np.array([1.0, -2.0, 0.5]) + 0.3 + 0.05 * rng.standard_normal(40)
    np.savez(tmp_path / "data.npz", x=x, y=y)
    monkeypatch.chdir(tmp_path)
    return tmp_path, name, x, y


def _zero_report(name, *extra):
    return [
        "report",
        f"{name}:loss",
        "--params",
        "zeros.json",
        "--data",
        "data.npz",
        "--learning-rate",
        "0.2",
        "--steps",
        "600",
        "--starts",
        "3",
        "--resolution",
        "11",
        "--basin-resolution",
        "0",
        "--sweep-rates",
        "0",
        *extra,
    ]


def _recorded_plane(page):
    import html
    import re

    from basinview.core import Settings

    pre = re.search(r"<pre class='settings' id='bv-settings'>(.*?)</pre>", page, re.S)
    return Settings.from_json(html.unescape(pre.group(1))).plane


def test_report_on_all_zero_weights_falls_back_and_says_so(zero_dir, capsys):
    folder, name, x, y = zero_dir
    code = main(_zero_report(name, "--out", "zero.html"))
    captured = capsys.readouterr()
    assert code == 0, captured.err
    out = captured.out
    assert "Note: the default filter-normalised random plane cannot be drawn here" in out
    assert "--normalise filter|layer|none" in out
    # Source: numpy.linalg.lstsq, the least-squares solution (reference library).
    design = np.column_stack([np.ones(len(x)), x])
    b_ref, *w_ref = np.linalg.lstsq(design, y, rcond=None)[0]
    lines = out.splitlines()
    row = [
        float(v) for v in lines[lines.index("Where converged runs ended (rounded):") + 2].split()
    ]
    # labels sort as b, w[0], w[1], w[2]
    np.testing.assert_allclose(row[:4], [b_ref, *w_ref], atol=0.006)
    page = (folder / "zero.html").read_text(encoding="utf-8")
    assert page.startswith(MARKER) and "raw Gaussian directions" in page
    assert _recorded_plane(page)["normalise"] == "none"


@pytest.mark.slow
def test_report_normalise_and_origin_options(zero_dir, capsys):
    folder, name, _, _ = zero_dir
    for choice in ("filter", "layer"):
        expect_bad(
            _zero_report(name, "--normalise", choice, "--out", "z.html"),
            capsys,
            f"--normalise {choice}: normalise='{choice}' scales each direction",
        )
    assert not (folder / "z.html").exists()
    code = main(_zero_report(name, "--normalise", "none", "--out", "none.html"))
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert "Note:" not in captured.out
    # a filter-normalised plane through other (non-zero) weights
    code = main(_zero_report(name, "--origin", "near.json", "--out", "near.html"))
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert "Note:" not in captured.out
    plane = _recorded_plane((folder / "near.html").read_text(encoding="utf-8"))
    assert plane["normalise"] == "filter"
    # the recorded origin is the --origin file's weights (flat order b, w[0], w[1], w[2])
    np.testing.assert_allclose(plane["origin"], [0.1, 0.5, -1.0, 0.2], rtol=1e-6)
    (folder / "short.json").write_text(json.dumps({"w": [1.0, 2.0], "b": 0.0}))
    expect_bad(_zero_report(name, "--origin", "short.json", "--out", "z.html"), capsys, "origin")
    expect_bad(
        _zero_report(name, "--plane", "b,w[0]", "--normalise", "none", "--out", "z.html"),
        capsys,
        "Drop one of the two options",
    )
    with pytest.raises(SystemExit) as exit_info:  # argparse's own usage error
        main(_zero_report(name, "--normalise", "unit", "--out", "z.html"))
    assert exit_info.value.code == 2
    assert "invalid choice: 'unit'" in capsys.readouterr().err
    assert not (folder / "z.html").exists()
