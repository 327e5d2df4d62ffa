"""basinview.core: the engine (JAX, NumPy, optax, pandas; no plotting, no widgets).

Data flow: :class:`Problem` -> :class:`Plane` -> surfaces, descent runs,
minima and curvature -> result objects (NumPy arrays and pandas tables).
"""

from ._tuning import bucket, chunk_size_for, count_compilations
from .descent import STATUSES, Runs, default_plane, default_tolerances, descend
from .errors import BasinviewError, FingerprintWarning, LossError, ParameterError, SettingsError
from .optimizers import (
    ADAM,
    GRADIENT_DESCENT,
    MOMENTUM,
    NESTEROV,
    RMSPROP,
    RULES,
    SEQUENTIAL,
    UpdateRule,
    get_rule,
    optax_rule,
)
from .planes import Plane, axes_plane, hessian_plane, plane_from_spec, random_plane, through_plane
from .problem import Problem
from .settings import SCHEMA_VERSION, Settings, View, compute_view, record_settings
from .starts import (
    Starts,
    explicit_starts,
    grid_starts,
    initializer_starts,
    random_starts,
    starts_from_spec,
)
from .surface import Profile, Surface, evaluate_points, evaluate_surface, segment_profile

__all__ = [
    "ADAM",
    "GRADIENT_DESCENT",
    "MOMENTUM",
    "NESTEROV",
    "RMSPROP",
    "RULES",
    "SCHEMA_VERSION",
    "SEQUENTIAL",
    "STATUSES",
    "BasinviewError",
    "FingerprintWarning",
    "LossError",
    "ParameterError",
    "Plane",
    "Problem",
    "Profile",
    "Runs",
    "Settings",
    "SettingsError",
    "Starts",
    "Surface",
    "UpdateRule",
    "View",
    "axes_plane",
    "bucket",
    "chunk_size_for",
    "compute_view",
    "count_compilations",
    "default_plane",
    "default_tolerances",
    "descend",
    "evaluate_points",
    "evaluate_surface",
    "explicit_starts",
    "get_rule",
    "grid_starts",
    "hessian_plane",
    "initializer_starts",
    "optax_rule",
    "plane_from_spec",
    "random_plane",
    "random_starts",
    "record_settings",
    "segment_profile",
    "starts_from_spec",
    "through_plane",
]
