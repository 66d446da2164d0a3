"""Detected (ghost) collisions: the contact kernel against a brute-force count, a ballistic gas
against kinetic theory, and a run in which two sets settle through each other at constant
relative velocity.

Outside references: scipy.spatial.cKDTree (periodic candidate pairs) with the contact time as
the smaller root of the quadratic |d0 + s Δd|² = R² solved by numpy (Sundaram & Collins 1996);
the collision rate of a gas of uniformly distributed spheres, n_a n_b πR² ⟨|v_a − v_b|⟩, with
the mean relative speed of two Maxwellian gases √(8(σ_a² + σ_b²)/π) (kinetic theory of gases,
e.g. Chapman & Cowling 1970, ch. 5; common practice); the exact solution v(t) = τ_p g (1 −
e^{−t/τ_p}) of dv/dt = −v/τ_p + g for particles released at rest (Maxey & Riley 1983 without
the fluid).
"""
from __future__ import annotations

import math

import h5py
import numpy as np
import pytest
from scipy.spatial import cKDTree

from eddybox.particles.pairs import contact_search_radius, ghost_collisions
from eddybox.solver.run.simulation import Simulation
from eddybox.solver.study.particle_readers import collision_table

L = 2.0 * np.pi


def brute_contacts(x, d, radius, box, xb=None, db=None) -> int:
    """Pairs separated by more than R at the start of the step whose straight paths come within
    R: the smaller root s of |d0 + s Δd|² = R² lies in [0, 1] (numpy, every candidate pair
    found by a periodic cKDTree)."""
    same = xb is None
    if same:
        xb, db = x, d
    reach = np.linalg.norm(d, axis=1).max() + np.linalg.norm(db, axis=1).max()
    tree = cKDTree(np.mod(xb, box), boxsize=box)
    n = 0
    for i, js in enumerate(tree.query_ball_point(np.mod(x, box), radius + reach + 1e-9)):
        js = np.asarray(js, dtype=int)
        if same:
            js = js[js > i]
        if js.size == 0:
            continue
        d0 = xb[js] - x[i]
        d0 -= box * np.round(d0 / box)
        e = db[js] - d[i]
        a, b, c = (e * e).sum(1), (d0 * e).sum(1), (d0 * d0).sum(1) - radius**2
        disc = b * b - a * c
        with np.errstate(invalid="ignore", divide="ignore"):
            s = (-b - np.sqrt(disc)) / a
        n += int(np.sum((c > 0) & (b < 0) & (disc >= 0) & (s <= 1.0)))
    return n


@pytest.mark.parametrize("n,radius,scale", [(3000, 0.12, 0.06), (20000, 0.05, 0.02),
                                            (400, 1.0, 0.3)])  # the last: 2 cells, all pairs
def test_contacts_equal_a_brute_force_count(n, radius, scale):
    rng = np.random.default_rng(n)
    x = rng.random((n, 3)) * L
    d = rng.standard_normal((n, 3)) * scale
    xb = rng.random((n // 2, 3)) * L
    db = rng.standard_normal((n // 2, 3)) * scale * 2
    same = ghost_collisions(x, d, L, radius)
    cross = ghost_collisions(x, d, L, radius, xb, db)
    assert same == brute_contacts(x, d, radius, L) and same > 20
    assert cross == brute_contacts(x, d, radius, L, xb, db) and cross > 20
    # any candidate radius at least R + half the longest steps gives the same count
    r_wide = 1.5 * contact_search_radius(radius, np.abs(d).max() * 2, np.abs(d).max() * 2)
    if r_wide < L / 2:
        assert ghost_collisions(x, d, L, radius, r_search=r_wide) == same


def test_contact_cases_by_hand():
    def one(x0, d0, x1, d1, r=0.1):
        return ghost_collisions(np.array([x0, x1], float), np.array([d0, d1], float), L, r)
    # head-on, meeting inside the step: one contact
    assert one([1.0, 1, 1], [0.2, 0, 0], [1.5, 1, 1], [-0.2, 0, 0]) == 1
    # passing through each other within the step (in and out again): still one contact
    assert one([1.0, 1, 1], [0.6, 0, 0], [1.5, 1, 1], [-0.6, 0, 0]) == 1
    # missing by more than R
    assert one([1.0, 1, 1], [0.6, 0, 0], [1.5, 1.25, 1], [-0.6, 0, 0]) == 0
    # grazing at 0.9 R
    assert one([1.0, 1, 1], [0.6, 0, 0], [1.5, 1.09, 1], [-0.6, 0, 0]) == 1
    # stopping short: closest at the end of the step, 0.15 apart
    assert one([1.0, 1, 1], [0.1, 0, 0], [1.5, 1, 1], [-0.25, 0, 0]) == 0
    # overlapping at the start: no new contact; separating pair: none
    assert one([1.0, 1, 1], [0.01, 0, 0], [1.05, 1, 1], [-0.01, 0, 0]) == 0
    assert one([1.0, 1, 1], [-0.2, 0, 0], [1.5, 1, 1], [0.2, 0, 0]) == 0
    # across the periodic face x = 0 = L
    assert one([0.02, 1, 1], [-0.1, 0, 0], [L - 0.2, 1, 1], [0.1, 0, 0]) == 1
    # reaching R exactly at the end of a step (binary-exact numbers) is one contact, and the
    # next step, starting at R, is not another
    assert one([1.0, 1, 1], [0.25, 0, 0], [1.5, 1, 1], [-0.125, 0, 0], r=0.125) == 1
    assert one([1.25, 1, 1], [0.25, 0, 0], [1.375, 1, 1], [-0.125, 0, 0], r=0.125) == 0


def test_ballistic_gas_rate_equals_kinetic_theory():
    # two Maxwellian gases on straight lines in the periodic box, counted step by step
    rng = np.random.default_rng(11)
    na, nb, sa, sb, radius, dt, steps = 3000, 2000, 1.0, 0.5, 0.05, 0.01, 150
    xa, xb = rng.random((na, 3)) * L, rng.random((nb, 3)) * L
    va, vb = rng.standard_normal((na, 3)) * sa, rng.standard_normal((nb, 3)) * sb
    same = cross = 0
    for _ in range(steps):
        same += ghost_collisions(xa, va * dt, L, radius)
        cross += ghost_collisions(xa, va * dt, L, radius, xb, vb * dt)
        xa, xb = np.mod(xa + va * dt, L), np.mod(xb + vb * dt, L)
    t, vol = steps * dt, L**3
    # kinetic theory: rate per unit volume n_a n_b pi R^2 <|v_a - v_b|>, and (N(N - 1)/2)/V^2
    # pairs per unit volume within a set
    rel = lambda s2: math.sqrt(8.0 * s2 / math.pi)  # noqa: E731 - mean relative speed
    want_cross = na * nb / vol * math.pi * radius**2 * rel(sa**2 + sb**2) * t
    want_same = na * (na - 1) / 2.0 / vol * math.pi * radius**2 * rel(2 * sa**2) * t
    for got, want in ((same, want_same), (cross, want_cross)):
        assert want > 400
        assert abs(got - want) < 4.0 * math.sqrt(want), (got, want)  # Poisson counts


def _settling_run(tmp_path, **stats):
    """Two sets released at rest in a fluid at rest under gravity: each approaches its own
    terminal velocity tau_p g, so they pass through each other at a constant relative speed."""
    from tests.conftest import make_config

    cfg = make_config(
        tmp_path, grid={"points": 16}, fluid={"viscosity": 0.05, "initial": {"kind": "rest"},
                                              "frozen": True},
        time={"scheme": "rk4", "cfl": 0.5, "end": 3.0, "max_dt": 0.01},
        particles={"release": 0.0, "interpolation": 4, "gravity": [0.0, 0.0, -2.0],
                   "sets": [{"name": "slow", "tau_p": 0.1, "count": 3000},
                            {"name": "fast", "tau_p": 0.5, "count": 3000}]},
        stats={"fluid": {"every": None}, "spectra": {"every": None},
               "collisions": {"every": 0.1, "radius": 0.08, "units": "box", "cross": True,
                              "start": 1.0, "shell": 0.5, **stats}})
    sim = Simulation(cfg, overwrite=True, quiet=True)
    assert sim.run() == 0
    return sim.out


def test_sets_settling_through_each_other_collide_at_the_kinetic_rate(tmp_path):
    out = _settling_run(tmp_path)
    g, r, ta, tb = 2.0, 0.08, 0.1, 0.5
    with h5py.File(out + "/collisions.h5", "r") as f:
        cross = f["collisions/slow__fast"]
        counts, interval, time = (cross[k][...] for k in ("collisions", "interval", "time"))
        assert f["collisions/slow__slow/collisions"][...].sum() == 0  # no relative motion
        assert f["collisions/fast__fast/collisions"][...].sum() == 0
        assert cross.attrs["radius"] == r and cross.attrs["pairs"] == 3000.0 * 3000.0
        assert np.sum(interval) == pytest.approx(3.0)  # every step counted once
    # exact relative speed g |tau_a (1 - e^-t/tau_a) - tau_b (1 - e^-t/tau_b)|, integrated over
    # each sample's interval (scipy.integrate.quad)
    from scipy.integrate import quad

    speed = lambda t: g * abs(ta * (1 - math.exp(-t / ta)) - tb * (1 - math.exp(-t / tb)))  # noqa: E731
    rate = 3000.0 * 3000.0 / L**3 * math.pi * r * r
    want = np.array([rate * quad(speed, t - dt, t)[0] for t, dt in zip(time, interval)])
    assert want.sum() > 800
    assert abs(counts.sum() - want.sum()) < 4.0 * math.sqrt(want.sum()), (counts.sum(), want.sum())
    # the reader's pooled kernel over the window t >= 1 (the fast set is still 13 % short of
    # its terminal velocity there) against pi R^2 times the mean relative speed of the window
    row = collision_table([out])
    c = row.columns
    k = [i for i in range(len(row)) if c["set_a"][i] == "slow" and c["set_b"][i] == "fast"][0]
    window = time >= 1.0 - 1e-9
    mean_speed = sum(quad(speed, t - dt, t)[0] for t, dt in zip(time[window], interval[window])) \
        / interval[window].sum()
    kinetic = math.pi * r * r * mean_speed
    assert abs(c["detected"][k] - kinetic) < 4 * c["detected_err"][k] + 0.02 * kinetic
    # the kinematic kernel in the shell at R: g = 1 and <|w_r|> = |dv|/2 at every r for a
    # uniform beam, 2 pi R^2 |dv| / 2 = pi R^2 |dv| as well (so a wide shell has no bias)
    assert abs(c["kinematic"][k] - kinetic) < 4 * c["kinematic_err"][k] + 0.02 * kinetic
    assert abs(c["ratio"][k] - 1) < 4 * c["ratio_err"][k] + 0.02


def test_check_warns_of_a_radius_that_would_not_fit_at_the_release(config_factory):
    # the predicted eta puts 100 eta beyond a quarter of the box: check warns (the run would
    # refuse at the release, where eta is measured); 1 eta does not
    from eddybox.solver.run.config_warnings import config_warnings

    def cfg(radius):
        return config_factory(forcing={"kind": "ou", "band": 2.0, "dissipation": 0.1},
                              particles={"release": 0.1, "sets": [
                                  {"name": "a", "tau_p": 0.0, "count": 10}]},
                              stats={"collisions": {"every": 0.1, "radius": radius}})
    assert any("stats.collisions.radius = 100 eta" in w for w in config_warnings(cfg(100.0)))
    assert not any("collisions" in w for w in config_warnings(cfg(1.0)))
