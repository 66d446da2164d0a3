"""Mapping droplets or grains given in physical units onto the dimensionless simulation.

With the physical flow (kinematic viscosity nu, dissipation eps, fluid density rho_f, gravity g)
and a particle of radius a, diameter d = 2a and density rho_p:

    tau_p   = rho_p d^2 / (18 mu),  mu = rho_f nu        Stokes drag response time
                                                           (Maxey & Riley 1983, Phys. Fluids 26)
    eta     = (nu^3/eps)^(1/4), tau_eta = (nu/eps)^(1/2), u_eta = (nu eps)^(1/4)   (Pope 2000)
    St      = tau_p / tau_eta                             Stokes number
    v_s     = tau_p g                                     Stokes terminal velocity
    S_v     = v_s / u_eta                                 settling parameter
    Fr      = a_eta / g,  a_eta = (eps^3/nu)^(1/4)        Froude number
    Re_p    = d v_s / nu                                  particle Reynolds number (settling)

The simulation matches St and Fr: tau_p = St tau_eta(sim) and |g_sim| = a_eta(sim) / Fr, along
`particles.gravity` (or -z when that is zero). The point-particle, linear-drag model needs
Re_p < ~1, d < eta and rho_p / rho_f >> 1 (no added mass, pressure-gradient or history force).

Results go back to physical units by the same matching of Kolmogorov scales: a quantity of
dimension L^a T^b measured in the simulation is divided by eta^a tau_eta^b of the simulation
(at each sample) and multiplied by those of the physical flow (:func:`from_kolmogorov_units`):
a collision kernel (L^3 T^-1) by eta_phys^3 / tau_eta_phys, a velocity by u_eta_phys, a
collision rate per unit volume (L^-3 T^-1) by 1 / (eta_phys^3 tau_eta_phys).
"""
from __future__ import annotations

import math

import numpy as np


def physical_numbers(radius, density, phys) -> dict:
    """The numbers above for one particle; `phys` is the particles.physical section."""
    nu, eps, rho_f, g = phys.viscosity, phys.dissipation, phys.fluid_density, phys.gravity
    d = 2.0 * radius
    tau_p = density * d * d / (18.0 * rho_f * nu)
    eta = (nu**3 / eps) ** 0.25
    tau_eta = math.sqrt(nu / eps)
    u_eta = (nu * eps) ** 0.25
    a_eta = (eps**3 / nu) ** 0.25
    v_s = tau_p * g
    return {"tau_p": tau_p, "stokes": tau_p / tau_eta, "settling_velocity": v_s,
            "settling_parameter": v_s / u_eta, "froude": a_eta / g if g > 0 else math.inf,
            "reynolds_p": d * v_s / nu, "diameter_over_eta": d / eta, "density_ratio": density / rho_f,
            "eta": eta, "tau_eta": tau_eta, "u_eta": u_eta, "radius": radius, "density": density}


def point_particle_warnings(name, num) -> list[str]:
    w = []
    if num["reynolds_p"] > 1.0:
        w.append(f"set {name}: particle Reynolds number {num['reynolds_p']:.3g} > 1; linear "
                 "Stokes drag underestimates the drag")
    if num["diameter_over_eta"] > 1.0:
        w.append(f"set {name}: diameter is {num['diameter_over_eta']:.3g} eta (> 1); the "
                 "point-particle model does not hold")
    if num["density_ratio"] < 10.0:
        w.append(f"set {name}: density ratio {num['density_ratio']:.3g} is not >> 1; added mass, "
                 "pressure-gradient and history forces are neglected")
    return w


def particle_lines(p, predicted) -> list[str]:
    """Lines for `eddybox check` describing every particle set of the particles section `p`
    (its warnings: `point_particle_warnings`, gathered by eddybox.solver.run.config_warnings)."""
    if not p.sets:
        return []
    lines = ["", f"particles (released at t = {p.release:g}):"]
    tau_eta = predicted.get("tau_eta")
    for s in p.sets:
        order = s.interpolation or p.interpolation
        if s.radius is not None:
            num = physical_numbers(s.radius, s.density, p.physical)
            lines.append(
                f"  {s.name:12s} {s.count:9d}  radius {s.radius:.3g} m, density "
                f"{s.density:.4g} kg/m^3 -> tau_p = rho_p d^2/(18 mu) = {num['tau_p']:.3g} s, "
                f"St = tau_p/tau_eta = {num['stokes']:.3g}, S_v = tau_p g/u_eta = "
                f"{num['settling_parameter']:.3g}, Fr = a_eta/g = {num['froude']:.3g}, "
                f"Re_p = d v_s/nu = {num['reynolds_p']:.3g}, d/eta = {num['diameter_over_eta']:.3g}")
        elif s.stokes is not None:
            tp = f", tau_p ~ {s.stokes * tau_eta:.3g} with the predicted tau_eta" if tau_eta else ""
            kind = "tracers" if s.stokes == 0 else f"St = {s.stokes:g}{tp}"
            lines.append(f"  {s.name:12s} {s.count:9d}  {kind} (tau_eta measured at release)")
        else:
            kind = "tracers" if s.tau_p == 0 else f"tau_p = {s.tau_p:g}"
            st = f", St ~ {s.tau_p / tau_eta:.3g}" if tau_eta and s.tau_p else ""
            lines.append(f"  {s.name:12s} {s.count:9d}  {kind}{st}")
        lines[-1] += f", interpolation {order} points"
    return lines


def from_kolmogorov_units(value, length: int, time: int, eta: float, tau_eta: float):
    """A quantity of dimension L^length T^time given in Kolmogorov units (divided by
    eta^length tau_eta^time of its own flow) in the units of the flow whose Kolmogorov length
    and time are `eta` and `tau_eta` (m and s for the physical flow): value eta^a tau_eta^b."""
    return np.asarray(value, dtype=float) * float(eta) ** length * float(tau_eta) ** time
