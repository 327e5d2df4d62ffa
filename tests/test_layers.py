"""Layering: the engine imports no plotting or widget library."""

from __future__ import annotations

import subprocess
import sys


def test_core_imports_no_plotting_or_widgets():
    code = (
        "import sys, basinview.core, basinview;"
        "bad = [m for m in ('plotly', 'ipywidgets', 'anywidget', 'IPython') if m in sys.modules];"
        "print(','.join(bad))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""


def test_lazy_attributes_resolve():
    import basinview

    assert basinview.scenarios.beacon().problem.size == 2
    assert "descend" in dir(basinview)


def test_figures_import_no_widgets():
    code = (
        "import sys, basinview.figures;"
        "print(','.join(m for m in ('ipywidgets', 'anywidget') if m in sys.modules))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""


def test_core_never_imports_the_package_root():
    # The version comes from basinview/_version.py; core must not reach for ``basinview``
    # itself (which would tie the engine to the lazy figure and widget layers).
    import ast
    from pathlib import Path

    import basinview.core

    offenders = []
    for path in sorted(Path(basinview.core.__file__).parent.glob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ImportFrom):
                root = node.level == 2 and node.module is None
                absolute = node.level == 0 and node.module == "basinview"
                if root or absolute:
                    offenders.append(f"{path.name}:{node.lineno}")
            elif isinstance(node, ast.Import) and any(a.name == "basinview" for a in node.names):
                offenders.append(f"{path.name}:{node.lineno}")
    assert offenders == []


def test_one_version_everywhere():
    import re
    from pathlib import Path

    import basinview
    from basinview._version import __version__
    from basinview.core.settings import library_versions

    # The build reads the version from the same module (hatchling's version source).
    text = (Path(__file__).parents[1] / "pyproject.toml").read_text(encoding="utf-8")
    assert re.search(r'^dynamic = \["version"\]$', text, re.M)
    assert re.search(r'^\[tool\.hatch\.version\]\npath = "basinview/_version\.py"$', text, re.M)
    assert not re.search(r"^version = ", text, re.M)
    assert basinview.__version__ == __version__
    assert library_versions()["basinview"] == __version__
