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
