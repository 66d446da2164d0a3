"""`eddybox check`: the resolved config, derived scales, memory and warnings, before any
time is spent."""
from __future__ import annotations

from eddybox.solver.run import scales
from eddybox.solver.run.config_warnings import config_warnings
from eddybox.solver.run.inventory import human_bytes, machine_memory, memory_needed, predicted_inventory


def check_lines(cfg) -> list[str]:
    out = [f"config {cfg.source}: valid", f"  {cfg.summary()}", "", "resolved config:"]
    out += ["  " + line for line in cfg.to_yaml().rstrip().splitlines()]
    p = scales.predicted(cfg)
    out += ["", "derived scales (predicted from the config):",
            f"  grid spacing dx            {p['dx']:.5g}",
            f"  k_max after dealiasing     {p['kmax']:.5g}"]
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
    else:
        out.append("  (no target dissipation: Kolmogorov scales are measured during the run)")
    from eddybox.particles.physical import particle_lines

    out += particle_lines(cfg.particles, p)
    out += _pair_lines(cfg, p)
    out += memory_lines(cfg)
    out += cost_lines(cfg, sum(predicted_inventory(cfg).values()))
    out += plan_lines(cfg)
    warnings = config_warnings(cfg)  # the list `run` logs
    out += ["", "warnings:" if warnings else "warnings: none"] + [f"  - {w}" for w in warnings]
    return out


def _pair_lines(cfg, p) -> list[str]:
    """The pair statistics' bins and window, and where r_max lies in the box: in eta units it
    is clipped at the release when it reaches beyond R_CLIP L (warned by config_warnings when
    the predicted eta says so; eta is only measured at the release)."""
    pr = cfg.stats.pairs
    if pr.every is None:
        return []
    from eddybox.particles.hooks import R_CLIP

    lines = ["", "pair statistics:", f"  {pr.summary()}"]
    if pr.units != "eta":
        return lines
    if "eta" not in p:
        lines.append(f"  r_max = {pr.r_max:g} eta is checked against the box at the release, "
                     f"where eta is measured (clipped to {R_CLIP} L if it reaches further)")
        return lines
    lines.append(f"  r_max = {pr.r_max:g} eta ~ {pr.r_max * p['eta']:.4g} with the predicted "
                 f"eta (half the box: {0.5 * cfg.grid.length:.4g})")
    return lines


def memory_lines(cfg) -> list[str]:
    """The peak of one process (the figure `run` refuses with) and its parts."""
    need = memory_needed(cfg)
    peak = sum(need.values())
    arrays = sum(predicted_inventory(cfg).values())
    n3 = cfg.grid.points ** 3
    return ["", f"memory at the peak (one process): {human_bytes(peak)} of "
                f"{human_bytes(machine_memory())} on this machine (lasting arrays: "
                f"{arrays / n3:.0f} bytes per grid point)"] + \
        [f"  {k:22s} {human_bytes(v)}" for k, v in need.items()] + \
        ["  (the lasting arrays, the largest short-lived one, start-up included, and eddybox "
         "itself)"]


def plan_lines(cfg) -> list[str]:
    """The number of steps, the wall time and the core-hours of the run on this machine (one
    process), from the cached calibration or a short measurement, with the assumptions."""
    from eddybox.solver.study.calibration import CalibrationError, machine_calibration
    from eddybox.solver.study.estimate import assumption_lines, estimate, time_lines

    try:
        cal, how = machine_calibration()
    except (CalibrationError, OSError) as exc:  # a busy machine; no room for the short runs
        return ["", f"plan: not available ({exc})"]
    e = estimate(cfg, cfg.grid.points, 1, cal=cal)
    out = ["", f"plan on this machine (one process, {e['threads_per_rank']} thread(s)):"]
    out += time_lines(e, cfg)
    out += ["  assumptions:"] + [f"    {a}" for a in assumption_lines(e, how, here=True)
                                        if not a.startswith("memory")]
    return out


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
