"""`eddybox check`: the resolved config, derived scales, memory and warnings, before any
time is spent."""
from __future__ import annotations

import math

import numpy as np

from eddybox.solver.run import scales
from eddybox.solver.run.inventory import human_bytes, machine_memory, memory_needed, predicted_inventory


def check_lines(cfg) -> list[str]:
    out = [f"config {cfg.source}: valid", f"  {cfg.summary()}", "", "resolved config:"]
    out += ["  " + line for line in cfg.to_yaml().rstrip().splitlines()]
    p = scales.predicted(cfg)
    out += ["", "derived scales (predicted from the config):",
            f"  grid spacing dx            {p['dx']:.5g}",
            f"  k_max after dealiasing     {p['kmax']:.5g}"]
    warnings = []
    if "eta" in p:
        out += [f"  target dissipation eps     {p['target_dissipation']:.5g}  (from forcing)",
                f"  Kolmogorov length eta      {p['eta']:.5g}  = (nu^3/eps)^(1/4)",
                f"  Kolmogorov time tau_eta    {p['tau_eta']:.5g}  = (nu/eps)^(1/2)",
                f"  k_max eta                  {p['kmax_eta']:.3g}",
                f"  u' (estimate)              {p['u_rms_estimate']:.3g}  from eps = {scales.C_EPS} u'^3/L, L = {scales.INTEGRAL_OVER_FORCING_WAVELENGTH} x forcing wavelength",
                f"  Re_lambda (estimate)       {p['re_lambda_estimate']:.3g}  = u'^2 sqrt(15/(nu eps))",
                f"  T_E = L/u' (estimate)      {p['eddy_time_estimate']:.3g}  large-eddy turnover time"]
        _, eddy = scales.resolve_eddy_times(cfg)
        for key, rec in eddy.items():
            if isinstance(rec, dict):
                out.append(f"  {key:26s} {rec['given']} = {rec['value']:.4g}  (with the T_E above)")
        if p["kmax_eta"] < 1.0:
            warnings.append(f"k_max eta = {p['kmax_eta']:.2f} < 1: the dissipation range is not "
                            "resolved; use more grid.points or a larger fluid.viscosity "
                            f"(k_max eta >= 1 needs N >= {_points_for(cfg, 1.0 / p['eta'])})")
    else:
        out.append("  (no target dissipation: Kolmogorov scales are measured during the run)")
    from eddybox.solver.fluid.timestepping import SCHEMES, spectral_cfl_bound

    bound = spectral_cfl_bound(SCHEMES[cfg.time.scheme], cfg.fluid.dealias)
    if cfg.time.cfl > bound:
        warnings.append(f"time.cfl = {cfg.time.cfl} is above {bound:.2f}, the stability bound of "
                        f"{cfg.time.scheme} with {cfg.fluid.dealias} dealiasing for "
                        "pseudo-spectral advection; the run may become unstable (exit code 3)")
    from eddybox.particles.physical import particle_lines

    plines, pwarn = particle_lines(cfg.particles, p)
    out += plines
    warnings += pwarn
    pl, pw = _pair_lines(cfg, p)
    out += pl
    warnings += pw
    inv = predicted_inventory(cfg)
    total = sum(inv.values())
    n3 = cfg.grid.points ** 3
    out += ["", f"memory (one process): {human_bytes(total)}  ({total / n3:.0f} bytes per grid point)"]
    out += [f"  {k:22s} {human_bytes(v)}" for k, v in inv.items()]
    need = memory_needed(cfg)
    peak = sum(need.values())
    out += [f"  at the peak, with the largest temporary arrays and the process itself: "
            f"{human_bytes(peak)} of {human_bytes(machine_memory())} on this machine"]
    out += cost_lines(cfg, total)
    out += ["", "warnings:" if warnings else "warnings: none"] + [f"  - {w}" for w in warnings]
    return out


def _points_for(cfg, kmax) -> int:
    """The smallest N whose dealiased k_max reaches `kmax` with the config's dealiasing."""
    from eddybox.solver.fluid.navier_stokes import DEALIASING

    k0 = 2 * math.pi / cfg.grid.length
    return math.ceil(kmax / (k0 * DEALIASING[cfg.fluid.dealias].kmax_index(1)))


def _pair_lines(cfg, p) -> tuple[list[str], list[str]]:
    """The pair statistics' bins and window, and whether r_max fits the box: in eta units it
    is clipped at the release when it reaches beyond R_CLIP L (a warning here when the predicted
    eta says so; eta is only measured at the release)."""
    pr = cfg.stats.pairs
    if pr.every is None:
        return [], []
    from eddybox.particles.hooks import R_CLIP, clip_separations

    lines = ["", "pair statistics:", f"  {pr.summary()}"]
    if pr.units != "eta":
        return lines, []
    if "eta" not in p:
        lines.append(f"  r_max = {pr.r_max:g} eta is checked against the box at the release, "
                     f"where eta is measured (clipped to {R_CLIP} L if it reaches further)")
        return lines, []
    _, msg = clip_separations(np.array([pr.r_min or pr.r_max / 100.0, pr.r_max]), p["eta"],
                              cfg.grid.length, pr.spacing)
    lines.append(f"  r_max = {pr.r_max:g} eta ~ {pr.r_max * p['eta']:.4g} with the predicted "
                 f"eta (half the box: {0.5 * cfg.grid.length:.4g})")
    return lines, ([f"{msg} with the predicted eta = {p['eta']:.4g}; the run clips it with the "
                    "eta measured at the release"] if msg else [])


def print_check(cfg):
    print("\n".join(check_lines(cfg)))


def cost_lines(cfg, memory_bytes) -> list[str]:
    """What a step costs with the chosen dealiasing: 3-D transforms and their pruned share, and
    the memory per resolved (kept) mode."""
    from eddybox.solver.fluid.navier_stokes import DEALIASING
    from eddybox.solver.study.calibration import STAGES
    from eddybox.solver.study.estimate import pruned_share

    n = cfg.grid.points
    method = DEALIASING[cfg.fluid.dealias]
    evaluations, share = method.evaluations, pruned_share(method.name, n)
    stages = STAGES[cfg.time.scheme]
    kept = method.kept_modes(n)
    return ["", f"cost per step: {stages} stages x {evaluations} product(s) x 9 = "
                f"{stages * evaluations * 9} real 3-D transforms of {n}^3, pruned to {share:.0%} of "
                f"the full transform work ({method.summary})",
            f"resolved modes: {kept} (k_max = {method.kmax_index(n):.4g} x 2 pi/L), "
            f"{memory_bytes / kept:.0f} bytes per resolved mode"]
