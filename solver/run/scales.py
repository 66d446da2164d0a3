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
    n = config.grid.points
    k0 = 2 * math.pi / config.grid.length
    return k0 * (math.sqrt(2) * n / 3 if config.fluid.dealias == "phase-shift" else n / 3)


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
