"""Single-time statistics of the velocity field, with the definitions of Pope (2000),
Turbulent Flows, Cambridge University Press (equation numbers of that book).

    E        = 1/2 <u.u> = sum_k 1/2 |u_k|^2                       kinetic energy (6.1)
    eps      = 2 nu sum_k k^2 E_k                                  dissipation (6.191)
    u'       = sqrt(2E/3)                                          r.m.s. velocity
    lambda   = sqrt(15 nu u'^2 / eps)                              Taylor microscale (6.56)
    Re_lambda= u' lambda / nu                                      (6.62)
    eta      = (nu^3 / eps)^{1/4},  tau_eta = (nu / eps)^{1/2}     Kolmogorov scales (6.1x)
    L        = pi / (2 u'^2) int E(k)/k dk                         integral scale (6.260)
    S        = <(du_i/dx_i)^3> / <(du_i/dx_i)^2>^{3/2}             derivative skewness, averaged
                                                                   over i (6.84 ff.)
    F        = <(du_i/dx_i)^4> / <(du_i/dx_i)^2>^2                 derivative flatness
    E(k)     = sum over the shell k - 1/2 <= |k| < k + 1/2 of E_k  shell-summed spectrum
"""
from __future__ import annotations

import numpy as np

from eddybox.solver.fluid import spectral_ops as ops

#: name -> (units, description) for every series written to fluid.h5
SERIES = {
    "time": ("T", "simulation time"),
    "step": ("1", "time-step index"),
    "dt": ("T", "time step"),
    "energy": ("L^2 T^-2", "kinetic energy per unit mass E = <u.u>/2"),
    "dissipation": ("L^2 T^-3", "dissipation rate eps = 2 nu sum k^2 E(k)"),
    "injection": ("L^2 T^-3", "power injected by the forcing, mean over the last step"),
    "u_rms": ("L T^-1", "r.m.s. velocity u' = sqrt(2E/3)"),
    "taylor_scale": ("L", "Taylor microscale lambda = sqrt(15 nu u'^2/eps)"),
    "re_lambda": ("1", "Taylor-scale Reynolds number u' lambda / nu"),
    "eta": ("L", "Kolmogorov length (nu^3/eps)^(1/4)"),
    "tau_eta": ("T", "Kolmogorov time (nu/eps)^(1/2)"),
    "integral_scale": ("L", "integral scale pi/(2u'^2) int E(k)/k dk"),
    "skewness": ("1", "longitudinal velocity-derivative skewness, mean over the 3 directions"),
    "flatness": ("1", "longitudinal velocity-derivative flatness, mean over the 3 directions"),
    "kmax_eta": ("1", "largest resolved wavenumber after dealiasing times eta"),
    "cfl": ("1", "CFL number dt max(|u|+|v|+|w|)/dx of the last step"),
    "divergence_max": ("T^-1", "max |div u| on the grid"),
    "energy_x": ("L^2 T^-2", "<u_x^2>/2"),
    "energy_y": ("L^2 T^-2", "<u_y^2>/2"),
    "energy_z": ("L^2 T^-2", "<u_z^2>/2"),
    "wall_time": ("s", "wall-clock seconds since the run started"),
}


def shell_count(layout) -> int:
    return int(np.sqrt(3.0) * (layout.n // 2)) + 2


def spectral_statistics(uh, layout, nu):
    """Energy, dissipation, integral scale, component energies and the shell spectrum
    (reduced over ranks). Costs one pass over the Fourier block, no transforms."""
    n_sh = shell_count(layout)
    shells = np.zeros(n_sh)
    comp = np.zeros(3)
    d, inv = ops.spectral_moments(uh, layout.kx, layout.ky, layout.kz, layout.wz, layout.k0,
                                  n_sh, shells, comp)
    packed = layout.sum(np.concatenate([[d, inv], comp, shells]))
    d, inv, comp, shells = packed[0], packed[1], packed[2:5], packed[5:]
    e = float(comp.sum())
    return {"energy": e, "dissipation": 2.0 * nu * d, "inv_k": inv, "components": comp,
            "spectrum": shells}


def derivative_statistics(uh, layout, scratch_phys):
    """Skewness and flatness of du_i/dx_i (three inverse transforms) and max |div u|
    (one more)."""
    s2 = np.zeros(3)
    s3 = np.zeros(3)
    s4 = np.zeros(3)
    for c in range(3):
        ops.derivative_component(uh, layout.kx, layout.ky, layout.kz, c, c, layout.scratch)
        layout.inverse(layout.scratch, scratch_phys)
        s2[c], s3[c], s4[c], _ = ops.power_moments(scratch_phys)
    ops.divergence(uh, layout.kx, layout.ky, layout.kz, layout.scratch)
    layout.inverse(layout.scratch, scratch_phys)
    divmax = layout.max(ops.power_moments(scratch_phys)[3])
    tot = layout.sum(np.concatenate([s2, s3, s4]))
    npts = float(layout.n) ** 3
    m2, m3, m4 = tot[0:3] / npts, tot[3:6] / npts, tot[6:9] / npts
    with np.errstate(divide="ignore", invalid="ignore"):
        skew = float(np.mean(m3 / m2**1.5)) if np.all(m2 > 0) else 0.0
        flat = float(np.mean(m4 / m2**2)) if np.all(m2 > 0) else 0.0
    return {"skewness": skew, "flatness": flat, "divergence_max": float(divmax)}


def derived_scales(energy, dissipation, inv_k, nu, kmax):
    """Scales that follow from E, eps and int E/k dk (Pope 2000; see module docstring)."""
    u2 = 2.0 * energy / 3.0
    out = {"u_rms": np.sqrt(u2)}
    if dissipation > 0:
        lam = np.sqrt(15.0 * nu * u2 / dissipation)
        out.update(taylor_scale=lam, re_lambda=np.sqrt(u2) * lam / nu,
                   eta=(nu**3 / dissipation) ** 0.25, tau_eta=np.sqrt(nu / dissipation))
        out["kmax_eta"] = kmax * out["eta"]
    else:
        out.update(taylor_scale=np.inf, re_lambda=0.0, eta=np.inf, tau_eta=np.inf, kmax_eta=np.inf)
    out["integral_scale"] = np.pi / (2.0 * u2) * inv_k if u2 > 0 else 0.0
    return out
