"""`python -m basinview run` over two processes on 127.0.0.1, and results files.

Every multi-process scenario is started at once from one module fixture (one
process alone; two processes; two where process 1 exits early; two that
disagree on the settings), so the file pays for the JAX start-ups once, in
parallel. Ports are chosen by binding port 0 on 127.0.0.1; nothing listens
on any other address.
"""

from __future__ import annotations

import dataclasses
import json
import os
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

import basinview.core as bv
from basinview.core.cluster import Cluster, cluster_from_env, unit_share
from basinview.core.results import results_header

# Several processes or a full harness run: with the slow tests (`python -m pytest -m slow`).
pytestmark = pytest.mark.slow

ROOT = Path(__file__).resolve().parents[1]

LOSS_MODULE = """
import os
import jax.numpy as jnp


def loss(params, x, y):
    # A process told to die stops here, while its Problem is being built.
    if os.environ.get("DIE_AS_PROCESS", "-") == os.environ.get("BASINVIEW_PROCESS_ID"):
        os._exit(17)
    r = x @ params["w"] + params["b"] - y
    return jnp.mean(r * r)
"""
RUN = [
    "view.json", "--module", "lsq:loss", "--params", "params.json", "--data", "data.npz",
    "--resolution", "13", "--starts", "32", "--steps", "300", "--basin-resolution", "7",
]  # fmt: skip


PINNED = (
    "import os, runpy, sys; os.sched_setaffinity(0, {{{core}}}); "
    "sys.argv[0] = 'basinview'; runpy.run_module('basinview', run_name='__main__')"
)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _diabetes() -> tuple[np.ndarray, np.ndarray]:
    # Source: scikit-learn's diabetes dataset (sklearn.datasets.load_diabetes), columns bmi, s5.
    from sklearn.datasets import load_diabetes

    d = load_diabetes()
    x = d.data[:, [2, 8]]
    x = ((x - x.mean(0)) / x.std(0)).astype(np.float32)
    y = ((d.target - d.target.mean()) / d.target.std()).astype(np.float32)
    return x, y


def _launch(
    folder: Path, out: str, env: dict[str, str], extra: tuple[str, ...] = (), core=None
) -> subprocess.Popen:
    full = {**os.environ, "PYTHONPATH": str(ROOT), "BASINVIEW_HEARTBEAT_SECONDS": "3", **env}
    for name in ("JAX_NUM_CPU_DEVICES", "XLA_FLAGS"):
        full.pop(name, None)
    # A pinned process sets its own affinity before JAX starts (a preexec_fn would fork
    # the multithreaded test process).
    start = ["-m", "basinview"] if core is None else ["-c", PINNED.format(core=core)]
    return subprocess.Popen(
        [sys.executable, *start, "run", *RUN, "--out", out, *extra],
        cwd=folder,
        env=full,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )


def _pair(
    folder: Path, out: str, env: dict[str, str], extra=((), ()), cores=(None, None)
) -> list[subprocess.Popen]:
    common = {
        "BASINVIEW_COORDINATOR": f"127.0.0.1:{_free_port()}",
        "BASINVIEW_PROCESS_COUNT": "2",
        **env,
    }
    return [
        _launch(folder, out, {**common, "BASINVIEW_PROCESS_ID": str(p)}, extra[p], cores[p])
        for p in (0, 1)
    ]


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """Start every scenario at once; wait for all; keep exit codes, output and exit times."""
    folder = tmp_path_factory.mktemp("cluster")
    (folder / "lsq.py").write_text(LOSS_MODULE)
    x, y = _diabetes()
    np.savez(folder / "data.npz", x=x, y=y)
    (folder / "params.json").write_text(json.dumps({"w": [0.0, 0.0], "b": 0.0}))
    rng = np.random.default_rng(3)
    np.savez(folder / "other.npz", x=x, y=y + rng.normal(0, 0.1, y.shape).astype(np.float32))
    # A view recorded as in the notebook: 5 random starts, two learning rates.
    sys.path.insert(0, str(folder))
    try:
        from lsq import loss
    finally:
        sys.path.remove(str(folder))
    problem = bv.Problem(loss, {"w": np.zeros(2), "b": 0.0}, x, y, name="lsq:loss")
    plane = bv.axes_plane(problem, "w[0]", "w[1]")
    view = bv.ViewSpec(
        plane=plane, starts=bv.random_starts(problem, 5, scale=1.0, seed=1), span=1.5,
        resolution=5, learning_rate=[0.1, 0.3], steps=20,
    )  # fmt: skip
    bv.analyse(problem, view, minima=False, profile=False).settings.save(folder / "view.json")
    procs = {
        "one": [_launch(folder, "one.npz", {})],
        "two": _pair(folder, "two.npz", {}),
        "dies": _pair(folder, "dies.npz", {"DIE_AS_PROCESS": "1"}),
        "mismatch": _pair(folder, "mismatch.npz", {}, ((), ("--steps", "301"))),
        "other_data": _pair(folder, "other_data.npz", {}, ((), ("--data", "other.npz"))),
        # each process on its own core, as on two machines
        "pinned": _pair(folder, "pinned.npz", {}, cores=(0, 1)),
    }
    ended: dict[int, float] = {}
    deadline = time.monotonic() + 400
    every = [p for group in procs.values() for p in group]
    while len(ended) < len(every) and time.monotonic() < deadline:
        for p in every:
            if p.pid not in ended and p.poll() is not None:
                ended[p.pid] = time.monotonic()
        time.sleep(0.05)
    out = {}
    for name, group in procs.items():
        results = []
        for p in group:
            if p.poll() is None:
                p.kill()
            stdout, stderr = p.communicate()
            results.append(
                {"rc": p.returncode, "out": stdout, "err": stderr, "ended": ended.get(p.pid)}
            )
        out[name] = results
    return folder, out, problem


def test_two_processes_give_the_one_process_results(runs):
    folder, out, _problem = runs
    for p in out["one"] + out["two"]:
        assert p["rc"] == 0, p["err"][-2000:]
    assert "process 1 of 2" in out["two"][1]["out"]
    with np.load(folder / "one.npz") as one, np.load(folder / "two.npz") as two:
        assert sorted(one.files) == sorted(two.files)
        for key in one.files:
            if key != "header":
                assert np.array_equal(one[key], two[key], equal_nan=one[key].dtype.kind == "f"), key
    header = results_header(folder / "two.npz")
    assert header["run"]["processes"] == 2 and header["run"]["devices"] == 2
    assert not [p for p in folder.iterdir() if p.name.endswith(".partial")]


def test_processes_that_share_cores_are_warned_and_pinned_ones_are_not(runs):
    # Measured (docs/distributed.md): one process already uses every core it may, so two
    # unpinned processes on one 2-core machine ran a basin map at 0.96x of one; pinned,
    # 1.71x. The run says so when its processes share a machine's cores.
    folder, out, _problem = runs
    assert os.cpu_count() >= 2
    two, pinned = out["two"], out["pinned"]
    for p in two + pinned:
        assert p["rc"] == 0, p["err"][-2000:]
    assert "processes 0, 1 run on one machine and may use the same cores" in two[0]["err"]
    assert "taskset" in two[0]["err"] and "--devices" in two[0]["err"]
    assert "same cores" not in two[1]["err"]  # process 0 says it once
    assert all("same cores" not in p["err"] for p in pinned)
    with np.load(folder / "one.npz") as one, np.load(folder / "pinned.npz") as other:
        for key in one.files:
            if key != "header":
                assert np.array_equal(one[key], other[key], equal_nan=one[key].dtype.kind == "f")


def test_results_are_right_and_load_back(runs):
    folder, _out, problem = runs
    result = bv.load_results(folder / "two.npz", problem=problem)
    # the overrides took: 13 x 13 surface, 32 starts x 2 rates, 7 x 7 basin map (64 runs each:
    # one compiled descent program serves both)
    assert result.surface.loss.shape == (13, 13)
    assert len(result.runs) == 64 and result.settings.steps == 300
    assert result.basin_map.label.shape == (7, 7)
    # Source: numpy.linalg.lstsq, the closed-form least-squares fit of the same data.
    x, y = _diabetes()
    design = np.column_stack([x, np.ones(len(y))]).astype(np.float64)
    w0, w1, b = np.linalg.lstsq(design, y.astype(np.float64), rcond=None)[0]
    coef = np.array([{"w[0]": w0, "w[1]": w1, "b": b}[k] for k in problem.labels])
    conv = result.runs.status == "converged"
    assert conv.sum() >= 56
    np.testing.assert_allclose(result.runs.final[conv], np.tile(coef, (conv.sum(), 1)), atol=2e-3)
    np.testing.assert_allclose(result.minima.points[0], coef, atol=1e-4)
    # the surface holds the loss at its grid (direct NumPy evaluation)
    j, i = 4, 9
    w = np.array([result.surface.a[i], result.surface.b[j]])
    direct = np.mean((x.astype(np.float64) @ w - y) ** 2)
    np.testing.assert_allclose(result.surface.loss[j, i], direct, rtol=1e-5)
    # common practice: least squares with a full-rank design has one minimum, one basin
    assert list(result.basin_map.minima.kind) == ["minimum"]
    assert (result.basin_map.label == 0).all()
    # the report takes the loaded analysis as it is
    from basinview.report import write_report

    page = write_report(folder / "two.html", result, overwrite=True)
    assert "basinview" in page.read_text(encoding="utf-8")


def test_a_process_that_dies_stops_the_other_with_a_clear_error(runs):
    folder, out, _problem = runs
    first, second = out["dies"]
    assert second["rc"] == 17
    if first["rc"] == 3:
        # process 0 was waiting for process 1: the collective failed, and we say so
        assert "lost contact with another process" in first["err"]
        assert "No results were written" in first["err"]
    else:
        # process 0 was computing: JAX's heartbeat check ended it (SIGABRT) with its message
        assert first["rc"] in (-6, 134), first["err"][-2000:]
        assert "another task died" in first["err"]
    # bounded: the survivor stopped within seconds of the death, not at a timeout
    assert first["ended"] - second["ended"] < 30
    assert not (folder / "dies.npz").exists()
    assert not [p for p in folder.iterdir() if p.name.startswith(".dies.npz")]


@pytest.mark.parametrize(
    ("scenario", "what"),
    [("mismatch", "settings and overrides"), ("other_data", "parameters and data")],
)
def test_processes_that_disagree_are_refused(runs, scenario, what):
    folder, out, _problem = runs
    for p in out[scenario]:
        assert p["rc"] == 3, p["err"][-2000:]
        assert f"processes [1] hold other {what} than process 0" in p["err"]
    assert not (folder / f"{scenario}.npz").exists()


def test_cluster_from_the_environment():
    assert cluster_from_env({}) == Cluster()
    env = {"BASINVIEW_COORDINATOR": "127.0.0.1:9", "BASINVIEW_PROCESS_COUNT": "3",
           "BASINVIEW_PROCESS_ID": "2"}  # fmt: skip
    assert cluster_from_env(env) == Cluster(2, 3, "127.0.0.1:9")
    slurm = {"SLURM_JOB_ID": "7", "SLURM_NTASKS": "4", "SLURM_PROCID": "1"}
    assert cluster_from_env(slurm) == Cluster(1, 4, "slurm")
    with pytest.raises(bv.ClusterError, match="needs all three"):
        cluster_from_env({"BASINVIEW_COORDINATOR": "127.0.0.1:9"})
    with pytest.raises(bv.ClusterError, match="ids run from 0 to 2"):
        cluster_from_env({**env, "BASINVIEW_PROCESS_ID": "3"})
    with pytest.raises(bv.ClusterError, match="HOST:PORT"):
        cluster_from_env({**env, "BASINVIEW_COORDINATOR": "127.0.0.1"})
    shares = [unit_share(7, Cluster(p, 3)) for p in range(3)]
    assert shares == [(0, 3), (3, 5), (5, 7)]


def test_results_files_are_written_whole_or_not_at_all(runs, tmp_path, monkeypatch):
    folder, _out, problem = runs
    result = bv.load_results(folder / "one.npz")
    target = tmp_path / "r.npz"

    def broken(*args, **kwargs):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(np, "savez", broken)
    with pytest.raises(bv.ResultsFileError, match="nothing was written"):
        bv.save_results(target, result, problem)
    assert list(tmp_path.iterdir()) == []
    monkeypatch.undo()
    bv.save_results(target, result, problem)
    again = bv.load_results(target)
    assert np.array_equal(again.runs.losses, result.runs.losses, equal_nan=True)


def test_bad_results_files_are_refused(runs, tmp_path):
    folder, _out, _problem = runs
    (tmp_path / "text.npz").write_text("not an archive")
    with pytest.raises(bv.ResultsFileError, match="not a .npz archive"):
        bv.load_results(tmp_path / "text.npz")
    np.savez(tmp_path / "plain.npz", x=np.zeros(3))
    with pytest.raises(bv.ResultsFileError, match="not a basinview results file"):
        bv.load_results(tmp_path / "plain.npz")
    with np.load(folder / "one.npz") as npz:
        arrays = {k: npz[k] for k in npz.files}
    header = json.loads(bytes(arrays["header"]).decode())
    header["version"] = 99
    arrays["header"] = np.frombuffer(json.dumps(header).encode(), np.uint8)
    np.savez(tmp_path / "newer.npz", **arrays)
    with pytest.raises(bv.ResultsFileError, match="version 99"):
        bv.load_results(tmp_path / "newer.npz")
    with pytest.raises(bv.ResultsFileError, match="no results file"):
        bv.load_results(tmp_path / "missing.npz")


def test_bad_run_options_give_one_line_errors(runs, monkeypatch, capsys):
    from basinview.__main__ import main

    folder, _out, _problem = runs
    monkeypatch.chdir(folder)
    for name in ("BASINVIEW_COORDINATOR", "BASINVIEW_PROCESS_COUNT", "BASINVIEW_PROCESS_ID"):
        monkeypatch.delenv(name, raising=False)
    base = ["run", "view.json", "--module", "lsq:loss", "--params", "params.json", "--data",
            "data.npz"]  # fmt: skip
    cases = [
        (["--out", "r.txt"], "--out must end in .npz"),
        (["--out", "one.npz"], "'one.npz' exists; pass --force"),
        (["--out", "r.npz", "--steps", "0"], "--steps must be at least 1"),
        (["--out", "r.npz", "--resolution", "1"], "--resolution must be at least 2"),
    ]
    for extra, message in cases:
        assert main([*base, *extra]) == 2
        err = capsys.readouterr().err
        assert message in err and len(err.strip().splitlines()) == 1, err
    # --starts resizes random starts only: a view of explicit starts is refused
    settings = bv.Settings.load("view.json")
    pts = [[0.1, 0.2, 0.3]]
    explicit = dataclasses.replace(settings, starts={"kind": "explicit", "points": pts})
    explicit.save("explicit.json")
    argv = ["run", "explicit.json", *base[2:], "--out", "r.npz", "--starts", "9"]
    assert main(argv) == 2
    assert "--starts resizes random or initialiser starts" in capsys.readouterr().err
    assert not (folder / "r.npz").exists()


def test_a_run_basin_map_is_the_basin_map_of_the_library(runs):
    folder, _out, problem = runs
    result = bv.load_results(folder / "one.npz")
    settings = result.settings
    plane = bv.plane_from_spec(problem, settings.plane)
    direct = bv.basin_map(
        problem, plane, span=settings.span, resolution=7, learning_rate=0.1, steps=300
    )
    assert np.array_equal(direct.runs.losses, result.basin_map.runs.losses, equal_nan=True)
    assert np.array_equal(direct.label, result.basin_map.label)
