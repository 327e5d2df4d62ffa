"""Widget controls of the Explorer and the mapping between them and a ViewState.

Only construction and reading of ipywidgets lives here; no computation.
"""

from __future__ import annotations

import math
from typing import Any

import ipywidgets as w
import numpy as np

from ..core import RULES, Problem, UpdateRule, get_rule, span_ranges
from .schemes import ALL_SCHEMES, GROUPINGS
from .state import PLANE_KINDS, ViewState

__all__ = ["Controls", "hyper_control", "respan", "view_centre"]

_STYLE = {"description_width": "110px"}


def _wide() -> w.Layout:
    """A fresh layout per control (a shared Layout would hide them all at once)."""
    return w.Layout(width="300px")


def _log_slider(description: str, value: float, low: float, high: float) -> w.FloatLogSlider:
    lo = math.floor(math.log10(low))
    hi = math.ceil(math.log10(high))
    return w.FloatLogSlider(
        value=value,
        base=10,
        min=lo,
        max=hi,
        step=0.05,
        description=description,
        readout_format=".3g",
        continuous_update=False,
        layout=_wide(),
        style=_STYLE,
    )


def hyper_control(name: str, value: float) -> w.Widget:
    """A control for one hyper-parameter of an update rule (our own ranges)."""
    common = {"description": name, "continuous_update": False, "layout": _wide(), "style": _STYLE}
    if name in ("momentum", "decay", "b1"):
        return w.FloatSlider(
            value=value, min=0.0, max=0.999, step=0.001, readout_format=".3f", **common
        )
    if name == "b2":
        return w.FloatSlider(
            value=value, min=0.9, max=0.9999, step=0.0001, readout_format=".4f", **common
        )
    if name == "eps":
        return _log_slider(name, value, 1e-12, 1e-2)
    return w.FloatText(value=value, **common)


def view_centre(problem: Problem, state: ViewState) -> tuple[float, float]:
    """Plane coordinates of the view's centre (what the plane's ``centre`` will be).

    On an axes plane: the values of the two coordinates at the origin (the
    problem's parameters when the state has none); on other planes ``(0, 0)``.
    Read off the state, so no plane is built.
    """
    if state.plane_kind != "axes":
        return (0.0, 0.0)
    labels = problem.labels
    theta = problem.theta0 if state.origin is None else np.asarray(state.origin, dtype=float)
    x = state.x_label or labels[0]
    y = state.y_label or labels[min(1, len(labels) - 1)]
    return float(theta[problem.index(x)]), float(theta[problem.index(y)])


def respan(problem: Problem, old: ViewState, new: ViewState, span: Any = None) -> ViewState:
    """``new`` with its span in plane coordinates.

    A ``span`` given here (a half-width, half-widths or explicit ranges) is
    read around ``new``'s centre, as :func:`~basinview.core.span_ranges` reads
    it. Without one, ``new`` keeps ``old``'s span, moved with the centre when
    the plane changed (another axis or origin): the view keeps its size and
    its place relative to the centre.
    """
    centre = view_centre(problem, new)
    if span is not None:
        return new.replace(span=span_ranges(span, centre))
    before = view_centre(problem, old)
    da, db = centre[0] - before[0], centre[1] - before[1]
    if da == 0 and db == 0:
        return new
    (a0, a1), (b0, b1) = new.span
    return new.replace(span=((a0 + da, a1 + da), (b0 + db, b1 + db)))


def _half_width(problem: Problem, state: ViewState) -> float:
    """The span slider's value: the largest half-width of the span around the centre."""
    ca, cb = view_centre(problem, state)
    (a0, a1), (b0, b1) = state.span
    return max(abs(a0 - ca), abs(a1 - ca), abs(b0 - cb), abs(b1 - cb))


class Controls:
    """All Explorer controls, built from a ViewState and read back into one."""

    def __init__(
        self,
        problem: Problem,
        state: ViewState,
        rule: UpdateRule,
        schemes: tuple[str, ...] = (),
    ) -> None:
        self._problem = problem
        self._schemes = tuple(schemes)
        # The initialisation scheme the runs start from (shown only with schemes=).
        self.scheme = w.Dropdown(
            options=[*self._schemes, ALL_SCHEMES] if self._schemes else [ALL_SCHEMES],
            value=state.scheme or ALL_SCHEMES,
            description="scheme",
            tooltip="which initialisation scheme's starts the runs come from",
            layout=_wide(),
            style=_STYLE,
        )
        self.grouping = w.Dropdown(
            options=list(GROUPINGS),
            value=state.grouping,
            description="solutions by",
            tooltip="name solutions by critical point (letters), by connectivity (S1, S2...: "
            "end points joined by low straight segments), or choose from the runs (auto)",
            layout=_wide(),
            style=_STYLE,
        )
        labels = list(problem.labels)
        lr = state.learning_rate
        self.optimizer = w.Dropdown(
            options=sorted(set(RULES) | {rule.name}),
            value=rule.name,
            description="optimizer",
            layout=_wide(),
            style=_STYLE,
        )
        self.learning_rate = _log_slider("learning rate", lr, lr / 1e4, max(lr * 100, 10.0))
        self.hyper_box = w.VBox([])
        self.steps = w.IntSlider(
            value=state.steps,
            min=1,
            max=max(2000, 4 * state.steps),
            description="steps",
            continuous_update=False,
            layout=_wide(),
            style=_STYLE,
        )
        self.n_starts = w.IntSlider(
            value=state.n_starts,
            min=0,
            max=max(64, state.n_starts),
            description="random starts",
            continuous_update=False,
            layout=_wide(),
            style=_STYLE,
        )
        self.start_scale = _log_slider("start spread", state.start_scale, 1e-3, 1e3)
        self.start_seed = w.BoundedIntText(
            value=state.start_seed,
            min=0,
            max=2**31 - 1,
            description="start seed",
            layout=_wide(),
            style=_STYLE,
        )
        self.clear_clicks = w.Button(
            description="forget clicked starts",
            layout=_wide(),
            tooltip="remove the starts added by clicking the map",
        )
        self.plane_kind = w.Dropdown(
            options=list(PLANE_KINDS),
            value=state.plane_kind,
            description="plane",
            layout=_wide(),
            style=_STYLE,
        )
        self.x_label = w.Dropdown(
            options=labels,
            value=state.x_label or labels[0],
            description="x axis",
            layout=_wide(),
            style=_STYLE,
        )
        y_default = state.y_label or (labels[1] if len(labels) > 1 else labels[0])
        self.y_label = w.Dropdown(
            options=labels, value=y_default, description="y axis", layout=_wide(), style=_STYLE
        )
        self.plane_seed = w.BoundedIntText(
            value=state.plane_seed,
            min=0,
            max=2**31 - 1,
            description="plane seed",
            layout=_wide(),
            style=_STYLE,
        )
        self.normalise = w.Dropdown(
            options=["filter", "layer", "none"],
            value=state.normalise,
            description="normalise",
            layout=_wide(),
            style=_STYLE,
        )
        half = _half_width(problem, state)
        self.span = _log_slider("span (±)", half, min(half, 1e-3), max(half * 100, 10.0))
        self.resolution = w.IntSlider(
            value=state.resolution,
            min=5,
            max=max(201, state.resolution),
            description="resolution",
            continuous_update=False,
            layout=_wide(),
            style=_STYLE,
        )
        self._span_value = half
        self.set_hyper(rule, state.hyper_dict)
        self.update_visibility()

    # ----------------------------------------------------------------- layout
    def box(self) -> w.VBox:
        return w.VBox(
            [
                w.HTML("<b>descent</b>"),
                self.optimizer,
                self.learning_rate,
                self.hyper_box,
                self.steps,
                self.grouping,
                w.HTML("<b>starts</b>"),
                self.scheme,
                self.n_starts,
                self.start_scale,
                self.start_seed,
                self.clear_clicks,
                w.HTML("<b>slice</b>"),
                self.plane_kind,
                self.x_label,
                self.y_label,
                self.plane_seed,
                self.normalise,
                self.span,
                self.resolution,
            ],
            layout=w.Layout(min_width="320px"),
        )

    def value_widgets(self) -> list[w.Widget]:
        """Controls whose value changes the view."""
        return [
            self.optimizer,
            self.learning_rate,
            self.steps,
            self.grouping,
            self.scheme,
            self.n_starts,
            self.start_scale,
            self.start_seed,
            self.plane_kind,
            self.x_label,
            self.y_label,
            self.plane_seed,
            self.normalise,
            self.span,
            self.resolution,
        ]

    def set_hyper(self, rule: UpdateRule, values: dict[str, float]) -> None:
        """Rebuild the hyper-parameter controls for ``rule``."""
        children = []
        for name in rule.hyper:
            if name == "learning_rate":
                continue
            value = float(values.get(name, rule.defaults.get(name, 0.0)))
            children.append(hyper_control(name, value))
        self.hyper_box.children = children

    def hyper_values(self) -> dict[str, float]:
        return {c.description: float(c.value) for c in self.hyper_box.children}

    def update_visibility(self) -> None:
        kind = self.plane_kind.value
        show = {
            "axes": (self.x_label, self.y_label),
            "random": (self.plane_seed, self.normalise),
            "hessian": (self.plane_seed,),
        }
        for c in (self.x_label, self.y_label, self.plane_seed, self.normalise):
            c.layout.display = None if c in show[kind] else "none"
        # With schemes, the runs start from the chosen scheme (and clicks), not a random draw.
        self.scheme.layout.display = None if self._schemes else "none"
        for c in (self.n_starts, self.start_scale, self.start_seed):
            c.layout.display = "none" if self._schemes else None

    # ------------------------------------------------------------------ state
    def read(self, base: ViewState) -> ViewState:
        """The state the controls show (fields without a control come from ``base``)."""
        half = float(self.span.value)
        moved = not math.isclose(half, self._span_value, rel_tol=1e-12)
        state = base.replace(
            optimizer=self.optimizer.value,
            learning_rate=float(self.learning_rate.value),
            hyper=self.hyper_values(),
            steps=int(self.steps.value),
            n_starts=int(self.n_starts.value),
            start_scale=float(self.start_scale.value),
            start_seed=int(self.start_seed.value),
            plane_kind=self.plane_kind.value,
            x_label=self.x_label.value,
            y_label=self.y_label.value,
            plane_seed=int(self.plane_seed.value),
            normalise=self.normalise.value,
            resolution=int(self.resolution.value),
            scheme=self.scheme.value if self._schemes else "",
            grouping=self.grouping.value,
        )
        # The slider is a half-width around the plane's centre (parameter values on an
        # axes plane); without a move the span follows the centre to a new axis.
        return respan(self._problem, base, state, half if moved else None)

    def show(self, state: ViewState) -> None:
        """Set every control to ``state`` (callers suspend their observers first)."""
        rule = get_rule(state.optimizer)
        self.optimizer.value = rule.name
        self.set_hyper(rule, state.hyper_dict)
        for name, value in (
            ("learning_rate", state.learning_rate),
            ("steps", state.steps),
            ("n_starts", state.n_starts),
            ("start_scale", state.start_scale),
            ("start_seed", state.start_seed),
            ("plane_kind", state.plane_kind),
            ("plane_seed", state.plane_seed),
            ("normalise", state.normalise),
            ("resolution", state.resolution),
            ("grouping", state.grouping),
        ):
            _set(getattr(self, name), value)
        if self._schemes and state.scheme:
            self.scheme.value = state.scheme
        if state.x_label:
            self.x_label.value = state.x_label
        if state.y_label:
            self.y_label.value = state.y_label
        half = _half_width(self._problem, state)
        self._span_value = half
        _set(self.span, half)
        self.update_visibility()


def _set(widget: Any, value: Any) -> None:
    if (
        hasattr(widget, "max")
        and isinstance(value, (int, float))
        and not isinstance(widget, w.FloatLogSlider)
    ):
        widget.max = max(widget.max, value)
    if isinstance(widget, w.FloatLogSlider):
        exp = math.log10(value) if value > 0 else widget.min
        widget.min = min(widget.min, math.floor(exp))
        widget.max = max(widget.max, math.ceil(exp))
    widget.value = value
