"""Exponential (ETD) time stepping of inertial point particles with Stokes drag.

Particle equation (reduced Maxey & Riley 1983, Phys. Fluids 26, 883: small heavy sphere,
Stokes drag and gravity only, one-way coupling):

    dx/dt = v,        dv/dt = (u(x, t) - v) / tau_p + g.

With a = 1/tau_p and c = u + g tau_p the velocity equation reads dv/dt = a (c - v), whose
linear part is integrated exactly. The scheme is the two-stage exponential Runge-Kutta
method ETD2RK of Cox & Matthews (2002, J. Comput. Phys. 176, 430), here for the pair (x, v),
with step h, E = exp(-a h), z = -a h and phi_k the usual ETD functions

    phi1(z) = (e^z - 1)/z,  phi2(z) = (e^z - 1 - z)/z^2,  phi3(z) = (e^z - 1 - z - z^2/2)/z^3,

    q1 = (1 - E)/a              = h phi1(z)
    q2 = h - (1 - E)/a          = -z h phi2(z)          (= a h^2 phi2)
    q3 = h^2/2 - (h - q1)/a     = h^2 (1/2 - phi2(z))   (= -z h^2 phi3(z)).

Predictor (u_n = u(x_n, t_n), c = u_n + g tau_p; exact if c stays constant over the step):

    v* = v_n E + c (1 - E),             x* = x_n + c h + (v_n - c) q1.

Corrector (u* = u(x*, t_{n+1}); the fluid velocity seen by the particle is taken linear in
time from u_n to u* over the step, d = (u* - u_n)/h, and integrated exactly):

    v_{n+1} = v_n E + c (1 - E) + d q2,  x_{n+1} = x_n + v_n q1 + c q2 + d q3.

Properties (derived, checked in tests/test_particle_integrator.py):

* exact when the seen velocity is constant (fluid at rest, uniform flow), second order in h
  otherwise, for any tau_p / h (no stability limit from the drag);
* v_{n+1} = E v_n + (phi1 - E) u_n + (1 - phi1) u* (without gravity) is a convex
  combination, so |v| never exceeds max(|v_0|, max |u|) componentwise;
* tau_p -> 0 (tracers): E -> 0, q1 -> 0, q2 -> h, q3 -> h^2/2, giving Heun's RK2,
  x_{n+1} = x_n + h (u_n + u*)/2 and v_{n+1} = u*; tau_p = 0 uses these limits directly;
* tau_p -> infinity: E -> 1, q1 -> h, q2, q3 -> 0, ballistic motion x_{n+1} = x_n + h v_n.

Positions are kept in the periodic box [0, L) by :func:`wrap_periodic` after each stage; the
run loop counts the wraps per particle (:func:`track_images`), so x + image L is the unwrapped
trajectory.

One interpolation per step: the multistep ETD2 of Cox & Matthews (2002, eq. 6) takes the
seen velocity linear in time through the last two interpolated values instead of through a
predictor, d = (u_n - u_{n-1}) / h_{n-1}, and advances with the corrector's formulas above
(:func:`etd_multistep`); only u(x_{n+1}, t_{n+1}) is then interpolated. It is second order
(tests/test_particle_integrator.py against solve_ivp), exact for a constant seen velocity, and
reduces to the second-order Adams-Bashforth method for tracers. The extrapolated seen
velocity can overshoot max |u| by O(h^2 |d^2 u/dt^2|), unlike ETD2RK's convex combination.

`PARTICLE_SCHEMES` holds both as small objects with one `step`; the run loop picks one.
"""

import math

import numpy as np
from numba import njit, prange

__all__ = ["etd_coefficients", "wrap_periodic", "track_images", "etd_predict", "etd_correct",
           "etd_multistep", "PARTICLE_SCHEMES", "ETD2RK", "ETD2Multistep"]

# Below this |z| the phi functions are summed from their Taylor series (z^k / (k + j)!),
# which avoids the cancellation in e^z - 1 - z ...; 20 terms give full double precision.
_SERIES_LIMIT = 0.5
_SERIES_TERMS = 20


@njit(cache=True)
def etd_coefficients(tau_p, h):
    """Scalar ETD coefficients (E, q1, q2, q3) for response time tau_p >= 0 and step h > 0.

    E = exp(-h/tau_p), q1 = (1-E)/a, q2 = h - q1, q3 = h^2/2 - q2/a with a = 1/tau_p (see
    the module docstring; Cox & Matthews 2002, J. Comput. Phys. 176, 430). Evaluated with
    expm1 and Taylor series for small h/tau_p, and the tracer limits for tau_p = 0 (or
    h/tau_p beyond floating point range), so it is accurate for every ratio tau_p/h.
    """
    if not (h > 0.0):
        raise ValueError("time step must be positive")
    if not (tau_p >= 0.0 and math.isfinite(tau_p)):
        raise ValueError("tau_p must be finite and >= 0")
    if tau_p == 0.0:
        return 0.0, 0.0, h, 0.5 * h * h
    z = -h / tau_p
    if not math.isfinite(z):
        return 0.0, 0.0, h, 0.5 * h * h
    if -z < _SERIES_LIMIT:
        # phi_j(z) = sum_k z^k / (k + j)!, summed from the smallest term (Horner form)
        phi1 = 0.0
        phi2 = 0.0
        phi3 = 0.0
        for k in range(_SERIES_TERMS - 1, -1, -1):
            phi1 = phi1 * z / (k + 2) + 1.0
            phi2 = phi2 * z / (k + 3) + 1.0
            phi3 = phi3 * z / (k + 4) + 1.0
        phi2 *= 0.5
        phi3 *= 1.0 / 6.0
        E = math.exp(z)
        return E, h * phi1, -z * h * phi2, -z * h * h * phi3
    E = math.exp(z)
    phi1 = math.expm1(z) / z
    phi2 = (phi1 - 1.0) / z
    return E, h * phi1, -z * h * phi2, h * h * (0.5 - phi2)


@njit(cache=True)
def wrap_periodic(x, L):
    """Map a coordinate into [0, L). fmod is exact; the second test catches the case where
    a tiny negative remainder plus L rounds to exactly L. A coordinate already in the box
    (most of them, every step) skips the division."""
    if 0.0 <= x < L:
        return x + 0.0  # turns -0.0 into +0.0
    r = np.fmod(x, L)
    if r < 0.0:
        r += L
    if r >= L:
        r -= L
    return r + 0.0  # turns -0.0 into +0.0


@njit(parallel=True, cache=True)
def track_images(x_start, x, L, image, disp):
    """Displacements over a step and periodic image counters, from the positions in [0, L)
    before (``x_start``) and after (``x``) the step:

        d = x − x_start reduced to [−L/2, L/2],   image −= 1 where d was above L/2 (the
        particle left through the face at 0), image += 1 where it was below −L/2 (through L),

    so that x + image L is the unwrapped position, continuous along the trajectory. Exact as
    long as no particle moves L/2 or more in one step (the ghost layers of the interpolation
    already limit a step to a few grid cells). Writes d into ``disp``, which may be
    ``x_start`` itself (each element is read before it is written)."""
    half = 0.5 * L
    for i in prange(x.shape[0]):
        for a in range(3):
            d = x[i, a] - x_start[i, a]
            if d > half:
                d -= L
                image[i, a] -= 1
            elif d < -half:
                d += L
                image[i, a] += 1
            disp[i, a] = d


@njit(parallel=True, cache=True)
def etd_predict(x, v, u_n, tau_p, g, h, L, x_star, v_star):
    """ETD2RK predictor stage (module docstring; Cox & Matthews 2002):

        v* = v_n E + c (1 - E),  x* = x_n + c h + (v_n - c)(1 - E)/a,  c = u_n + g tau_p,

    exact when the fluid velocity seen by the particle is constant over the step.

    x, v, u_n : (n, 3) positions in [0, L), particle and fluid velocities at t_n.
    tau_p : particle response time (finite, >= 0; 0 means tracers); g : gravity, 3 values;
    h : time step; L : box length. Writes x_star (wrapped into [0, L)) and v_star.
    """
    E, q1, q2, q3 = etd_coefficients(tau_p, h)
    one_minus_E = 1.0 - E
    for i in prange(x.shape[0]):
        for a in range(3):
            c = u_n[i, a] + g[a] * tau_p
            v_star[i, a] = v[i, a] * E + c * one_minus_E
            x_star[i, a] = wrap_periodic(x[i, a] + c * h + (v[i, a] - c) * q1, L)


@njit(parallel=True, cache=True)
def etd_correct(x, v, u_n, u_star, tau_p, g, h, L):
    """ETD2RK corrector stage, in place on x and v (module docstring; Cox & Matthews 2002):

        v_{n+1} = v_n E + c (1 - E) + d (h - (1 - E)/a),
        x_{n+1} = x_n + v_n (1 - E)/a + c (h - (1 - E)/a) + d h^2 (1/2 - phi2(-a h)),

    with c = u_n + g tau_p and d = (u_star - u_n)/h, u_star the fluid velocity at the
    predicted position and t_{n+1}. For tau_p = 0 this is Heun's RK2,
    x_{n+1} = x_n + h (u_n + u_star)/2, v_{n+1} = u_star. Positions wrapped into [0, L).
    """
    E, q1, q2, q3 = etd_coefficients(tau_p, h)
    for i in prange(x.shape[0]):
        for a in range(3):
            _linear_seen(x, v, i, a, u_n[i, a] + g[a] * tau_p, (u_star[i, a] - u_n[i, a]) / h,
                         E, q1, q2, q3, L)


@njit(cache=True, inline="always")
def _linear_seen(x, v, i, a, c, d, E, q1, q2, q3, L):
    """The exact step of particle i, component a, for a seen velocity u + g tau_p = c + d t
    linear in time over the step (module docstring)."""
    v_old = v[i, a]
    v[i, a] = v_old * E + c * (1.0 - E) + d * q2
    x[i, a] = wrap_periodic(x[i, a] + v_old * q1 + c * q2 + d * q3, L)


@njit(parallel=True, cache=True)
def etd_multistep(x, v, u_n, u_prev, tau_p, g, h, h_prev, L):
    """Multistep ETD2 step (Cox & Matthews 2002, J. Comput. Phys. 176, 430, eq. 6), in place
    on x and v: the corrector's formulas with the slope of the seen velocity taken backwards,

        d = (u_n - u_{n-1}) / h_{n-1},   c = u_n + g tau_p,
        v_{n+1} = v_n E + c (1 - E) + d q2,   x_{n+1} = x_n + v_n q1 + c q2 + d q3,

    i.e. the exact solution for a seen velocity extrapolated linearly from t_{n-1}, t_n over the
    step (for tau_p = 0: x_{n+1} = x_n + h u_n + h^2 d / 2, Adams-Bashforth 2 at constant h).
    u_n, u_prev: fluid velocity interpolated at (x_n, t_n) and (x_{n-1}, t_{n-1}); h_prev the
    previous step. Positions wrapped into [0, L)."""
    E, q1, q2, q3 = etd_coefficients(tau_p, h)
    for i in prange(x.shape[0]):
        for a in range(3):
            _linear_seen(x, v, i, a, u_n[i, a] + g[a] * tau_p, (u_n[i, a] - u_prev[i, a]) / h_prev,
                         E, q1, q2, q3, L)


# ---------------------------------------------------------------------------------------------
# The schemes, as the run loop uses them (registry PARTICLE_SCHEMES at the end)
# ---------------------------------------------------------------------------------------------
class ETD2RK:
    """Two-stage ETD2RK (Cox & Matthews 2002; module docstring): a predictor with u_n, the
    fluid velocity interpolated at the predicted position, a corrector, then u at the new
    position for the next step. Two interpolations per step.

    `step(s, interpolate, h, L)` advances a particle set s (arrays x, v, u_seen, tau_p,
    gravity) over h, with interpolate(positions, out) of the field at the end of the step."""

    name = "etd2rk"
    interpolations_per_step = 2

    def __init__(self):
        self._scratch = {}  # per set: x*, v*, u*, kept while the set keeps its size

    def step(self, s, interpolate, h, L):
        x_star, v_star, u_star = self._scratch.get(id(s), (None,) * 3)
        if x_star is None or x_star.shape != s.x.shape:
            x_star, v_star, u_star = self._scratch[id(s)] = tuple(np.empty_like(s.x) for _ in range(3))
        etd_predict(s.x, s.v, s.u_seen, s.tau_p, s.gravity, h, L, x_star, v_star)
        interpolate(x_star, u_star)
        etd_correct(s.x, s.v, s.u_seen, u_star, s.tau_p, s.gravity, h, L)
        interpolate(s.x, s.u_seen)


class ETD2Multistep:
    """Multistep ETD2 (Cox & Matthews 2002, eq. 6; :func:`etd_multistep`): one interpolation
    per step. Keeps u_prev (the seen velocity of the step before, per particle) and h_prev
    (per set) as history; a set without history (just released, or restarted from a
    checkpoint that has none) takes one ETD2RK step first."""

    name = "etd2"
    interpolations_per_step = 1

    def step(self, s, interpolate, h, L):
        if not s.history:
            np.copyto(s.u_prev, s.u_seen)
            ETD2RK().step(s, interpolate, h, L)
        else:
            etd_multistep(s.x, s.v, s.u_seen, s.u_prev, s.tau_p, s.gravity, h, s.h_prev, L)
            s.u_prev, s.u_seen = s.u_seen, s.u_prev
            interpolate(s.x, s.u_seen)
        s.history = True
        s.h_prev = h


#: the particle schemes by name (the run loop uses system.SCHEME)
PARTICLE_SCHEMES = {cls.name: cls for cls in (ETD2RK, ETD2Multistep)}
