"""Fluid core against exact solutions, handbook definitions and numpy.fft."""
import numpy as np
import pytest

from eddybox.solver.fluid import fluid_stats
from eddybox.solver.run.simulation import Simulation


def build(cfgf, **kw):
    return Simulation(cfgf(**kw), overwrite=True, quiet=True)


def test_abc_flow_is_an_exact_decaying_solution(config_factory):
    # ABC flow is a Beltrami field: u x omega = 0 and E(t) = E0 exp(-2 nu k^2 t) exactly
    # (exact solution of Navier-Stokes; Dombre et al. 1986 J. Fluid Mech. 167)
    nu = 0.1
    sim = build(config_factory, fluid={"viscosity": nu, "initial": {"kind": "abc"}},
                time={"scheme": "rk4", "cfl": 0.5, "end": 1.0, "max_dt": 0.05})
    out = np.zeros_like(sim.uh)
    sim.nl.evaluate(sim.uh.copy(), out, 0.0, 1.0)
    assert np.abs(out).max() < 1e-13
    e0 = sim.energy()
    assert e0 == pytest.approx(1.5, rel=1e-12)  # (A^2 + B^2 + C^2)/2 with A = B = C = 1
    assert sim.run() == 0
    assert abs(sim.energy() / (e0 * np.exp(-2 * nu * sim.t)) - 1) < 1e-9


def test_two_dimensional_taylor_green_decays_exactly(config_factory):
    # u = (sin x cos y, -cos x sin y, 0) is an exact solution: the nonlinear term is a pure
    # gradient, so E = E0 exp(-2 nu k^2 t) with k^2 = 2 (Taylor & Green 1937; Pope 2000 ex. 
    # "common practice")
    nu = 0.05
    sim = build(config_factory, fluid={"viscosity": nu, "initial": {"kind": "rest"}},
                time={"scheme": "rk3", "cfl": 0.5, "end": 1.0, "max_dt": 0.05})
    n = sim.layout.n
    x = np.arange(n) * 2 * np.pi / n
    X, Y, Z = np.meshgrid(x, x, x, indexing="ij")
    u = np.stack([np.sin(X) * np.cos(Y), -np.cos(X) * np.sin(Y), 0 * X])
    sim.uh[...] = np.fft.rfftn(u, axes=(1, 2, 3)) / n**3
    e0 = sim.energy()
    assert e0 == pytest.approx(0.25, rel=1e-12)
    sim.run()
    assert abs(sim.energy() / (e0 * np.exp(-2 * nu * 2 * sim.t)) - 1) < 1e-9


def test_taylor_green_initial_dissipation_is_six_nu_e(config_factory):
    # all modes of the 3-D Taylor-Green field sit at |k|^2 = 3: eps = 2 nu k^2 E = 6 nu E
    sim = build(config_factory, fluid={"viscosity": 0.02, "initial": {"kind": "taylor-green"}})
    st = sim.spectral_stats()
    assert st["energy"] == pytest.approx(0.125, rel=1e-12)  # <u^2+v^2>/2 = 1/8 for U0 = 1
    assert st["dissipation"] == pytest.approx(6 * 0.02 * st["energy"], rel=1e-12)


def test_transforms_parseval_and_spectrum(config_factory):
    sim = build(config_factory, grid={"points": 24},
                fluid={"viscosity": 0.02, "initial": {"kind": "spectrum", "energy": 0.7, "peak": 3}})
    lay = sim.layout
    rng = np.random.default_rng(3)
    a = rng.standard_normal(lay.phys_shape)
    spec = np.empty(lay.spec_shape, complex)
    lay.forward(a.copy(), spec)
    np.testing.assert_allclose(spec, np.fft.rfftn(a), rtol=0, atol=1e-11)  # numpy.fft reference
    back = np.empty(lay.phys_shape)
    lay.inverse(spec.copy(), back)
    np.testing.assert_allclose(back * lay.norm, a, atol=1e-13)
    # Parseval (handbook identity): physical-space energy equals the spectral energy
    u = sim.nl.to_physical(sim.uh)
    e_phys = 0.5 * np.mean(np.sum(u**2, axis=0))
    assert sim.energy() == pytest.approx(0.7, rel=1e-12)
    assert e_phys == pytest.approx(sim.energy(), rel=1e-12)
    # the shell spectrum sums to the energy; the field is solenoidal and real (numpy irfftn)
    st = sim.spectral_stats()
    assert st["spectrum"].sum() == pytest.approx(st["energy"], rel=1e-12)
    ref = np.fft.irfftn(sim.uh * lay.n**3, s=lay.phys_shape, axes=(1, 2, 3))
    np.testing.assert_allclose(u, ref, atol=1e-12)
    der = fluid_stats.derivative_statistics(sim.uh, lay, np.empty(lay.phys_shape))
    assert der["divergence_max"] < 1e-12


@pytest.mark.parametrize("scheme,order", [("rk2", 2), ("rk3", 3), ("rk4", 4)])
def test_time_step_convergence_order(config_factory, scheme, order):
    # the global error of an order-p scheme falls as dt^p (common practice)
    def final(s, dt):
        sim = build(config_factory, fluid={"viscosity": 0.02, "initial": {"kind": "spectrum", "energy": 0.5}},
                    time={"scheme": s, "cfl": 0.5, "end": 0.4, "max_dt": dt})
        sim.run()
        assert sim.t == pytest.approx(0.4, abs=1e-12)
        return sim.uh.copy()

    ref = final("rk4", 0.0025)
    e1 = np.abs(final(scheme, 0.02) - ref).max()
    e2 = np.abs(final(scheme, 0.01) - ref).max()
    assert np.log2(e1 / e2) == pytest.approx(order, abs=0.35)


def _budget_run(config_factory, forcing, end=1.0):
    sim = build(config_factory, grid={"points": 16}, seed=11,
                fluid={"viscosity": 0.02, "initial": {"kind": "spectrum", "energy": 0.5, "peak": 2}},
                forcing=forcing, time={"scheme": "rk4", "cfl": 0.3, "end": end, "max_dt": 0.01},
                stats={"fluid": {"every": 0}, "spectra": {"every": None}})
    sim.run()
    import h5py

    with h5py.File(sim.out + "/fluid.h5") as f:
        s = {k: f["series"][k][...] for k in ("time", "energy", "dissipation", "injection")}
    return sim, s


@pytest.mark.parametrize("forcing", [
    {"kind": "none"},
    {"kind": "ou", "band": 2.0, "timescale": 0.5, "dissipation": 0.1},
    # during a calibration the variance changes between steps; the recorded power is still
    # the work the forcing did in each step
    {"kind": "ou", "band": 2.0, "timescale": 0.5, "dissipation": 0.1, "calibrate": 0.6},
    {"kind": "reinject", "band": 2.0, "mode": "power", "dissipation": 0.1},
    {"kind": "linear", "dissipation": 0.1},
])
def test_energy_budget(config_factory, forcing):
    # dE/dt = P - eps (Pope 2000, eq. 6.6 for homogeneous turbulence with forcing):
    # E(T) - E(0) = int (P - eps) dt; injection is the mean power of each step, the dissipation
    # is integrated by the trapezoidal rule, whose error is O(dt^2)
    sim, s = _budget_run(config_factory, forcing)
    t = s["time"]
    dt = np.diff(t)
    lhs = s["energy"][-1] - s["energy"][0]
    rhs = np.sum(s["injection"][1:] * dt) - np.sum(0.5 * (s["dissipation"][1:] + s["dissipation"][:-1]) * dt)
    scale = np.sum(0.5 * (s["dissipation"][1:] + s["dissipation"][:-1]) * dt)
    assert abs(lhs - rhs) < 2e-3 * scale
    if forcing["kind"] != "none":
        assert np.mean(s["injection"][1:]) > 0


def test_reinject_energy_mode_holds_energy(config_factory):
    # deterministic re-injection restores the energy after every step; in a stationary state the
    # mean injection equals the mean dissipation (energy balance, Pope 2000 eq. 6.6)
    sim, s = _budget_run(config_factory, {"kind": "reinject", "band": 2.0, "mode": "energy"}, end=6.0)
    assert np.max(np.abs(s["energy"] - s["energy"][0])) < 1e-9 * s["energy"][0]
    late = s["time"] > 2.0
    assert np.mean(s["injection"][late]) == pytest.approx(np.mean(s["dissipation"][late]), rel=0.02)


def test_ou_process_statistics(config_factory):
    # exact OU update: stationary variance sigma^2 and autocorrelation exp(-tau/T_F)
    # (Eswaran & Pope 1988; Gillespie 1996 Phys. Rev. E 54 for the exact update); checked with
    # scipy.stats at a fixed seed
    from scipy import stats

    from eddybox.forcing import make_forcing

    sim = build(config_factory)
    T, dt = 0.5, 0.05
    section = config_factory(forcing={"kind": "ou", "band": 2.0, "timescale": T,
                                      "dissipation": 0.2}).forcing
    f = make_forcing(section, sim.layout, seed=5)
    samples = []
    for _ in range(4000):
        f.begin_step(sim, dt)
        f.end_step(sim, dt)
        samples.append(f.b[:, 0].copy())
    b = np.array(samples)  # (steps, modes)
    x = np.concatenate([b.real.ravel(), b.imag.ravel()]) / np.sqrt(f.sigma2)
    assert stats.kstest(x[::20], "norm").pvalue > 0.01
    var = np.var(np.concatenate([b.real, b.imag], axis=1))
    assert var == pytest.approx(f.sigma2, rel=0.05)
    re = b.real
    for lag in (1, 5, 10):
        rho = np.mean(re[lag:] * re[:-lag]) / np.mean(re * re)
        assert rho == pytest.approx(np.exp(-lag * dt / T), abs=0.03)
    # the published relation eps* = 4 N_F sigma^2 T_F (Eswaran & Pope 1988)
    assert f.target_dissipation() == pytest.approx(0.2, rel=1e-12)


def test_divergence_stays_at_roundoff_in_forced_run(config_factory):
    sim, s = _budget_run(config_factory, {"kind": "ou", "band": 2.0, "timescale": 0.5, "dissipation": 0.1})
    der = fluid_stats.derivative_statistics(sim.uh, sim.layout, np.empty(sim.layout.phys_shape))
    assert der["divergence_max"] < 1e-11


def test_rk4_step_matches_straightforward_numpy_step(config_factory):
    # the benchmark's numpy.fft reference step (independent implementation with numpy.fft and
    # temporaries) and the in-place kernels take the same RK4 step
    from eddybox.solver.study.bench import numpy_reference_step

    sim = build(config_factory, grid={"points": 16},
                fluid={"viscosity": 0.02, "initial": {"kind": "spectrum", "energy": 0.5}},
                time={"scheme": "rk4", "cfl": 0.5, "end": 1.0, "max_dt": 0.01})
    u0 = sim.uh.copy()
    sim.advance()
    ref = numpy_reference_step(u0, sim.layout.kx, sim.layout.ky, sim.layout.kz, sim.nu, sim.dt, 16)
    np.testing.assert_allclose(sim.uh, ref, rtol=0, atol=1e-13 * np.abs(u0).max())


def test_forced_48_cube_reaches_stationary_state_with_negative_skewness(config_factory):
    # forced isotropic turbulence settles to a statistically stationary state whose
    # velocity-derivative skewness is about -0.5 (Pope 2000, sec. 6.5; common practice);
    # stationarity judged by the MSER-5 truncation rule (eddybox.solver.estimators.timeseries)
    import h5py

    from eddybox.solver.estimators.timeseries import stationary_summary

    sim = build(config_factory, grid={"points": 48}, seed=1,
                fluid={"viscosity": 0.015, "initial": {"kind": "spectrum", "energy": 0.3, "peak": 2}},
                forcing={"kind": "ou", "band": 2.0, "timescale": 0.3, "dissipation": 0.1},
                time={"scheme": "rk4", "cfl": 0.7, "end": 12.0},
                stats={"fluid": {"every": 0.1}, "spectra": {"every": None}})
    sim.run()
    with h5py.File(sim.out + "/fluid.h5") as f:
        t, e, s = (f["series"][k][...] for k in ("time", "energy", "skewness"))
    se = stationary_summary(t, e)
    assert se.start_time < 6.0
    late = t > max(se.start_time, 4.0)  # the skewness itself needs a few eddy times to develop
    first, second = np.array_split(e[late], 2)
    assert abs(first.mean() / second.mean() - 1) < 0.15
    assert -0.65 < np.mean(s[late]) < -0.35


@pytest.mark.parametrize("scheme", ["rk4", "rk3", "rk2"])
def test_time_step_allocates_nothing_grid_sized(config_factory, scheme):
    # the hot loop works in place: the memory traced during a step is a few small bookkeeping
    # arrays, far below one grid-sized array (tracemalloc sees numpy allocations)
    import tracemalloc

    sim = build(config_factory, grid={"points": 32},
                fluid={"viscosity": 0.02, "initial": {"kind": "spectrum", "energy": 0.5}},
                forcing={"kind": "ou", "band": 2.0, "timescale": 0.5, "dissipation": 0.1},
                time={"scheme": scheme, "cfl": 0.4, "end": 10.0})
    sim.advance()
    tracemalloc.start()
    for _ in range(3):
        sim.advance()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert peak < 16 * 1024 < sim.uh[0].nbytes / 16, peak  # one 32^3 component is 272 KiB


def test_numpy_fallback_transforms_equal_pyfftw():
    # the numpy.fft fallback (used when pyFFTW is missing) gives the same unnormalised transforms
    from eddybox.solver.fluid.serial_layout import SerialLayout

    a = SerialLayout(12, 2 * np.pi, threads=1, backend="numpy")
    b = SerialLayout(12, 2 * np.pi, threads=1)
    x = np.random.default_rng(1).standard_normal(a.phys_shape)
    sa, sb = np.empty(a.spec_shape, complex), np.empty(b.spec_shape, complex)
    a.forward(x.copy(), sa)
    b.forward(x.copy(), sb)
    np.testing.assert_allclose(sa, sb, atol=1e-11)
    ya, yb = np.empty(a.phys_shape), np.empty(b.phys_shape)
    a.inverse(sa.copy(), ya)
    b.inverse(sb.copy(), yb)
    np.testing.assert_allclose(ya, yb, atol=1e-11)
