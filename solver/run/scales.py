"""Scales a user wants to see before spending time: derived from the config alone
(predicted from the forcing's target dissipation) and, for a built simulation, measured
from the initial field. Definitions as in Pope (2000), Turbulent Flows, ch. 6."""
from __future__ import annotations

import math

# Dissipation constant eps = C_eps u'^3 / L at high Reynolds number, C_eps ~ 0.5
# (Pope 2000, Fig. 6.? / Sreenivasan 1998; "from memory"), used only for the Re_lambda estimate.
C_EPS = 0.5


INTEGRAL_OVER_FORCING_WAVELENGTH = 0.45


def kmax(config) -> float:
    from eddybox.solver.fluid.navier_stokes import DEALIASING

    k0 = 2 * math.pi / config["grid"]["length"]
    return k0 * DEALIASING[config["fluid"]["dealias"]].kmax_index(config["grid"]["points"])


def forcing_target(config):
    """The dissipation the forcing aims at, or None."""
    f = config["forcing"]
    if f["kind"] == "ou":
        if f.get("dissipation") is not None:
            return f["dissipation"]
        if f.get("variance") is not None:
            from eddybox.forcing.band import full_mode_count

            return 4 * full_mode_count(f["band"]) * f["variance"] * f["timescale"]
        return 0.1
    if f["kind"] in ("linear",) and f.get("dissipation") is not None:
        return f["dissipation"]
    if f["kind"] == "reinject" and f["mode"] == "power":
        return f["dissipation"]
    return None


def predicted(config) -> dict:
    """Kolmogorov scales from the target dissipation; u' and Re_lambda from eps = C_eps u'^3 / L
    with the integral scale L taken as 0.45 of the forcing wavelength 2 pi / (k0 band) (a rough
    estimate)."""
    nu = config["fluid"]["viscosity"]
    eps = forcing_target(config)
    out = {"dx": config["grid"]["length"] / config["grid"]["points"], "kmax": kmax(config)}
    if eps:
        eta = (nu**3 / eps) ** 0.25
        out.update(target_dissipation=eps, eta=eta, tau_eta=math.sqrt(nu / eps),
                   kmax_eta=out["kmax"] * eta)
        band = config["forcing"].get("band") or 2.0
        k0 = 2 * math.pi / config["grid"]["length"]
        # integral scale ~ 0.45 of the forcing wavelength: what eddybox's own forced runs at
        # band 2 show (L = 1.38 in a 2 pi box); an estimate, not a published constant
        lf = INTEGRAL_OVER_FORCING_WAVELENGTH * 2 * math.pi / (k0 * band)
        u = (eps * lf / C_EPS) ** (1 / 3)
        out.update(u_rms_estimate=u, re_lambda_estimate=u * u * math.sqrt(15 / (nu * eps)))
    return out


def derived_block(config, sim=None) -> dict:
    out = {k: float(v) for k, v in predicted(config.data).items()}
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
    return out
