"""basinview uses only the public API of plotly and ipywidgets (no private attributes).

A source scan: every module under basinview/ is searched for reaching into
plotly's or ipywidgets' private names (an attribute or module starting with
one underscore, or the trait and property stores those libraries keep).
Dunder names (``__init__``) and our own private names are not affected.
"""

from __future__ import annotations

import re
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "basinview"

# common practice: a leading underscore marks a name private in Python (PEP 8).
PATTERNS = {
    "private plotly module or attribute": re.compile(r"\bplotly(\.\w+)*\._[A-Za-z]\w*"),
    "private ipywidgets module or attribute": re.compile(r"\b(ipywidgets|widgets|w)\._[A-Za-z]\w*"),
    "traitlets value store": re.compile(r"\._trait_values\b"),
    "plotly property store": re.compile(r"\._(props|data|layout_obj|validate|grid_ref|grid_str)\b"),
    "FigureWidget message traits": re.compile(r"_py2js_|_js2py_"),
    "plotly private constructor arguments": re.compile(r"[\"']_(validate|grid_ref|grid_str)[\"']"),
}

# Known until their owners change them (the integrator deletes each line when it goes;
# the test fails if a listed finding is no longer there, so none stays by accident).
PENDING: dict[tuple[str, str], str] = {}


# Store names are also common names of our own (``self._data``): they count only in
# modules that work with plotly or widget objects.
STORES = ("traitlets value store", "plotly property store")
USES_LIBRARIES = re.compile(r"^\s*(import|from)\s+(plotly|ipywidgets|anywidget|traitlets)\b", re.M)


def findings() -> set[tuple[str, str]]:
    found = set()
    for path in sorted(PACKAGE.rglob("*.py")):
        text = path.read_text(encoding="utf-8")
        for what, pattern in PATTERNS.items():
            if what in STORES and not USES_LIBRARIES.search(text):
                continue
            if pattern.search(text):
                found.add((path.relative_to(PACKAGE).as_posix(), what))
    return found


def test_no_private_attribute_of_plotly_or_ipywidgets_is_used():
    found = findings()
    unexpected = sorted(found - set(PENDING))
    assert not unexpected, f"private plotly/ipywidgets API used: {unexpected}"
    stale = sorted(set(PENDING) - found)
    assert not stale, f"these are fixed: remove them from PENDING: {stale}"


def test_the_scan_finds_what_it_looks_for():
    # each pattern catches the uses this package had before (so a scan that
    # matches nothing cannot pass by accident)
    samples = {
        "private plotly module or attribute": "from plotly._subplots import SubplotRef",
        "traitlets value store": 'self._trait_values["_widget_data"] = x',
        "plotly property store": "props = getattr(obj, '_props')  or fig._layout_obj._validate",
        "FigureWidget message traits": "names=['_py2js_update']",
        "plotly private constructor arguments": 'spec["_grid_str"] = text',
        "private ipywidgets module or attribute": "w._Selection",
    }
    for what, text in samples.items():
        assert PATTERNS[what].search(text), what
    assert not PATTERNS["plotly property store"].search("self._data_table = 1")
    assert not PATTERNS["private plotly module or attribute"].search("plotly.graph_objects.Figure")
