"""binder/ stays in step with pyproject.toml, so the notebooks run in a hosted Jupyter.

repo2docker (the builder behind Binder) reads only ``binder/`` when that folder
exists, so ``binder/requirements.txt`` must install basinview itself with the
extras the notebooks need, and must not pin anything pyproject.toml rules out.
"""

from __future__ import annotations

import ast
import itertools
import json
import re
import sys
from importlib import metadata
from pathlib import Path

import pytest
from packaging.markers import default_environment
from packaging.requirements import Requirement
from packaging.specifiers import SpecifierSet
from packaging.utils import canonicalize_name
from packaging.version import Version

ROOT = Path(__file__).resolve().parents[1]
BINDER = ROOT / "binder"
NOTEBOOKS = sorted((ROOT / "notebooks").glob("*.ipynb"))
LOCAL = re.compile(r"^(?:-e\s+)?\.(?:\[(?P<extras>[^\]]*)\])?$")

# Source: repo2docker documentation, "Configuration Files" (the files it reads in binder/).
REPO2DOCKER_FILES = {
    "requirements.txt",
    "runtime.txt",
    "postBuild",
    "start",
    "apt.txt",
    "environment.yml",
    "install.R",
    "Project.toml",
    "setup.py",
    "Pipfile",
    "Pipfile.lock",
    "default.nix",
    "Dockerfile",
    "README.md",
}


def _project() -> dict:
    """The [project] table of pyproject.toml (from the installed metadata before Python 3.11)."""
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10: the same data, as pip recorded it at install
        meta = metadata.metadata("basinview")
        extras: dict[str, list[str]] = {}
        plain = []
        for line in metadata.requires("basinview") or []:
            req = Requirement(line)
            found = re.search(r"extra\s*==\s*['\"]([^'\"]+)['\"]", str(req.marker or ""))
            req.marker = None
            if found:
                extras.setdefault(found.group(1), []).append(str(req))
            else:
                plain.append(str(req))
        return {
            "requires-python": meta["Requires-Python"],
            "dependencies": plain,
            "optional-dependencies": extras,
        }
    with open(ROOT / "pyproject.toml", "rb") as fh:
        return tomllib.load(fh)["project"]


def _binder_lines() -> list[str]:
    lines = []
    for raw in (BINDER / "requirements.txt").read_text().splitlines():
        line = raw.split("#", 1)[0].strip()
        if line:
            lines.append(line)
    return lines


def _local_extras() -> set[str] | None:
    """Extras of the line installing the repository itself, or None if there is none."""
    for line in _binder_lines():
        match = LOCAL.match(line)
        if match:
            return {e.strip() for e in (match.group("extras") or "").split(",") if e.strip()}
    return None


def _explicit() -> list[Requirement]:
    return [Requirement(line) for line in _binder_lines() if not LOCAL.match(line)]


def _expand(extras: set[str], optional: dict[str, list[str]]) -> list[Requirement]:
    """Requirements of the package's extras, following self-references like basinview[viz]."""
    out: list[Requirement] = []
    todo, seen = list(extras), set()
    while todo:
        extra = todo.pop()
        if extra in seen:
            continue
        seen.add(extra)
        for line in optional.get(extra, []):
            req = Requirement(line)
            if canonicalize_name(req.name) == "basinview":
                todo.extend(req.extras)
            else:
                out.append(req)
    return out


def _compatible(a: SpecifierSet, b: SpecifierSet) -> bool:
    """Whether some version named in either set satisfies both (enough to catch real clashes)."""
    if not str(a) or not str(b):
        return True
    candidates = {Version(s.version.rstrip(".*")) for s in (*a, *b) if s.operator != "!="}
    return any(
        a.contains(v, prereleases=True) and b.contains(v, prereleases=True) for v in candidates
    )


def test_only_files_repo2docker_reads():
    unknown = sorted(p.name for p in BINDER.iterdir() if p.name not in REPO2DOCKER_FILES)
    assert not unknown, f"repo2docker ignores these files in binder/: {unknown}"


def test_binder_installs_the_package_with_the_viz_extra():
    extras = _local_extras()
    assert extras is not None, (
        "binder/requirements.txt must install the repository itself ('.[viz]')"
    )
    optional = _project()["optional-dependencies"]
    unknown = extras - set(optional)
    assert not unknown, f"binder asks for extras pyproject.toml does not define: {unknown}"
    viz = {canonicalize_name(r.name) for r in _expand({"viz"}, optional)}
    got = {canonicalize_name(r.name) for r in _expand(extras, optional)}
    assert viz <= got, f"the viz dependencies {sorted(viz - got)} are not installed"


def test_binder_covers_runtime_and_viz_dependencies():
    project = _project()
    needed = [Requirement(d) for d in project["dependencies"]]
    needed += _expand({"viz"}, project["optional-dependencies"])
    covered = {canonicalize_name(r.name) for r in _explicit()}
    if _local_extras() is not None:  # the package line pulls in its own dependencies
        covered |= {canonicalize_name(Requirement(d).name) for d in project["dependencies"]}
        covered |= {
            canonicalize_name(r.name)
            for r in _expand(_local_extras(), project["optional-dependencies"])
        }
    missing = sorted({canonicalize_name(r.name) for r in needed} - covered)
    assert not missing, f"binder/requirements.txt does not install {missing}"


def test_binder_pins_agree_with_pyproject():
    project = _project()
    declared: dict[str, list[Requirement]] = {}
    optional = itertools.chain.from_iterable(project["optional-dependencies"].values())
    for line in [*project["dependencies"], *optional]:
        req = Requirement(line)
        declared.setdefault(canonicalize_name(req.name), []).append(req)
    for req in _explicit():
        for ours in declared.get(canonicalize_name(req.name), []):
            assert _compatible(req.specifier, ours.specifier), (
                f"binder pins {req} but pyproject.toml asks for {ours}"
            )


def test_binder_has_a_jupyter_frontend():
    names = {canonicalize_name(r.name) for r in _explicit()}
    assert names & {"jupyterlab", "notebook"}, "binder needs jupyterlab (or notebook) to show them"


def test_runtime_python_is_supported():
    text = (BINDER / "runtime.txt").read_text().strip()
    match = re.fullmatch(r"python-(3\.\d+)", text)
    assert match, f"runtime.txt must read like 'python-3.11'; got {text!r}"
    assert Version(match.group(1)) in SpecifierSet(_project()["requires-python"])


def _closure(requirements: list[Requirement]) -> set[str]:
    """Distribution names the requirements install, following installed metadata."""
    env = default_environment()
    todo = [(canonicalize_name(r.name), set(r.extras)) for r in requirements]
    seen: dict[str, set[str]] = {}
    while todo:
        name, extras = todo.pop()
        if name in seen and extras <= seen[name]:
            continue
        seen[name] = seen.get(name, set()) | extras
        try:
            lines = metadata.requires(name) or []
        except metadata.PackageNotFoundError:
            continue  # not installed here: its own dependencies are unknown
        for line in lines:
            req = Requirement(line)
            wanted = req.marker is None or any(
                req.marker.evaluate({**env, "extra": e}) for e in (extras or {""})
            )
            if wanted:
                todo.append((canonicalize_name(req.name), set(req.extras)))
    return set(seen)


def _imports(notebook: Path) -> set[str]:
    mods: set[str] = set()
    for cell in json.loads(notebook.read_text())["cells"]:
        if cell["cell_type"] != "code":
            continue
        source = "".join(cell["source"])
        source = "\n".join(x for x in source.splitlines() if not x.lstrip().startswith(("%", "!")))
        for node in ast.walk(ast.parse(source)):
            if isinstance(node, ast.Import):
                mods |= {a.name.split(".")[0] for a in node.names}
            elif isinstance(node, ast.ImportFrom) and node.module and not node.level:
                mods.add(node.module.split(".")[0])
    return mods


@pytest.mark.parametrize("notebook", NOTEBOOKS, ids=lambda p: p.name)
def test_notebook_imports_are_installed_by_binder(notebook):
    requirements = _explicit()
    if _local_extras() is not None:
        requirements.append(Requirement(f"basinview[{','.join(sorted(_local_extras()))}]"))
    installed = _closure(requirements)
    owners = metadata.packages_distributions()
    missing = []
    for module in sorted(_imports(notebook)):
        if module in sys.stdlib_module_names:
            continue
        dists = {canonicalize_name(d) for d in owners.get(module, [module])}
        if not dists & installed:
            missing.append(module)
    assert not missing, f"{notebook.name} imports {missing}, which binder does not install"


def test_there_are_notebooks_to_check():
    assert len(NOTEBOOKS) >= 3
