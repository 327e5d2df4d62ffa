"""Update rules as pure ``(init, step)`` pairs on flat parameter vectors.

Every rule is an :class:`UpdateRule`. Its hyper-parameters (learning rate,
momentum, ...) are passed in as arrays at every call, never baked into the
compiled program, so a sweep over them runs in one compiled call and moving
a slider never recompiles.

``step(theta, grad, state, hyper, oracle) -> (theta, state)`` receives the
gradient at ``theta``; ``oracle.partial(theta, i)`` gives one partial
derivative at another point (used by the sequential variant only).
"""

from __future__ import annotations

import inspect
import math
import numbers
from collections.abc import Callable, Hashable, Mapping
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
import optax

from .errors import ParameterError
from .rule_keys import stable_key

__all__ = [
    "ADAM",
    "GRADIENT_DESCENT",
    "MOMENTUM",
    "NESTEROV",
    "RMSPROP",
    "RULES",
    "SEQUENTIAL",
    "Oracle",
    "UpdateRule",
    "check_hyper",
    "get_rule",
    "optax_rule",
]

Hyper = Mapping[str, jax.Array]


class Oracle(NamedTuple):
    """Derivative access for rules that need more than the gradient at ``theta``."""

    partial: Callable[[jax.Array, jax.Array], jax.Array]


class Bound(NamedTuple):
    """Allowed open/closed interval of a hyper-parameter."""

    low: float
    high: float
    low_open: bool = True
    high_open: bool = True

    def contains(self, x: float) -> bool:
        lo_ok = x > self.low if self.low_open else x >= self.low
        hi_ok = x < self.high if self.high_open else x <= self.high
        return lo_ok and hi_ok

    def text(self) -> str:
        return f"{'(' if self.low_open else '['}{self.low}, {self.high}{')' if self.high_open else ']'}"


POSITIVE = Bound(0.0, math.inf)
UNIT = Bound(0.0, 1.0, low_open=False)


class UpdateRule(NamedTuple):
    """An optimiser as a pair of pure functions plus its hyper-parameter names.

    Attributes:
        name: short identifier (``"gradient_descent"``, ``"adam"``, ...).
        title: human-readable name shown in tables and figures.
        hyper: names of the traced hyper-parameters, ``learning_rate`` first.
        defaults: default value of each hyper-parameter but the learning rate.
        bounds: allowed interval of each hyper-parameter.
        init: ``init(theta, hyper) -> state``.
        step: ``step(theta, grad, state, hyper, oracle) -> (theta, state)``.
        preconditioner: for adaptive rules, ``preconditioner(state, hyper) ->
            p``, the positive diagonal ``P`` by which the current state divides
            the (averaged) gradient; None for other rules.
        key: a stable, hashable identity of the rule's program: two rules
            with equal keys compute the same thing, so the compiled program
            of one serves the other. None: the functions identify the rule.
    """

    name: str
    title: str
    hyper: tuple[str, ...]
    defaults: Mapping[str, float]
    bounds: Mapping[str, Bound]
    init: Callable[[jax.Array, Hyper], Any]
    step: Callable[[jax.Array, jax.Array, Any, Hyper, Oracle], tuple[jax.Array, Any]]
    preconditioner: Callable[[Any, Hyper], jax.Array] | None = None
    key: Hashable | None = None


def _no_state(theta: jax.Array, hyper: Hyper) -> tuple[()]:
    return ()


def _velocity(theta: jax.Array, hyper: Hyper) -> jax.Array:
    return jnp.zeros_like(theta)


def _gd_step(theta, grad, state, hyper, oracle):
    return theta - hyper["learning_rate"] * grad, state


GRADIENT_DESCENT = UpdateRule(
    name="gradient_descent",
    title="gradient descent",
    hyper=("learning_rate",),
    defaults={},
    bounds={"learning_rate": POSITIVE},
    init=_no_state,
    step=_gd_step,
)


def _sequential_step(theta, grad, state, hyper, oracle):
    lr = hyper["learning_rate"]

    def body(i, th):
        return th.at[i].add(-lr * oracle.partial(th, i))

    return jax.lax.fori_loop(0, theta.shape[0], body, theta), state


SEQUENTIAL = UpdateRule(
    name="sequential",
    title="sequential coordinate updates (not gradient descent)",
    hyper=("learning_rate",),
    defaults={},
    bounds={"learning_rate": POSITIVE},
    init=_no_state,
    step=_sequential_step,
)
"""Coordinate-by-coordinate updates: each coordinate moves using the partial
derivative at the vector in which the earlier coordinates already moved. This
is a different algorithm from gradient descent (which updates all coordinates
simultaneously from the same gradient); it is offered only for comparison and
costs one forward-mode derivative per coordinate per step."""


def _momentum_step(theta, grad, velocity, hyper, oracle):
    velocity = hyper["momentum"] * velocity - hyper["learning_rate"] * grad
    return theta + velocity, velocity


MOMENTUM = UpdateRule(
    name="momentum",
    title="heavy-ball momentum",
    hyper=("learning_rate", "momentum"),
    defaults={"momentum": 0.9},
    bounds={"learning_rate": POSITIVE, "momentum": UNIT},
    init=_velocity,
    step=_momentum_step,
)
"""Heavy ball: ``x+ = x - lr * grad f(x) + momentum * (x - x_prev)`` (Polyak 1964)."""


def _nesterov_step(z, grad, velocity, hyper, oracle):
    beta, lr = hyper["momentum"], hyper["learning_rate"]
    new_velocity = beta * velocity - lr * grad
    return z + beta * beta * velocity - (1 + beta) * lr * grad, new_velocity


NESTEROV = UpdateRule(
    name="nesterov",
    title="Nesterov momentum",
    hyper=("learning_rate", "momentum"),
    defaults={"momentum": 0.9},
    bounds={"learning_rate": POSITIVE, "momentum": UNIT},
    init=_velocity,
    step=_nesterov_step,
)
"""Nesterov's accelerated gradient, ``y = x + momentum * (x - x_prev)``,
``x+ = y - lr * grad f(y)`` (Nesterov 1983), tracked through the look-ahead
points ``y``: the recorded iterate is ``y``, so one gradient per step suffices.
The update of ``y`` is ``y+ = y + beta^2 v - (1 + beta) lr grad f(y)``,
``v+ = beta v - lr grad f(y)``; it has the same stability bounds as the
textbook form because the two are related by an invertible linear change of
variables."""


def _optax_hyper_names(factory: Callable[..., Any]) -> tuple[tuple[str, ...], dict[str, float]]:
    sig = inspect.signature(factory)
    names, defaults = [], {}
    for pname, param in sig.parameters.items():
        if pname == "learning_rate":
            continue
        default = param.default
        if isinstance(default, float) and not isinstance(default, bool):
            names.append(pname)
            defaults[pname] = float(default)
    return ("learning_rate", *names), defaults


def optax_rule(
    opt: Callable[..., optax.GradientTransformation] | optax.GradientTransformation,
    *,
    name: str | None = None,
    **static: Any,
) -> UpdateRule:
    """An update rule from optax.

    Args:
        opt: either an optax *factory* such as ``optax.adamw`` (its
            ``learning_rate`` and every float-valued argument become traced,
            sweepable hyper-parameters, through ``optax.inject_hyperparams``),
            or a built ``GradientTransformation``, whose updates are applied
            as ``theta + learning_rate * updates`` (build it with a learning
            rate of 1.0 to sweep the rate here).
        name: name for tables; defaults to the factory's name.
        **static: fixed non-float arguments of the factory (e.g. ``nesterov=True``).

    Rules built from equal factories (or transformations built the same way,
    e.g. ``optax.chain(optax.clip(1.0), optax.sgd(1.0))`` written twice) get
    equal :attr:`UpdateRule.key`, so they share one compiled program: passing
    ``optax.adamw`` again with another learning rate compiles nothing. A
    transformation holding something that cannot be compared (a large array,
    an arbitrary object) gets no key and compiles once per object.
    """
    if isinstance(opt, optax.GradientTransformation):
        transform = opt

        def init_t(theta, hyper):
            return transform.init(theta)

        def step_t(theta, grad, state, hyper, oracle):
            updates, state = transform.update(grad, state, theta)
            return theta + hyper["learning_rate"] * updates, state

        return UpdateRule(
            name=name or "optax",
            title=name or "optax transformation",
            hyper=("learning_rate",),
            defaults={},
            bounds={"learning_rate": POSITIVE},
            init=init_t,
            step=step_t,
            key=stable_key("optax-transformation", name, transform),
        )
    if not callable(opt):
        raise ParameterError(
            f"optimizer must be a rule name, an UpdateRule, an optax factory or an "
            f"optax GradientTransformation; got {type(opt).__name__}."
        )
    factory = opt
    hyper_names, defaults = _optax_hyper_names(factory)
    bad = [k for k in static if k in hyper_names]
    if bad:
        raise ParameterError(
            f"{bad} are float hyper-parameters of {factory.__name__}; pass them as "
            "hyper-parameters of the run (hyper={...}), not as fixed arguments."
        )
    static_names = tuple(static)

    def make(hyper: Hyper) -> optax.GradientTransformation:
        return optax.inject_hyperparams(factory, static_args=static_names)(**hyper, **static)

    def init(theta, hyper):
        return make(hyper).init(theta)

    def step(theta, grad, state, hyper, oracle):
        updates, state = make(hyper).update(grad, state, theta)
        return theta + updates, state

    fname = getattr(factory, "__name__", "optax")
    return UpdateRule(
        name=name or fname,
        title=name or f"{fname} (optax)",
        hyper=hyper_names,
        defaults=defaults,
        bounds={"learning_rate": POSITIVE},
        init=init,
        step=step,
        key=stable_key("optax-factory", name, factory, tuple(sorted(static.items()))),
    )


def _adam_preconditioner(state: Any, hyper: Hyper) -> jax.Array:
    # optax.adam divides the bias-corrected first moment by sqrt(nu_hat) + eps.
    inner = state.inner_state[0]
    count = jnp.maximum(inner.count, 1).astype(inner.nu.dtype)
    nu_hat = inner.nu / (1.0 - hyper["b2"] ** count)
    return jnp.sqrt(nu_hat) + hyper["eps"]


def _rmsprop_preconditioner(state: Any, hyper: Hyper) -> jax.Array:
    # optax.rmsprop (no bias correction, eps inside the root) divides by sqrt(nu + eps).
    return jnp.sqrt(state.inner_state[0].nu + hyper["eps"])


ADAM = optax_rule(optax.adam, name="adam")._replace(
    title="Adam",
    hyper=("learning_rate", "b1", "b2", "eps"),
    defaults={"b1": 0.9, "b2": 0.999, "eps": 1e-8},
    bounds={"learning_rate": POSITIVE, "b1": UNIT, "b2": UNIT, "eps": POSITIVE},
    preconditioner=_adam_preconditioner,
)
"""Adam (Kingma & Ba 2015) as implemented by ``optax.adam``."""

RMSPROP = optax_rule(optax.rmsprop, name="rmsprop")._replace(
    title="RMSProp",
    hyper=("learning_rate", "decay", "eps"),
    defaults={"decay": 0.9, "eps": 1e-8},
    bounds={"learning_rate": POSITIVE, "decay": UNIT, "eps": POSITIVE},
    preconditioner=_rmsprop_preconditioner,
)
"""RMSProp (Tieleman & Hinton 2012) as implemented by ``optax.rmsprop``:
``v = decay v + (1 - decay) g^2``, ``x -= lr g / sqrt(v + eps)``."""

RULES: dict[str, UpdateRule] = {
    rule.name: rule for rule in (GRADIENT_DESCENT, SEQUENTIAL, MOMENTUM, NESTEROV, ADAM, RMSPROP)
}
_ALIASES = {"gd": "gradient_descent", "heavy_ball": "momentum", "nag": "nesterov"}


def get_rule(optimizer: Any) -> UpdateRule:
    """The :class:`UpdateRule` for a name, a rule, or an optax object."""
    if isinstance(optimizer, UpdateRule):
        return optimizer
    if isinstance(optimizer, str):
        key = _ALIASES.get(optimizer.lower(), optimizer.lower())
        if key not in RULES:
            raise ParameterError(
                f"unknown optimizer {optimizer!r}; choose one of {sorted(RULES)} "
                "(or 'gd'), pass an optax factory such as optax.adamw, or an UpdateRule."
            )
        return RULES[key]
    return optax_rule(optimizer)


def check_hyper(rule: UpdateRule, hyper: Mapping[str, Any]) -> dict[str, list[float]]:
    """Validate hyper-parameter values (each a number or a list of numbers).

    Returns every hyper-parameter of the rule as a list of floats, with the
    rule's defaults filled in. Raises ParameterError naming the bad value.
    """
    unknown = sorted(set(hyper) - set(rule.hyper))
    if unknown:
        raise ParameterError(
            f"{rule.title} has no hyper-parameter {unknown}; its hyper-parameters are "
            f"{list(rule.hyper)}."
        )
    out: dict[str, list[float]] = {}
    for hname in rule.hyper:
        if hname in hyper:
            raw = hyper[hname]
        elif hname in rule.defaults:
            raw = rule.defaults[hname]
        else:
            raise ParameterError(
                f"{rule.title} needs a value for {hname!r}; pass it as hyper={{{hname!r}: value}}."
            )
        scalar = isinstance(raw, (numbers.Number, str, bytes)) or getattr(raw, "ndim", 1) == 0
        if not scalar and not isinstance(raw, (str, bytes)):
            try:
                shape = f"an array of shape {np.shape(raw)}"
                nested = np.ndim(raw) > 1
            except ValueError:  # ragged nesting
                shape, nested = "nested lists of different lengths", True
            if nested:
                raise ParameterError(
                    f"{hname} must be a number or a 1-D list of numbers; got {shape}. Every value is swept against every other "
                    "hyper-parameter already (a Cartesian product), so give the distinct "
                    f"values as a flat list, e.g. {hname}=numpy.ravel(values), or sweep "
                    "another hyper-parameter through hyper={...}."
                )
        try:
            values = [raw] if scalar else list(raw)
        except TypeError:
            raise ParameterError(
                f"{hname} must be a number or a list of numbers; got a {type(raw).__name__}."
            ) from None
        if not values:
            raise ParameterError(
                f"{hname} needs at least one value; got an empty list. Give a number, e.g. "
                f"{hname}={rule.defaults.get(hname, 0.01)}."
            )
        floats = []
        for v in values:
            if isinstance(v, (complex, np.complexfloating)) or (
                isinstance(v, np.ndarray) and np.iscomplexobj(v)
            ):
                raise ParameterError(
                    f"{hname} must be a real number; got the complex value {v!r}. Use its "
                    "real part or abs()."
                )
            try:
                if isinstance(v, (bool, np.bool_)):
                    raise TypeError
                x = float(v)
            except (TypeError, ValueError):
                raise ParameterError(
                    f"{hname} must be a number; got {v!r}. Write it as a number, e.g. "
                    f"{hname}={rule.defaults.get(hname, 0.01)}, not as text."
                ) from None
            bound = rule.bounds.get(hname)
            if not math.isfinite(x) or (bound is not None and not bound.contains(x)):
                allowed = bound.text() if bound is not None else "finite"
                raise ParameterError(
                    f"{hname} = {v!r} is out of range for {rule.title}; it must lie in {allowed}."
                    + (" A learning rate must be positive." if hname == "learning_rate" else "")
                )
            floats.append(x)
        out[hname] = floats
    return out
