"""The Stokes-number shorthand: one set entry with a list of values is one set per value."""
from __future__ import annotations

import pytest

from eddybox.solver.errors import ConfigError
from eddybox.solver.run.config import validate

TWELVE = [0.05, 0.1, 0.2, 0.3, 0.5, 0.7, 1, 1.5, 2, 3, 5, 10]


def test_a_twelve_stokes_study_is_one_entry():
    cfg = validate({"particles": {"release": 1.0, "sets": [
        {"name": "st", "stokes": TWELVE, "count": 5000, "interpolation": 6},
        {"name": "tracers", "tau_p": 0.0}]}})
    sets = cfg.particles.sets
    assert [s.name for s in sets] == [f"st{v:g}" for v in TWELVE] + ["tracers"]
    assert [s.stokes for s in sets[:12]] == [float(v) for v in TWELVE]
    assert all(s.count == 5000 and s.interpolation == 6 and s.tau_p is None for s in sets[:12])
    # the shorthand and the sets written out one by one are the same config (same physics hash)
    longhand = validate({"particles": {"release": 1.0, "sets": [
        {"name": f"st{v:g}", "stokes": v, "count": 5000, "interpolation": 6} for v in TWELVE]
        + [{"name": "tracers", "tau_p": 0.0}]}})
    assert longhand.physics_hash() == cfg.physics_hash()


@pytest.mark.parametrize("key,values,names", [
    ("tau_p", [0.0, 0.05], ["tp0", "tp0.05"]),
    ("radius", [1e-5, 2e-5], ["tp1e-05", "tp2e-05"]),
])
def test_tau_p_and_radius_lists(key, values, names):
    extra = {"density": 1000.0} if key == "radius" else {}
    raw = {"particles": {"sets": [dict({"name": "tp", key: values}, **extra)]}}
    if key == "radius":
        raw["particles"]["physical"] = {}
    cfg = validate(raw)
    assert [s.name for s in cfg.particles.sets] == names
    assert [getattr(s, key) for s in cfg.particles.sets] == values


@pytest.mark.parametrize("sets,needle", [
    ([{"name": "st", "stokes": []}], "particles.sets[0].stokes: an empty list"),
    ([{"name": "st", "stokes": [1, -2]}], "particles.sets[0].stokes[1]"),
    ([{"name": "st", "stokes": [1], "tau_p": [1]}], "only one of stokes, tau_p"),
    ([{"stokes": [1, 2]}], "particles.sets[0].name"),
    ([{"name": "st", "stokes": [1, 1.0]}], "duplicate name 'st1'"),
    ([{"name": "st1", "stokes": 1}, {"name": "st", "stokes": [1, 2]}], "duplicate name 'st1'"),
])
def test_shorthand_mistakes_are_named(sets, needle):
    with pytest.raises(ConfigError) as exc:
        validate({"particles": {"sets": sets}})
    assert needle in str(exc.value)
