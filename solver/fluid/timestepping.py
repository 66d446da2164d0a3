"""Integrating-factor Runge-Kutta schemes, in a registry.

The viscous term (and a linear forcing A u) is integrated exactly by the integrating factor
    v_k = exp((nu k^2 - A) t) u_k,
and the remaining equation dv/dt = exp((nu k^2 - A) t) N(u) by an explicit RK method
(Canuto et al. 1988, sec. 4.4; Rogallo 1981, NASA TM 81315). Each scheme works in place on
preallocated arrays. The time step is chosen from the velocity of the first stage, so it
depends only on the state: a run restarted from a checkpoint takes the same steps.
"""
from __future__ import annotations

import numpy as np

from eddybox.solver.fluid import fft
from eddybox.solver.fluid import spectral_ops as ops
from eddybox.solver.fluid.navier_stokes import DEALIASING

SCHEMES: dict[str, type] = {}


def register(name: str):
    def deco(cls):
        cls.name = name
        SCHEMES[name] = cls
        return cls

    return deco


def spectral_cfl_bound(scheme_cls, dealias: str = "two-thirds") -> float:
    """The CFL bound for the pseudo-spectral advection operator, whose largest eigenvalue is
    (2 pi / 3) max(|u|+|v|+|w|) / dx after two-thirds dealiasing: cfl_limit / (2 pi / 3);
    spherical truncation keeps |k_i| up to sqrt(2) times further, so the bound is sqrt(2)
    lower (at the same k_max the time step is the same). `check` and the run log warn above
    it; a run that becomes unstable stops with exit 3."""
    return scheme_cls.cfl_limit / (2.0 * np.pi / 3.0) / DEALIASING[dealias].cfl_factor()


class _Factors:
    """Separable 1-D integrating factors exp(-(nu k_i^2) p dt) (times exp(A p dt) on x)."""

    def __init__(self, layout, nu, fractions):
        self.k2 = [layout.kx**2, layout.ky**2, layout.kz**2]
        self.nu = nu
        self.f = {p: [np.empty(len(k)) for k in self.k2] for p in fractions}
        self.ones = [np.ones(len(k)) for k in self.k2]

    def set(self, dt, rate):
        for p, arrs in self.f.items():
            for ax in range(3):
                np.multiply(self.k2[ax], -self.nu * p * dt, out=arrs[ax])
                np.exp(arrs[ax], out=arrs[ax])
            arrs[0] *= np.exp(rate * p * dt)

    def __getitem__(self, p):
        return self.f[p] if p else self.ones


class Scheme:
    name = "base"
    order = 0
    #: imaginary-axis stability bound of the RK scheme; time.cfl above it is refused
    cfl_limit = 1.0

    #: number of 3-component complex arrays the scheme allocates besides the state
    extra_arrays = 0
    #: stage-shift dealiasing: the grid shift of stage i in cells (the same in every
    #: direction, plus the step's random beta), chosen so that the step's single aliases
    #: cancel (navier_stokes.stage_shift_residual); None: the scheme cannot cancel them
    stage_shifts = None

    def __init__(self, layout, nonlinear, nu):
        self.layout = layout
        self.nl = nonlinear
        self.fac = _Factors(layout, nu, self.fractions)
        nonlinear.set_stage_shifts(self.stage_shifts, self.name)

    def alloc(self):
        # aligned, so FFT plans can read and write the components in place
        a = fft.empty_complex((3,) + self.layout.spec_shape)
        a[...] = 0.0
        return a

    def step(self, uh, forcing, choose_dt, sim):
        raise NotImplementedError


class _StageScheme(Scheme):
    """Classical RK schemes with an accumulator and a stage/slope array besides the state."""

    extra_arrays = 2

    def __init__(self, layout, nonlinear, nu):
        super().__init__(layout, nonlinear, nu)
        self.acc = self.alloc()
        self.st = self.alloc()

    def first_slope(self, uh, forcing, choose_dt, sim):
        """The first slope N(u) + f into the stage array; the step size follows from that
        stage's velocity, then the forcing and the integrating factors are fixed for the step."""
        self.nl.begin_step(sim.step)
        np.copyto(self.st, uh)
        umax = self.nl.evaluate(self.st, self.st, 0.0, 1.0, 0)
        dt = choose_dt(umax)
        forcing.begin_step(sim, dt)
        self.fac.set(dt, forcing.linear_rate)
        forcing.add_to_rhs(self.st, 1.0)
        return dt


@register("rk4")
class RK4(_StageScheme):
    """Classical fourth-order Runge-Kutta (Kutta 1901) with integrating factor:
        k1 = N(u),  k2 = N(E_h (u + h/2 k1)),  k3 = N(E_h u + h/2 k2),  k4 = N(E u + h E_h k3),
        u <- E u + h/6 (E k1 + 2 E_h k2 + 2 E_h k3 + k4),   E = e^{-nu k^2 h}, E_h = E^{1/2}.
    Two work arrays (accumulator, stage/slope) besides the state.

    Stage shifts (0, 1/3, 2/3, 0) cells give the single aliases of the four stages the phases
    (1, w, w^2, 1), w = exp(2 pi i/3): with b = (1, 2, 2, 1)/6, c = (0, 1/2, 1/2, 1) the sums
    (0)-(3) of `stage_shift_residual` vanish, so the aliasing left in a step is O(h^2) and
    quadratic in the aliased amplitudes (sum (4) = 1/2)."""
    order = 4
    cfl_limit = 2.8  # |1 + z + z^2/2 + z^3/6 + z^4/24| <= 1 on the imaginary axis up to 2.83
    fractions = (0.5, 1.0)
    stage_shifts = (0.0, 1.0 / 3.0, 2.0 / 3.0, 0.0)
    tableau = ((1 / 6, 1 / 3, 1 / 3, 1 / 6), (0.0, 0.5, 0.5, 1.0),
               ((0, 0, 0, 0), (0.5, 0, 0, 0), (0, 0.5, 0, 0), (0, 0, 1.0, 0)))

    def step(self, uh, forcing, choose_dt, sim):
        dt = self.first_slope(uh, forcing, choose_dt, sim)
        st, acc, f = self.st, self.acc, self.fac
        E, H, one = f[1.0], f[0.5], f[0]
        ops.if_combine(acc, st, uh, *E, 0.0, dt / 6, *H, *H, dt / 2)
        self.nl.evaluate(st, st, 0.0, 1.0, 1)
        forcing.add_to_rhs(st, 1.0)
        ops.if_combine(acc, st, uh, *H, 1.0, dt / 3, *H, *one, dt / 2)
        self.nl.evaluate(st, st, 0.0, 1.0, 2)
        forcing.add_to_rhs(st, 1.0)
        ops.if_combine(acc, st, uh, *H, 1.0, dt / 3, *E, *H, dt)
        self.nl.evaluate(st, st, 0.0, 1.0, 3)
        forcing.add_to_rhs(st, 1.0)
        ops.if_finish(uh, acc, st, *E, dt / 6)
        return dt


@register("rk2")
class RK2(_StageScheme):
    """Heun's second-order Runge-Kutta with integrating factor:
        k1 = N(u),  k2 = N(E (u + h k1)),  u <- E u + h/2 (E k1 + k2).

    Stage shifts (0, 1/2) cells, Rogallo's (1981) pair: the single aliases of the two stages
    have opposite signs and equal weights, so the aliasing left in a step is O(h^2) (sums
    (1)-(4) of `stage_shift_residual` are 1/2)."""
    order = 2
    cfl_limit = 1.0  # Heun is weakly unstable on the whole imaginary axis; viscosity damps it
    fractions = (1.0,)
    stage_shifts = (0.0, 0.5)
    tableau = ((0.5, 0.5), (0.0, 1.0), ((0, 0), (1.0, 0)))

    def step(self, uh, forcing, choose_dt, sim):
        dt = self.first_slope(uh, forcing, choose_dt, sim)
        st, acc, f = self.st, self.acc, self.fac
        E = f[1.0]
        ops.if_combine(acc, st, uh, *E, 0.0, dt / 2, *E, *E, dt)
        self.nl.evaluate(st, st, 0.0, 1.0, 1)
        forcing.add_to_rhs(st, 1.0)
        ops.if_finish(uh, acc, st, *E, dt / 2)
        return dt


@register("rk3")
class LowStorageRK3(Scheme):
    """Williamson (1980) third-order, two-register ("2N") Runge-Kutta, J. Comput. Phys. 35,
    48-56, coefficients A = (0, -5/9, -153/128), B = (1/3, 15/16, 8/15), stage times
    c = (0, 1/3, 3/4). With the integrating factor carried through each sub-step:
        q <- A_j q + h N(u);   u <- E(d_j) (u + B_j q);   q <- E(d_j) q,
    d_j = c_{j+1} - c_j = (1/3, 5/12, 1/4). One work array besides the state.

    No stage shifts: its effective weights b = (1/6, 3/10, 8/15) have one above 1/2, so no
    phases of modulus one can make sum_i b_i phi_i vanish, and stage-shift dealiasing is
    refused for it."""
    order = 3
    cfl_limit = 1.7  # imaginary-axis stability up to sqrt(3) = 1.73
    extra_arrays = 1
    A = (0.0, -5.0 / 9.0, -153.0 / 128.0)
    B = (1.0 / 3.0, 15.0 / 16.0, 8.0 / 15.0)
    fractions = (1.0 / 3.0, 5.0 / 12.0, 0.25)

    def __init__(self, layout, nonlinear, nu):
        super().__init__(layout, nonlinear, nu)
        self.q = self.alloc()

    def step(self, uh, forcing, choose_dt, sim):
        q, f = self.q, self.fac
        dt = None
        self.nl.begin_step(sim.step)
        for j in range(3):
            if j == 0:
                # first slope into q; the step size is only known after it
                umax = self.nl.evaluate(uh, q, 0.0, 1.0, 0)
                dt = choose_dt(umax)
                forcing.begin_step(sim, dt)
                f.set(dt, forcing.linear_rate)
                q *= dt
            else:
                self.nl.evaluate(uh, q, self.A[j], dt, j)
            forcing.add_to_rhs(q, dt)
            ops.lsrk_advance(uh, q, self.B[j], *f[self.fractions[j]], j < 2)
        return dt
