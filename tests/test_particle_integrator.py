"""Tests of particles.integrator: ETD2RK stepping of inertial particles and tracers."""

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from eddybox.particles.integrator import (
    etd_coefficients,
    etd_correct,
    etd_predict,
    wrap_periodic,
)
from eddybox.particles.interpolation import interpolate

L = 2.0 * np.pi
NO_GRAVITY = np.zeros(3)


def taylor_green(p):
    """Steady Taylor-Green field u = (sin x cos y cos z, -cos x sin y cos z, 0)
    (Taylor & Green 1937, Proc. R. Soc. A 158, 499), divergence free, |u_i| <= 1."""
    x, y, z = p[..., 0], p[..., 1], p[..., 2]
    return np.stack([np.sin(x) * np.cos(y) * np.cos(z),
                     -np.cos(x) * np.sin(y) * np.cos(z),
                     np.zeros_like(x)], axis=-1)


def taylor_green_on_grid(n):
    g = np.arange(n) * (L / n)
    pts = np.stack(np.meshgrid(g, g, g, indexing="ij"), axis=-1)
    field = np.ascontiguousarray(np.moveaxis(taylor_green(pts), -1, 0))

    def velocity(p):
        out = np.empty((len(p), 3))
        return interpolate(field, (0, 0, 0), (n, n, n), L / n, p, 8, out)
    return velocity


def advance(x, v, tau_p, g, dt, steps, velocity, check=None):
    """Frozen field: u at t_{n+1} is the same function as at t_n."""
    x, v = x.copy(), v.copy()
    x_star, v_star = np.empty_like(x), np.empty_like(v)
    for _ in range(steps):
        u_n = velocity(x)
        etd_predict(x, v, u_n, tau_p, g, dt, L, x_star, v_star)
        u_star = velocity(x_star)
        etd_correct(x, v, u_n, u_star, tau_p, g, dt, L)
        if check is not None:
            check(x, v, x_star)
    return x, v


def advance_multistep(x, v, tau_p, g, dts, velocity):
    """The run loop's scheme (`PARTICLE_SCHEMES['etd2']`) on one set, frozen field: the seen
    velocity at the start is u(x0); the first step is ETD2RK, the rest multistep."""
    from types import SimpleNamespace

    from eddybox.particles.integrator import PARTICLE_SCHEMES

    s = SimpleNamespace(x=x.copy(), v=v.copy(), u_seen=velocity(x), u_prev=np.empty_like(x),
                        tau_p=tau_p, gravity=g, history=False, h_prev=0.0)
    calls = []

    def interpolate(pos, out):
        calls.append(len(pos))
        out[...] = velocity(pos)

    scheme = PARTICLE_SCHEMES["etd2"]()
    for h in dts:
        scheme.step(s, interpolate, h, L)
    return s.x, s.v, len(calls)


FLOW = np.array([7.0, -11.0, 2.5])


def uniform_flow(p):
    return np.tile(FLOW, (len(p), 1))


def uniform_flow_exact(x0, v0, tau_p, t):
    """Stokes drag in a uniform flow U: x = x0 + U t + (v0 - U) tau_p (1 - e^{-t/tau_p})."""
    return x0 + FLOW * t + (v0 - FLOW) * tau_p * (1.0 - np.exp(-t / tau_p))


def reference(x0, v0, tau_p, g, t_end, velocity=taylor_green):
    """scipy.integrate.solve_ivp (DOP853, tight tolerances) of the same equations
    (reduced Maxey & Riley 1983, Phys. Fluids 26, 883) on the analytic field."""
    n = len(x0)
    if tau_p == 0.0:
        def rhs(t, y):
            return velocity(y.reshape(n, 3)).ravel()
        sol = solve_ivp(rhs, (0.0, t_end), x0.ravel(), method="DOP853", rtol=1e-12, atol=1e-12)
        x = sol.y[:, -1].reshape(n, 3)
        return x, velocity(x)

    def rhs(t, y):
        x, v = y.reshape(2, n, 3)
        return np.stack([v, (velocity(x) - v) / tau_p + g]).ravel()
    sol = solve_ivp(rhs, (0.0, t_end), np.stack([x0, v0]).ravel(), method="DOP853",
                    rtol=1e-12, atol=1e-12)
    x, v = sol.y[:, -1].reshape(2, n, 3)
    return x, v


def periodic_distance(a, b):
    d = a - b
    return np.abs(d - L * np.round(d / L)).max()


def start_state(count=24, seed=3):
    x0 = np.random.default_rng(seed).uniform(0.0, L, (count, 3))
    return x0, taylor_green(x0)


def test_coefficients_match_high_precision_and_limits():
    # E = exp(-h/tau), q1 = (1-E) tau, q2 = h - q1, q3 = h^2/2 - q2 tau evaluated in 80-digit
    # decimal arithmetic (python decimal module) as the reference.
    from decimal import Decimal, getcontext
    getcontext().prec = 80
    h = 0.01
    for tau in [1e-300, 1e-8, 1e-3, 0.0199, 0.0201, 0.05, 1.0, 1e3, 1e9]:
        tau_d, h_d = Decimal(tau), Decimal(h)
        E = (-h_d / tau_d).exp()
        q1 = (1 - E) * tau_d
        q2 = h_d - q1
        q3 = h_d * h_d / 2 - q2 * tau_d
        expected = [float(E), float(q1), float(q2), float(q3)]
        np.testing.assert_allclose(etd_coefficients(tau, h), expected, rtol=1e-14, atol=0)
    # tau_p = 0: the tracer limits E = 0, q1 = 0, q2 = h, q3 = h^2/2
    assert etd_coefficients(0.0, h) == (0.0, 0.0, h, 0.5 * h * h)
    with pytest.raises(ValueError):
        etd_coefficients(-1.0, h)


def test_tracer_step_is_heun():
    # tau_p = 0 is Heun's RK2 (explicit trapezoidal rule; e.g. Hairer, Norsett & Wanner 1993,
    # Solving ODEs I, sec. II.1): x1 = x0 + h (u0 + u*)/2 with u* = u(x0 + h u0), v1 = u*.
    x0, v0 = start_state()
    h = 0.05
    x, v = advance(x0, v0, 0.0, NO_GRAVITY, h, 1, taylor_green)
    u0 = taylor_green(x0)
    u_star = taylor_green(x0 + h * u0)
    np.testing.assert_allclose(x, (x0 + 0.5 * h * (u0 + u_star)) % L, rtol=0, atol=1e-14)
    np.testing.assert_allclose(v, u_star, rtol=0, atol=1e-15)
    # and it is the limit of the inertial step as tau_p -> 0
    x_small, v_small = advance(x0, v0, 1e-12, NO_GRAVITY, h, 1, taylor_green)
    assert periodic_distance(x_small, x) < 1e-10 and np.abs(v_small - v).max() < 1e-9


@pytest.mark.parametrize("tau_p, dt", [(0.2, 0.05), (0.2, 1.0), (1e-3, 0.1), (5.0, 0.5)])
def test_settling_in_fluid_at_rest(tau_p, dt):
    # Stokes settling: v(t) = tau_p g + (v0 - tau_p g) exp(-t/tau_p) -> terminal velocity
    # tau_p g (Stokes drag, any fluid-mechanics handbook, e.g. Clift, Grace & Weber 1978).
    # The ETD step is exact for a constant seen velocity, so it follows this at every step.
    g = np.array([0.3, -0.2, -1.0])
    x0 = np.array([[1.0, 2.0, 3.0], [0.0, 6.2, 0.1]])
    v0 = np.array([[0.5, 0.0, 0.0], [0.0, 0.0, 2.0]])
    at_rest = np.zeros_like(x0)
    t_end = 40.0 * tau_p
    steps = int(np.ceil(t_end / dt))
    x, v = advance(x0, v0, tau_p, g, dt, steps, lambda p: at_rest)
    t = steps * dt
    decay = np.exp(-t / tau_p)
    v_exact = tau_p * g + (v0 - tau_p * g) * decay
    x_exact = x0 + tau_p * g * t + (v0 - tau_p * g) * tau_p * (1.0 - decay)
    np.testing.assert_allclose(v, np.broadcast_to(tau_p * g, v.shape), rtol=0, atol=1e-6)
    np.testing.assert_allclose(v, v_exact, rtol=1e-12, atol=1e-13)
    assert periodic_distance(x, x_exact) < 1e-10 * max(1.0, t)


@pytest.mark.parametrize("tau_p, g", [(0.0, NO_GRAVITY), (0.1, NO_GRAVITY), (1.0, NO_GRAVITY),
                                      (0.3, np.array([0.0, 0.0, -1.0]))])
def test_frozen_taylor_green_follows_solve_ivp(tau_p, g):
    # Interpolated field (48^3 grid, order 8) against scipy.integrate.solve_ivp on the analytic
    # field. Budget: time error ~1e-5 at dt = 0.01 (second order), interpolation ~1e-10.
    x0, v0 = start_state()
    velocity = taylor_green_on_grid(48)
    x, v = advance(x0, v0, tau_p, g, 0.01, 100, velocity)
    x_ref, v_ref = reference(x0, v0, tau_p, g, 1.0)
    assert periodic_distance(x, x_ref) < 1e-4
    assert np.abs(v - v_ref).max() < 1e-4


@pytest.mark.parametrize("tau_p", [0.0, 0.05, 0.5, 5.0])
@pytest.mark.parametrize("scheme", ["etd2rk", "etd2", "etd2-variable"])
def test_second_order_in_time(tau_p, scheme):
    # Global error O(dt^2) for the two-stage ETD2RK and the multistep ETD2 (Cox & Matthews
    # 2002, J. Comput. Phys. 176, 430), measured against solve_ivp on the analytic field; with
    # steps alternating 1.25 h and 0.75 h the multistep's backward slope uses h_{n-1}
    x0, v0 = start_state()
    g = np.array([0.0, 0.2, -0.5])
    x_ref, v_ref = reference(x0, v0, tau_p, g, 1.0)
    dts = np.array([0.1, 0.05, 0.025, 0.0125])
    errors = []
    for dt in dts:
        steps = int(round(1.0 / dt))
        if scheme == "etd2rk":
            x, v = advance(x0, v0, tau_p, g, dt, steps, taylor_green)
        else:
            hs = [dt * (0.75 if k % 2 else 1.25) if scheme.endswith("variable") else dt
                  for k in range(steps)]
            hs[-1] = 1.0 - sum(hs[:-1])
            x, v, _ = advance_multistep(x0, v0, tau_p, g, hs, taylor_green)
        errors.append(max(periodic_distance(x, x_ref), np.abs(v - v_ref).max()))
    observed = np.polyfit(np.log(dts), np.log(errors), 1)[0]
    assert abs(observed - 2.0) < 0.3, (observed, errors)


def test_stiff_particles_are_stable_and_tend_to_tracers():
    # tau_p << dt: the exponential step has no drag stability limit, and the particle
    # velocity relaxes within a step, so the trajectory tends to the tracer one
    # (physical lag O(tau_p |u| |grad u|), Maxey 1987 J. Fluid Mech. 174, 441).
    x0, v0 = start_state()
    x_tracer, v_tracer = advance(x0, v0, 0.0, NO_GRAVITY, 0.01, 100, taylor_green)
    x, v = advance(x0, v0 + 5.0, 1e-8, NO_GRAVITY, 0.01, 100, taylor_green)
    assert np.all(np.isfinite(x)) and np.all(np.isfinite(v))
    assert periodic_distance(x, x_tracer) < 1e-6
    assert np.abs(v - v_tracer).max() < 1e-6


@pytest.mark.parametrize("ratio", [1e-10, 1e-4, 0.1, 1.0, 10.0, 1e4])
def test_velocity_stays_bounded_for_any_tau_over_dt(ratio):
    # Derived property of the scheme: v_{n+1} = E v_n + (phi1 - E) u_n + (1 - phi1) u* is a
    # convex combination, so with |u_i| <= 1 (Taylor-Green) and |v0_i| <= 1 it stays <= 1.
    x0, v0 = start_state()
    dt = 0.2
    bound = []

    def check(x, v, x_star):
        bound.append(np.abs(v).max())
        assert np.all((x >= 0.0) & (x < L)) and np.all((x_star >= 0.0) & (x_star < L))
    advance(x0, -v0, ratio * dt, NO_GRAVITY, dt, 50, taylor_green, check)
    assert max(bound) <= 1.0 + 1e-14


def test_periodic_crossing_keeps_positions_in_box():
    # Uniform flow: the seen velocity is constant, so the ETD step is exact (Stokes drag
    # solution), and particles cross the periodic faces many times.
    rng = np.random.default_rng(9)
    n = 400
    x0 = np.concatenate([rng.uniform(0.0, L, (n - 4, 3)),
                         [[0.0, 0.0, 0.0], [np.nextafter(L, 0.0)] * 3, [1e-17] * 3,
                          [L - 1e-15] * 3]])
    v0 = rng.normal(0.0, 3.0, (n, 3))
    tau_p, dt, steps = 0.3, 0.05, 200

    def check(x, v, x_star):
        assert x.shape == (n, 3) and np.all((x >= 0.0) & (x < L))
        assert np.all((x_star >= 0.0) & (x_star < L))
    x, v = advance(x0, v0, tau_p, NO_GRAVITY, dt, steps, uniform_flow, check)
    assert periodic_distance(x, uniform_flow_exact(x0, v0, tau_p, steps * dt)) < 1e-9
    assert np.all(np.isfinite(x)) and len(x) == n


def test_wrap_handles_round_off_at_the_faces():
    # A tiny negative coordinate plus L rounds to exactly L in floating point; the wrap must
    # map it into [0, L) (here to 0, the same periodic point).
    values = [-1e-20, L, -L, 2 * L, np.nextafter(L, 0.0), 0.0, -0.0, -3.3, 7.0, 1e17,
              np.nextafter(0.0, -1.0)]
    for value in values:
        r = wrap_periodic(value, L)
        assert 0.0 <= r < L, (value, r)
        # same periodic point: difference is a multiple of L up to round-off
        k = np.round((value - r) / L)
        assert abs(value - r - k * L) <= 4 * np.spacing(max(abs(value), L))


# ---------------------------------------------------------------------------------------------
# One interpolation per step: multistep ETD2 (Cox & Matthews 2002, eq. 6)
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("tau_p, g", [(0.0, NO_GRAVITY), (0.1, NO_GRAVITY), (1.0, NO_GRAVITY),
                                      (0.3, np.array([0.0, 0.0, -1.0]))])
def test_multistep_follows_solve_ivp_with_one_interpolation_per_step(tau_p, g):
    # the same budget as ETD2RK above (48^3 grid, order 8, dt = 0.01, reference solve_ivp)
    x0, v0 = start_state()
    velocity = taylor_green_on_grid(48)
    x, v, calls = advance_multistep(x0, v0, tau_p, g, [0.01] * 100, velocity)
    assert calls == 100 + 1  # one per step, and one more for the ETD2RK start
    x_ref, v_ref = reference(x0, v0, tau_p, g, 1.0)
    assert periodic_distance(x, x_ref) < 1e-4
    assert np.abs(v - v_ref).max() < 1e-4


def test_multistep_tracers_are_adams_bashforth_2_and_constant_flow_is_exact():
    # tau_p = 0 at constant h: x_{n+1} = x_n + h (3/2 u_n - 1/2 u_{n-1}) (Adams-Bashforth,
    # e.g. Hairer, Norsett & Wanner 1993, sec. III.1); the first step is Heun's
    x0, v0 = start_state()
    h = 0.05
    x1, _, _ = advance_multistep(x0, v0, 0.0, NO_GRAVITY, [h], taylor_green)
    x2, _, _ = advance_multistep(x0, v0, 0.0, NO_GRAVITY, [h, h], taylor_green)
    want = x1 + h * (1.5 * taylor_green(x1) - 0.5 * taylor_green(x0))
    np.testing.assert_allclose(x2, want % L, rtol=0, atol=1e-14)
    # uniform flow: the seen velocity is constant, d = 0, the Stokes drag solution is exact
    tau_p, n_steps, h = 0.3, 200, 0.05
    x, _, _ = advance_multistep(x0, v0, tau_p, NO_GRAVITY, [h] * n_steps, uniform_flow)
    assert periodic_distance(x, uniform_flow_exact(x0, v0, tau_p, n_steps * h)) < 1e-9
