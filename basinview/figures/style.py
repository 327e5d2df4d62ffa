"""The visual language of basinview figures: colours, layout and notes.

Categorical colours come from the palette of Okabe & Ito, chosen so that
people with the common forms of colour-vision deficiency can still tell
them apart; loss values use the sequential ``cividis`` colourscale, which
was designed for the same readers and stays ordered when printed in grey.

Every trace gets a fixed ``uid`` built from the figure and the trace's role
(:func:`uid`), so that rebuilding a figure from the same results gives
byte-identical output (stable notebook outputs under nbval).

References:
    Okabe, M. & Ito, K. (2008). Color Universal Design (CUD): how to make
    figures and presentations that are friendly to colorblind people.
    J*Fly, https://jfly.uni-koeln.de/color/.

    Nuñez, J. R., Anderton, C. R. & Renslow, R. S. (2018). Optimizing
    colormaps with consideration for color vision deficiency to enable
    accurate interpretation of scientific data. PLOS ONE 13(7): e0199239.
"""

from __future__ import annotations

import re
from typing import Any

import plotly.colors

from ..core.minima import DIVERGED_LABEL, MAX_STEPS_LABEL, NOT_STATIONARY_LABEL, OUTCOMES
from .build import FigureSpec

__all__ = [
    "CATEGORY_COLOURS",
    "DISTINCT_COLOURS",
    "DIVERGED",
    "LEGEND_LIMIT",
    "MAX_STEPS",
    "NOT_STATIONARY",
    "OKABE_ITO",
    "OUTCOME_STYLES",
    "SURFACE_SCALE",
    "UNCONVERGED",
    "add_note",
    "base_layout",
    "category_colour",
    "colour_round",
    "colour_scale",
    "mix",
    "uid",
]

#: The eight colours of Okabe & Ito (2008), by their published names.
OKABE_ITO: dict[str, str] = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky blue": "#56B4E9",
    "bluish green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish purple": "#CC79A7",
}

#: Order in which categories (minima, learning rates, starts) take colours.
#: Black and yellow come last: black is kept for markers and text, and yellow
#: is hard to see on light backgrounds.
CATEGORY_COLOURS: tuple[str, ...] = (
    OKABE_ITO["vermillion"],
    OKABE_ITO["blue"],
    OKABE_ITO["bluish green"],
    OKABE_ITO["reddish purple"],
    OKABE_ITO["orange"],
    OKABE_ITO["sky blue"],
    OKABE_ITO["yellow"],
)

#: Style of runs that diverged (status and label "diverged"): neutral grey, dashed, ended
#: by a cross.
DIVERGED = {
    "colour": "#8C8C8C",
    "dash": "dash",
    "end_symbol": "x-thin-open",
    "name": OUTCOMES[DIVERGED_LABEL],
    "legend": "diverged",
}

#: Style of runs that spent their step budget without converging (status "max_steps",
#: label :data:`~basinview.core.MAX_STEPS_LABEL`): dark grey, dotted.
MAX_STEPS = {
    "colour": "#3B3B3B",
    "dash": "dot",
    "end_symbol": "circle-open",
    "name": OUTCOMES[MAX_STEPS_LABEL],
    "legend": "max_steps (step budget spent)",
}

#: Style of runs whose end point is not a stationary point and could not be refined to
#: one (label :data:`~basinview.core.NOT_STATIONARY_LABEL`): slate, dash-dot.
NOT_STATIONARY = {
    "colour": "#4A4A78",
    "dash": "dashdot",
    "end_symbol": "diamond-open",
    "name": OUTCOMES[NOT_STATIONARY_LABEL],
    "legend": "not stationary (end point)",
}

#: Style of each outcome label of :data:`basinview.core.OUTCOMES`.
OUTCOME_STYLES: dict[int, dict[str, str]] = {
    MAX_STEPS_LABEL: MAX_STEPS,
    NOT_STATIONARY_LABEL: NOT_STATIONARY,
    DIVERGED_LABEL: DIVERGED,
}

#: Sequential colourscale of loss values (low = dark blue, high = light yellow).
SURFACE_SCALE = "cividis"

_FONT = "Source Sans Pro, Segoe UI, Helvetica, Arial, sans-serif"
_INK = "#2B2B2B"
_NOTE = "#5A5A5A"


#: Share of black mixed into the second round of category colours, and of white into the
#: third: the same seven hues, darker then lighter, so that up to 21 categories (critical
#: points, basins) get distinct colours and a reader with a colour-vision deficiency still
#: has the lightness step to go by.
_ROUND_MIX = ((None, 0.0), ("#000000", 0.4), ("#FFFFFF", 0.5))

#: How many categories get a colour of their own before colours repeat.
DISTINCT_COLOURS = len(CATEGORY_COLOURS) * len(_ROUND_MIX)

#: Legends name at most this many groups (the largest; the rest are summed up in one entry).
LEGEND_LIMIT = 10

#: Drawing of runs that did not converge (spent their budget, oscillated, or are not
#: stationary at the end): fainter, thinner and with fewer points than converged runs, and
#: no white casing, so that a run zig-zagging across the view leaves the contours readable.
UNCONVERGED = {"opacity": 0.4, "width": 1.0, "point_share": 0.25}


def mix(colour: str, other: str, share: float) -> str:
    """``colour`` with ``share`` (0 to 1) of ``other`` mixed in, as ``#RRGGBB``.

    Examples:
        >>> mix("#D55E00", "#FFFFFF", 0.5), mix("#0072B2", "#000000", 0.0)
        ('#EAAE80', '#0072B2')
    """
    c = [int(colour[i : i + 2], 16) for i in (1, 3, 5)]
    o = [int(other[i : i + 2], 16) for i in (1, 3, 5)]
    return "#" + "".join(f"{round(a + share * (b - a)):02X}" for a, b in zip(c, o))


def colour_round(i: int) -> int:
    """How many full rounds of distinct colours came before category ``i`` (0 for the first 21)."""
    return int(i) // DISTINCT_COLOURS


def category_colour(i: int) -> str:
    """Colour of category ``i``: distinct for the first 21 categories, then cycling.

    Categories 0-6 take the seven colours of :data:`CATEGORY_COLOURS`, 7-13
    the same hues darker, 14-20 lighter; from 21 on the colours repeat
    (figures then change the marker shape and say so, and basin maps write
    each basin's letter on it).

    For critical points ``i`` is the point's colour index in the problem's
    registry (``Minima.colour_index``), so a point keeps its colour in every
    figure.

    Examples:
        >>> category_colour(0), category_colour(7), category_colour(14), category_colour(21)
        ('#D55E00', '#803800', '#EAAE80', '#D55E00')
    """
    k = int(i) % DISTINCT_COLOURS
    base = CATEGORY_COLOURS[k % len(CATEGORY_COLOURS)]
    other, share = _ROUND_MIX[k // len(CATEGORY_COLOURS)]
    return base if other is None else mix(base, other, share)


def colour_scale(name: str) -> list[list[Any]]:
    """A named plotly colourscale as ``[[position, colour], ...]``, evenly spaced.

    This is the form plotly's validation turns a name into, so figures built
    without validation carry the same colours.

    Examples:
        >>> colour_scale("cividis")[0], len(colour_scale("cividis"))
        ([0.0, '#00224e'], 10)
    """
    colours = _named_colours(name.lower())
    if colours is None and name.lower().endswith("_r"):
        colours = _named_colours(name.lower()[:-2])
        colours = colours[::-1] if colours is not None else None
    if colours is None:
        raise ValueError(f"{name!r} is not one of plotly's named colourscales.")
    last = len(colours) - 1
    return [[i / last, c] for i, c in enumerate(colours)]


def _named_colours(name: str) -> list[str] | None:
    # the palettes plotly's validation knows by name (plotly.colors.get_colorscale
    # finds the same ones but inspects every module member, about a millisecond)
    for module in (plotly.colors.sequential, plotly.colors.diverging, plotly.colors.cyclical):
        for attr, colours in vars(module).items():
            if attr.lower() == name and isinstance(colours, list) and not attr.startswith("_"):
                return list(colours)
    return None


def uid(figure: str, role: str, index: int | str | None = None) -> str:
    """A fixed trace id: ``"<figure>-<role>"`` or ``"<figure>-<role>-<index>"``.

    Only letters, digits and hyphens are used: plotly.js builds element ids
    and CSS selectors from uids (a dot there makes it redraw colour bars on
    top of each other instead of replacing them).

    Examples:
        >>> uid("slice", "path", 3)
        'slice-path-3'
    """
    text = f"{figure}-{role}" if index is None else f"{figure}-{role}-{index}"
    return re.sub(r"[^A-Za-z0-9-]", "-", text)


def quiet_template() -> dict[str, Any]:
    """A small plotly template of our own: white paper, light grid, our colours.

    Much lighter than plotly's bundled templates, which carry defaults for
    every trace type: building a figure with one of those costs tens of
    milliseconds, which the Explorer pays on every redraw.
    """
    axis = {
        "gridcolor": "#ECECEC",
        "linecolor": "#BDBDBD",
        "zerolinecolor": "#D6D6D6",
        "ticks": "",
        "automargin": True,
        "title": {"standoff": 12},
    }
    scene_axis = {
        "backgroundcolor": "white",
        "gridcolor": "#E3E3E3",
        "linecolor": "#BDBDBD",
        "showbackground": True,
        "zerolinecolor": "#D6D6D6",
    }
    return {
        "layout": {
            "colorway": list(CATEGORY_COLOURS),
            "hovermode": "closest",
            "hoverlabel": {"align": "left"},
            "paper_bgcolor": "white",
            "plot_bgcolor": "white",
            "xaxis": dict(axis),
            "yaxis": dict(axis),
            "scene": {
                "xaxis": dict(scene_axis),
                "yaxis": dict(scene_axis),
                "zaxis": dict(scene_axis),
            },
        }
    }


def base_layout(title: str | None, subtitle: str | None = None, **extra: Any) -> dict[str, Any]:
    """Layout shared by all figures: white paper, quiet grid, left-aligned title."""
    text = title or ""
    if subtitle:
        text = f"{text}<br><span style='font-size:12px;color:{_NOTE}'>{subtitle}</span>"
    layout: dict[str, Any] = {
        "template": quiet_template(),
        "font": {"family": _FONT, "size": 13, "color": _INK},
        "title": {"text": text, "x": 0.01, "xanchor": "left", "y": 0.97, "yanchor": "top"},
        "margin": {"l": 70, "r": 30, "t": 80 if subtitle else 60, "b": 100},
        "legend": {
            "bgcolor": "rgba(255,255,255,0.85)",
            "bordercolor": "#D0D0D0",
            "borderwidth": 1,
            "font": {"size": 12},
        },
        "hoverlabel": {"font": {"family": _FONT}},
        "paper_bgcolor": "white",
        "plot_bgcolor": "white",
    }
    layout.update(extra)
    return layout


def add_note(fig: FigureSpec, text: str, *, row: int = 0) -> None:
    """Write a short caution or remark under the plot area (row 0 is the first line)."""
    fig.add_annotation(
        text=text,
        xref="paper",
        yref="paper",
        x=0,
        y=0,
        xanchor="left",
        yanchor="top",
        yshift=-56 - 17 * row,
        showarrow=False,
        align="left",
        font={"size": 11, "color": _NOTE},
    )
