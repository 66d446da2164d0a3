"""Particles inside the run loop, against exact solutions and reference integrators."""
import h5py
import numpy as np
import pytest
from scipy import integrate, stats

from eddybox.solver.run.simulation import Simulation


def _sim(cfgf, **kw):
    return Simulation(cfgf(**kw), overwrite=True, quiet=True)


def _tg(x):
    return np.stack([np.sin(x[..., 0]) * np.cos(x[..., 1]) * np.cos(x[..., 2]),
                     -np.cos(x[..., 0]) * np.sin(x[..., 1]) * np.cos(x[..., 2]),
                     np.zeros(x.shape[:-1])], axis=-1)


def test_frozen_taylor_green_trajectories_match_solve_ivp(config_factory):
    # reference: scipy.integrate.solve_ivp (DOP853) on the analytic Taylor-Green field with the
    # same equations dx/dt = v, dv/dt = (u(x) - v)/tau_p (Maxey & Riley 1983, Stokes drag)
    sim = _sim(config_factory, grid={"points": 32},
               fluid={"viscosity": 0.05, "initial": {"kind": "taylor-green"}, "frozen": True},
               time={"scheme": "rk4", "cfl": 0.5, "end": 1.0, "max_dt": 0.002},
               particles={"release": 0.0, "interpolation": 8,
                          "sets": [{"name": "tracers", "tau_p": 0.0, "count": 12},
                                   {"name": "heavy", "tau_p": 0.3, "count": 12}]})
    start = {s.name: (s.x.copy(), s.v.copy()) for s in sim.particles.sets}
    assert sim.run() == 0
    for s in sim.particles.sets:
        x0, v0 = start[s.name]
        for i in range(len(x0)):
            if s.tau_p == 0:
                sol = integrate.solve_ivp(lambda t, y: _tg(y), (0, 1.0), x0[i], method="DOP853",
                                          rtol=1e-11, atol=1e-12)
                xe = sol.y[:, -1]
            else:
                def f(t, y, tau=s.tau_p):
                    return np.concatenate([y[3:], (_tg(y[:3]) - y[3:]) / tau])
                sol = integrate.solve_ivp(f, (0, 1.0), np.concatenate([x0[i], v0[i]]), method="DOP853",
                                          rtol=1e-11, atol=1e-12)
                xe = sol.y[:3, -1]
            d = (s.x[i] - xe + np.pi) % (2 * np.pi) - np.pi
            assert np.abs(d).max() < 1e-4, (s.name, i, d)


def test_settling_in_fluid_at_rest_reaches_stokes_terminal_velocity(config_factory):
    # Stokes terminal velocity v = tau_p g (any fluid-mechanics handbook)
    g = [0.0, 0.3, -1.0]
    sim = _sim(config_factory, fluid={"viscosity": 0.05, "initial": {"kind": "rest"}, "frozen": True},
               time={"scheme": "rk4", "cfl": 0.5, "end": 6.0, "max_dt": 0.05},
               particles={"release": 0.0, "gravity": g,
                          "sets": [{"name": "drops", "tau_p": 0.2, "count": 50}]})
    sim.run()
    s = sim.particles.sets[0]
    np.testing.assert_allclose(s.v, np.broadcast_to(0.2 * np.array(g), s.v.shape), atol=1e-6)
    assert np.all((s.x >= 0) & (s.x < 2 * np.pi))  # wrapped after settling through the box
    assert len(s.x) == 50 and len(np.unique(s.ids)) == 50


def test_tracers_stay_uniform_and_stokes_conversion_recorded(config_factory, tmp_path):
    # incompressible flow keeps tracers uniformly distributed (Liouville / continuity);
    # checked by a chi-square test on cell counts (scipy.stats.chisquare)
    sim = _sim(config_factory, grid={"points": 16}, seed=5,
               fluid={"viscosity": 0.03, "initial": {"kind": "spectrum", "energy": 0.5, "peak": 2}},
               forcing={"kind": "ou", "band": 2.0, "timescale": 0.5, "dissipation": 0.1},
               time={"scheme": "rk4", "cfl": 0.6, "end": 2.0},
               particles={"release": 0.5, "interpolation": 4,
                          "sets": [{"name": "tracers", "stokes": 0.0, "count": 16000},
                                   {"name": "heavy", "stokes": 2.0, "count": 1000}]},
               stats={"fluid": {"every": 0.1}, "spectra": {"every": None},
                      "particles": {"every": 1.0, "max_count": 100}})
    sim.run()
    tr = sim.particles.sets[0]
    cells = np.floor(tr.x / (2 * np.pi) * 4).astype(int).clip(0, 3)
    counts = np.bincount(cells[:, 0] * 16 + cells[:, 1] * 4 + cells[:, 2], minlength=64)
    assert stats.chisquare(counts).pvalue > 1e-3
    with h5py.File(sim.out + "/particles.h5") as f:
        heavy = f["sets/heavy"]
        tau_eta = sim.particles.release_scales["tau_eta"]
        assert heavy.attrs["tau_p"] == pytest.approx(2.0 * tau_eta, rel=1e-12)
        assert heavy.attrs["stokes"] == 2.0 and heavy.attrs["count"] == 1000
        snap = heavy["snapshots/position"]
        assert snap.shape == (3, 100, 3)  # at the release (0.5), then t = 1.0 and 2.0
        np.testing.assert_allclose(heavy["snapshots/time"][...], [sim.particles.release_scales["time"], 1.0, 2.0],
                                   atol=0.1)  # first step at or after each due time
        ids = heavy["snapshots/ids"][...]
        assert np.array_equal(ids, np.sort(ids))
        for k in ("kinetic_energy", "slip_velocity", "settling_velocity", "q_particles", "q_volume"):
            v = heavy[f"series/{k}"][...]
            assert v.shape[0] >= 15 and np.all(np.isfinite(v))
        # the volume average of Q = (||Omega||^2 - ||S||^2)/2 vanishes in homogeneous flow
        assert np.abs(heavy["series/q_volume"][...]).max() < 1e-10
    # release scales: tau_eta = sqrt(nu/eps) (Pope 2000)
    eps = sim.particles.release_scales["dissipation"]
    assert tau_eta == pytest.approx(np.sqrt(0.03 / eps), rel=1e-12)


def test_tiny_response_time_is_stable_and_tends_to_tracers(config_factory):
    # tau_p << dt: the exponential integrator stays bounded and reproduces tracer motion
    kw = dict(fluid={"viscosity": 0.05, "initial": {"kind": "taylor-green"}, "frozen": True},
              time={"scheme": "rk4", "cfl": 0.5, "end": 1.0, "max_dt": 0.02}, seed=9)
    a = _sim(config_factory, particles={"release": 0.0, "sets": [{"name": "p", "tau_p": 1e-9, "count": 30}]}, **kw)
    a.run()
    b = _sim(config_factory, particles={"release": 0.0, "sets": [{"name": "p", "tau_p": 0.0, "count": 30}]}, **kw)
    b.run()
    assert np.all(np.isfinite(a.particles.sets[0].v))
    np.testing.assert_allclose(a.particles.sets[0].x, b.particles.sets[0].x, atol=1e-7)


def test_physical_units_map_to_stokes_and_froude(config_factory, capsys):
    # Stokes drag: tau_p = rho_p d^2 / (18 mu) (any fluid-mechanics handbook); Kolmogorov scales
    # (nu^3/eps)^(1/4), (nu/eps)^(1/2) (Pope 2000); a 20 um water droplet in air at eps = 0.01
    from eddybox.particles.physical import physical_numbers
    from eddybox.solver.study.check import check_lines

    from eddybox.solver.run.config import PhysicalConfig

    phys = {"viscosity": 1.5e-5, "dissipation": 0.01, "fluid_density": 1.2, "gravity": 9.81}
    num = physical_numbers(10e-6, 1000.0, PhysicalConfig.parse(phys, "particles.physical"))
    tau_p = 1000.0 * (20e-6) ** 2 / (18 * 1.2 * 1.5e-5)
    assert num["tau_p"] == pytest.approx(tau_p, rel=1e-12)
    assert num["stokes"] == pytest.approx(tau_p / np.sqrt(1.5e-5 / 0.01), rel=1e-12)
    assert num["settling_velocity"] == pytest.approx(tau_p * 9.81, rel=1e-12)
    assert num["froude"] == pytest.approx((0.01**3 / 1.5e-5) ** 0.25 / 9.81, rel=1e-12)
    cfg = config_factory(particles={"release": 0.0, "gravity": [0.0, 0.0, -1.0], "physical": phys,
                                    "sets": [{"name": "cloud", "radius": 10e-6, "density": 1000.0, "count": 200},
                                             {"name": "hail", "radius": 1e-3, "density": 900.0, "count": 10}]},
                         fluid={"viscosity": 0.05, "initial": {"kind": "taylor-green"}})
    text = "\n".join(check_lines(cfg))
    assert "St = tau_p/tau_eta" in text and "Fr = a_eta/g" in text
    assert "particle Reynolds number" in text and "set hail" in text  # 2 mm hail breaks the model
    sim = Simulation(cfg, overwrite=True, quiet=True)
    cloud = sim.particles.sets[0]
    tau_eta = sim.particles.release_scales["tau_eta"]
    assert cloud.tau_p == pytest.approx(num["stokes"] * tau_eta, rel=1e-12)
    # gravity along -z with |g| = a_eta(sim) / Fr: the Froude number is matched
    eps = sim.particles.release_scales["dissipation"]
    a_eta = (eps**3 / 0.05) ** 0.25
    np.testing.assert_allclose(cloud.gravity, [0.0, 0.0, -a_eta / num["froude"]], rtol=1e-12)
