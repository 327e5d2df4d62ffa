"""Settings: exact JSON round trip, rebuild, and clear errors for bad records."""

from __future__ import annotations

import json
import warnings

import jax.numpy as jnp
import numpy as np
import pytest

from basinview.core import (
    FingerprintWarning,
    Problem,
    Settings,
    SettingsError,
    axes_plane,
    compute_view,
    descend,
    evaluate_surface,
    random_plane,
    random_starts,
    record_settings,
)

from .conftest import himmelblau


@pytest.fixture(scope="module")
def recorded():
    prob = Problem(himmelblau, {"x": 0.0, "y": 0.0})
    plane = axes_plane(prob, "x", "y")
    starts = random_starts(prob, 6, scale=3.0, seed=2)
    runs = descend(
        prob,
        starts,
        optimizer="momentum",
        learning_rate=[0.001, 0.003],
        hyper={"momentum": [0.5, 0.9]},
        steps=150,
        plane=plane,
    )
    settings = record_settings(
        prob, plane=plane, span=5.0, resolution=41, starts=starts, runs=runs, note="first look"
    )
    return prob, plane, starts, runs, settings


def test_exact_round_trip(recorded, tmp_path):
    prob, *_, settings = recorded
    again = Settings.from_json(settings.to_json())
    assert again == settings
    assert again.to_json() == settings.to_json()
    path = settings.save(tmp_path / "view.json")
    assert Settings.load(path, problem=prob) == settings
    assert settings.optimizer == "momentum"
    assert settings.learning_rate == (0.001, 0.003)
    assert settings.hyper == {"momentum": (0.5, 0.9)}
    assert settings.loss_name.endswith("himmelblau")
    assert set(settings.versions) >= {"basinview", "jax", "numpy", "optax", "python"}


def test_rebuilding_the_view_reproduces_the_runs(recorded):
    prob, plane, starts, runs, settings = recorded
    view = compute_view(prob, Settings.from_json(settings.to_json()))
    np.testing.assert_array_equal(view.runs.losses, runs.losses)
    np.testing.assert_array_equal(view.starts.points, starts.points)
    surface = evaluate_surface(prob, plane, span=5.0, resolution=41)
    np.testing.assert_array_equal(view.surface.loss, surface.loss)


def test_random_plane_round_trip():
    prob = Problem(lambda p: jnp.sum(p["w"] ** 2) + p["b"] ** 2, {"w": jnp.ones((3, 2)), "b": 0.5})
    plane = random_plane(prob, seed=9, normalise="layer", zero_bias=False)
    starts = random_starts(prob, 2, seed=1)
    runs = descend(prob, starts, steps=5, plane=plane)
    settings = record_settings(
        prob, plane=plane, span=(1.0, 2.0), resolution=(5, 7), starts=starts, runs=runs
    )
    view = compute_view(prob, Settings.from_json(settings.to_json()))
    np.testing.assert_array_equal(view.plane.d1, plane.d1)
    np.testing.assert_array_equal(view.plane.d2, plane.d2)
    assert view.surface.loss.shape == (7, 5)


def test_other_data_warns(recorded):
    _, _, _, _, settings = recorded
    other = Problem(himmelblau, {"x": 1.0, "y": 0.0})
    with pytest.warns(FingerprintWarning, match="other data or initial parameters"):
        Settings.from_json(settings.to_json(), problem=other)
    same = recorded[0]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        Settings.from_json(settings.to_json(), problem=same)


def _edit(settings, **changes):
    raw = json.loads(settings.to_json())
    raw.update(changes)
    return json.dumps(raw)


@pytest.mark.parametrize(
    ("mutate", "message"),
    [
        (lambda s: s.to_json()[:-40], "truncated"),
        (lambda s: "", "not valid JSON"),
        (lambda s: "[1, 2]", "must be an object"),
        (lambda s: _edit(s, schema=99), "newer basinview"),
        (lambda s: _edit(s, schema="1"), "schema"),
        (lambda s: _edit(s, steps=-4), "steps"),
        (lambda s: _edit(s, steps=True), "steps"),
        (lambda s: _edit(s, learning_rate=[]), "learning_rate"),
        (lambda s: _edit(s, learning_rate=["0.1"]), "learning_rate"),
        (lambda s: _edit(s, resolution=[10**6, 3]), "resolution"),
        (lambda s: _edit(s, span=[[1, 0], [0, 1]]), "span"),
        (lambda s: _edit(s, extra_field=1), "unknown fields"),
        (lambda s: _edit(s, plane={"x": "a"}), "kind"),
        (lambda s: _edit(s, batch_size=0), "batch_size"),
        (lambda s: s.to_json().replace('"seed"', '"seed": 1, "seed"', 1), "repeats the key"),
        (lambda s: s.to_json().replace("0.001", "NaN", 1), "NaN"),
        (lambda s: b"\xff\xfe", "UTF-8"),
    ],
)
def test_malformed_settings_are_clear_errors(recorded, mutate, message):
    settings = recorded[-1]
    with pytest.raises(SettingsError, match=message):
        Settings.from_json(mutate(settings))


def test_missing_field_is_named(recorded):
    raw = json.loads(recorded[-1].to_json())
    del raw["optimizer"]
    with pytest.raises(SettingsError, match="lacks the fields.*optimizer"):
        Settings.from_json(json.dumps(raw))


def test_load_of_a_missing_file_is_explained(tmp_path):
    with pytest.raises(SettingsError, match="no settings file"):
        Settings.load(tmp_path / "missing.json")


def test_save_refuses_other_suffixes(recorded, tmp_path):
    with pytest.raises(SettingsError, match=r"end in \.json"):
        recorded[-1].save(tmp_path / "view.pkl")
    assert not (tmp_path / "view.pkl").exists()
