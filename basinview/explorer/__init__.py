"""The Explorer widget (ipywidgets controls + PlotView, our anywidget drawing with plotly.js).

See :class:`Explorer`. The pure parts (view state, stage planning,
computation) live in :mod:`.state` and :mod:`.compute` and import no widgets.
"""

from .compute import ViewComputer, ViewResults
from .plot import PlotView
from .schemes import ALL_SCHEMES, GROUPINGS
from .state import STAGES, ViewState, stages_to_update, state_from_settings
from .widget import SIDE_VIEWS, Explorer

__all__ = [
    "ALL_SCHEMES",
    "GROUPINGS",
    "SIDE_VIEWS",
    "STAGES",
    "Explorer",
    "PlotView",
    "ViewComputer",
    "ViewResults",
    "ViewState",
    "stages_to_update",
    "state_from_settings",
]
