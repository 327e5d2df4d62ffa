"""Figures: pure functions from basinview results to plotly figures.

Every function takes result objects of :mod:`basinview.core` (surfaces,
runs, minima, basin maps, step-size sweeps, profiles) and returns a plain
``plotly.graph_objects.Figure``. Nothing here imports ipywidgets, so the
figures work in a static notebook export and in the HTML report.

Figures that show a 2-D slice say so on the figure: a slice is not the
whole loss, a low point of the slice need not be a minimum of the model,
and descent paths leave the plane (hover shows how far).
"""

from .basins import basin_figure, profile_figure
from .curves import REGIME_COLOURS, loss_curves_figure, step_size_figure
from .groups import solutions_figure
from .instruments import curved_path_figure, density_figure, trajectory_figure
from .levels import Levels, choose_levels
from .paths import COLOR_BY
from .schemes import scheme_colours, scheme_shares_figure, scheme_steps_figure
from .sharpness import sharpness_figure
from .slices import relief_figure, slice_caution, slice_figure
from .style import CATEGORY_COLOURS, OKABE_ITO, SURFACE_SCALE
from .text import readable_table, significant

__all__ = [
    "CATEGORY_COLOURS",
    "COLOR_BY",
    "OKABE_ITO",
    "REGIME_COLOURS",
    "SURFACE_SCALE",
    "Levels",
    "basin_figure",
    "choose_levels",
    "coordinate_shift",
    "curved_path_figure",
    "density_figure",
    "loss_curves_figure",
    "profile_figure",
    "readable_table",
    "relief_figure",
    "scheme_colours",
    "scheme_shares_figure",
    "scheme_steps_figure",
    "sharpness_figure",
    "significant",
    "slice_caution",
    "slice_figure",
    "solutions_figure",
    "step_size_figure",
    "trajectory_figure",
]
