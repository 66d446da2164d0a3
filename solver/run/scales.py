"""Scales a user wants to see before spending time: derived from the config alone
(predicted from the forcing's target dissipation) and, for a built simulation, measured
from the initial field. Definitions as in Pope (2000), Turbulent Flows, ch. 6."""
from __future__ import annotations

import math

from eddybox.solver.errors import ConfigError
from eddybox.solver.fields import eddy_times

# Dissipation constant eps = C_eps u'^3 / L at high Reynolds number, C_eps ~ 0.5
# (Pope 2000, Fig. 6.? / Sreenivasan 1998; "from memory"), used only for the Re_lambda estimate.
C_EPS = 0.5


INTEGRAL_OVER_FORCING_WAVELENGTH = 0.45


def kmax(config) -> float:
    from eddybox.solver.fluid.navier_stokes import DEALIASING

    k0 = 2 * math.pi / config.grid.length
    return k0 * DEALIASING[config.fluid.dealias].kmax_index(config.grid.points)


def forcing_target(config):
    """The dissipation the forcing aims at, or None."""
    f = config.forcing
    if f.kind == "ou":
        if f.dissipation is not None:
            return f.dissipation
        if f.variance is not None:
            from eddybox.forcing.band import full_mode_count

            return 4 * full_mode_count(f.band) * f.variance * f.timescale
        return 0.1
    if f.kind == "linear" and f.dissipation is not None:
        return f.dissipation
    if f.kind == "reinject" and f.mode == "power":
        return f.dissipation
    return None


def predicted(config) -> dict:
    """Kolmogorov scales from the target dissipation; u' and Re_lambda from eps = C_eps u'^3 / L
    with the integral scale L taken as 0.45 of the forcing wavelength 2 pi / (k0 band) (a rough
    estimate)."""
    nu = config.fluid.viscosity
    eps = forcing_target(config)
    out = {"dx": config.grid.length / config.grid.points, "kmax": kmax(config)}
    if eps:
        eta = (nu**3 / eps) ** 0.25
        out.update(target_dissipation=eps, eta=eta, tau_eta=math.sqrt(nu / eps),
                   kmax_eta=out["kmax"] * eta)
        band = getattr(config.forcing, "band", None) or 2.0
        k0 = 2 * math.pi / config.grid.length
        # integral scale ~ 0.45 of the forcing wavelength: what eddybox's own forced runs at
        # band 2 show (L = 1.38 in a 2 pi box); an estimate, not a published constant
        lf = INTEGRAL_OVER_FORCING_WAVELENGTH * 2 * math.pi / (k0 * band)
        u = (eps * lf / C_EPS) ** (1 / 3)
        out.update(u_rms_estimate=u, re_lambda_estimate=u * u * math.sqrt(15 / (nu * eps)),
                   integral_scale_estimate=lf, eddy_time_estimate=lf / u)
    return out


def velocity_estimate(config):
    """(u', where it comes from) to plan the time step with, or (None, why there is none): the
    prediction of `predicted` when the forcing sets a dissipation, else the initial field's
    energy E (u' = sqrt(2E/3)): E_0 of `spectrum`, U_0^2/8 of Taylor-Green, (A^2+B^2+C^2)/2 of
    ABC (box averages of their squared components)."""
    p = predicted(config)
    if "u_rms_estimate" in p:
        return p["u_rms_estimate"], (f"predicted from the forcing's target dissipation (eps = "
                                     f"{C_EPS} u'^3/L, L = {INTEGRAL_OVER_FORCING_WAVELENGTH} x "
                                     "forcing wavelength)")
    init = config.fluid.initial
    energy = {"spectrum": lambda: init.energy, "taylor-green": lambda: init.amplitude**2 / 8,
              "abc": lambda: (init.a**2 + init.b**2 + init.c**2) / 2}.get(init.kind)
    if energy is None or energy() <= 0:
        return None, (f"no target dissipation and no initial energy (fluid.initial.kind "
                      f"{init.kind}) to predict u' from")
    decays = "" if config.forcing.kind != "none" and not config.fluid.frozen else \
        "; the flow decays, so the run takes fewer steps"
    return math.sqrt(2 * energy() / 3), f"from the initial energy, u' = sqrt(2E/3){decays}"


def _target_dissipation(config, option):
    eps = forcing_target(config)
    if not eps:
        raise ConfigError(f"{option}: the config's forcing sets no target dissipation, so eta and "
                          "Re_lambda cannot be predicted; give forcing.dissipation (ou, linear, "
                          "reinject with mode power)")
    return eps


def viscosity_for_kmax_eta(config, kmax_eta, option="--kmax-eta") -> float:
    """The nu at which k_max eta = `kmax_eta` at the config's N and target dissipation eps:
    eta = (nu^3/eps)^(1/4) (Pope 2000, ch. 6) solved for nu = (eps (kmax_eta/k_max)^4)^(1/3)."""
    eps = _target_dissipation(config, option)
    return (eps * (kmax_eta / kmax(config)) ** 4) ** (1.0 / 3.0)


def viscosity_for_re_lambda(config, re_lambda, option="--re-lambda") -> float:
    """The nu at which the predicted Re_lambda = u'^2 sqrt(15/(nu eps)) (Pope 2000, ch. 6:
    lambda = sqrt(15 nu u'^2/eps), Re_lambda = u' lambda/nu) equals `re_lambda`, with u' from
    eps = C_eps u'^3/L at the forcing's eps and L (both independent of nu at high Reynolds
    number): nu = 15 u'^4 / (eps Re_lambda^2)."""
    eps = _target_dissipation(config, option)
    u = predicted(config)["u_rms_estimate"]
    return 15.0 * u**4 / (eps * re_lambda**2)


#: keys whose value may be given in large-eddy turnover times ('x T_E')
EDDY_TIME_KEYS = ("forcing.timescale", "forcing.calibrate")


def eddy_time_keys(config) -> dict:
    """{dotted key: x} for every value given as 'x T_E'."""
    out = {}
    for key in EDDY_TIME_KEYS:
        x = eddy_times(config.get(key))
        if x is not None:
            out[key] = x
    return out


def resolve_eddy_times(config, eddy_time=None, source=None):
    """(config with every 'x T_E' replaced by x T_E in time units, record of what was done).

    T_E = L/u', the large-eddy turnover time with L the integral scale and u' the r.m.s. velocity
    (the definition the report's T_E row uses). It is `eddy_time` when given (a reference run's
    measured stationary mean, say where from in `source`), else the estimate of `predicted`:
    L = 0.45 of the forcing wavelength and u' from eps = C_eps u'^3 / L at the forcing's target
    dissipation (a rough estimate, typically within 30 %)."""
    relative = eddy_time_keys(config)
    if not relative:
        return config, {}
    if eddy_time is None:
        eddy_time = predicted(config).get("eddy_time_estimate")
        source = "predicted from the config (L = 0.45 forcing wavelength, eps = 0.5 u'^3/L)"
        if eddy_time is None:
            key = next(iter(relative))
            raise ConfigError(f"{key}: {config.get(key)!r} needs T_E, which is predicted from the "
                              "forcing's target dissipation; this forcing has none; give the time "
                              "in time units")
    changes = {key: x * eddy_time for key, x in relative.items()}
    record = {"eddy_time": float(eddy_time), "eddy_time_source": source or "given"}
    for key, x in relative.items():
        record[key] = {"given": f"{x:g} T_E", "value": float(changes[key])}
    return config.with_changes(changes), record


def derived_block(config, sim=None) -> dict:
    out = {k: float(v) for k, v in predicted(config).items()}
    out["config_hash"] = config.hash()
    out["physics_hash"] = config.physics_hash()
    if sim is not None:
        from eddybox.solver.fluid.fluid_stats import derived_scales

        sp = sim.spectral_stats()
        d = derived_scales(sp["energy"], sp["dissipation"], sp["inv_k"], sim.nu, sim.nl.kmax())
        out["initial_energy"] = float(sp["energy"])
        out["initial_dissipation"] = float(sp["dissipation"])
        for k in ("u_rms", "eta", "tau_eta", "kmax_eta", "re_lambda", "integral_scale"):
            out[f"initial_{k}"] = float(d[k])
        band = getattr(sim.forcing, "band", None)
        if band is not None:
            out["forced_modes"] = int(band.n_full)
        out["layout"] = sim.layout.kind
        out["ranks"] = int(sim.layout.size)
        if sim.eddy_times:
            out["eddy_times"] = sim.eddy_times
        if getattr(sim, "initial_source", None):
            out["initial_source"] = sim.initial_source
        out.update(sim.forcing.derived())
    return out
