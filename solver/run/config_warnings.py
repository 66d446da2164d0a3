"""What a config risks, said before it runs: every warning `eddybox check` prints and `run`
logs (one list, so the two cannot drift). A warning never stops a run; refusals are
ConfigErrors elsewhere."""
from __future__ import annotations

import math

import numpy as np

from eddybox.solver.run import scales


def config_warnings(cfg) -> list[str]:
    """The warnings for the validated config `cfg`, from the config alone (no time step)."""
    p = scales.predicted(cfg)
    out = []
    if "eta" in p and p["kmax_eta"] < 1.0:
        out.append(f"k_max eta = {p['kmax_eta']:.2f} < 1: the dissipation range is not resolved; "
                   "use more grid.points or a larger fluid.viscosity (k_max eta >= 1 needs N >= "
                   f"{points_for_kmax(cfg, 1.0 / p['eta'])})")
    out += _cfl_warnings(cfg)
    out += _calibration_warnings(cfg)
    out += _particle_warnings(cfg)
    out += _pair_warnings(cfg, p)
    out += _collision_warnings(cfg, p)
    return out


def points_for_kmax(cfg, kmax) -> int:
    """The smallest N whose dealiased k_max reaches `kmax` with the config's dealiasing."""
    from eddybox.solver.fluid.navier_stokes import DEALIASING

    k0 = 2 * math.pi / cfg.grid.length
    return math.ceil(kmax / (k0 * DEALIASING[cfg.fluid.dealias].kmax_index(1)))


def _cfl_warnings(cfg) -> list[str]:
    from eddybox.solver.fluid.timestepping import SCHEMES, spectral_cfl_bound

    bound = spectral_cfl_bound(SCHEMES[cfg.time.scheme], cfg.fluid.dealias)
    if cfg.time.cfl <= bound:
        return []
    return [f"time.cfl = {cfg.time.cfl} is above {bound:.2f}, the stability bound of "
            f"{cfg.time.scheme} with {cfg.fluid.dealias} dealiasing for pseudo-spectral "
            "advection; the run may become unstable (exit code 3)"]


#: a calibration window shorter than this many forcing time scales leaves too few independent
#: power samples after the spin-up: at 32^3, a window of 3 T_F gave eps 28 % below target while
#: the recorded error said a few per cent; windows of 15 T_F came within 3 % (issue 12's runs)
CALIBRATION_MIN_TIMESCALES = 10.0


def _calibration_warnings(cfg) -> list[str]:
    """An OU calibration window too short for its forcing time scale, or one that the run's end
    or the particles' release falls inside (the forcing still changes there)."""
    from eddybox.solver.errors import ConfigError

    f = cfg.forcing
    if getattr(f, "calibrate", None) is None or getattr(f, "timescale", None) is None:
        return []
    try:
        resolved, record = scales.resolve_eddy_times(cfg)
    except ConfigError:  # T_E cannot be predicted: the refusal comes from the config check
        return []
    window, t_f = float(resolved.forcing.calibrate), float(resolved.forcing.timescale)

    def given(v):  # a value as the user gave it: 'x T_E' or a short number
        return v if isinstance(v, str) else f"{v:.4g}"

    out = []
    if window < CALIBRATION_MIN_TIMESCALES * t_f:
        least = CALIBRATION_MIN_TIMESCALES * t_f
        least = f"{least / record['eddy_time']:.3g} T_E" if isinstance(f.calibrate, str) else f"{least:.4g}"
        out.append(f"forcing.calibrate = {given(f.calibrate)} spans {window / t_f:.3g} forcing "
                   f"time scales (forcing.timescale = {given(f.timescale)}); below "
                   f"{CALIBRATION_MIN_TIMESCALES:g} T_F the calibrated variance can miss the "
                   f"target dissipation by more than its recorded error; use forcing.calibrate "
                   f">= {least}")
    if cfg.time.end <= window:
        out.append(f"time.end = {cfg.time.end:g} is within the calibration window (forcing."
                   f"calibrate = {given(f.calibrate)} = {window:.4g}): the run measures nothing "
                   "at the calibrated forcing")
    elif cfg.particles.sets and cfg.particles.release < window:
        out.append(f"particles.release = {cfg.particles.release:g} is inside the calibration "
                   f"window (to t = {window:.4g}): the particles first see a forcing whose "
                   "variance still changes; release them after the window")
    return out


def _particle_warnings(cfg) -> list[str]:
    """Sets given in physical units outside the point-particle model's range."""
    p = cfg.particles
    if not p.sets:
        return []
    from eddybox.particles.physical import physical_numbers, point_particle_warnings

    out = []
    for s in p.sets:
        if s.radius is not None:
            out += point_particle_warnings(s.name, physical_numbers(s.radius, s.density, p.physical))
    return out


def _pair_warnings(cfg, p) -> list[str]:
    """r_max in eta units beyond R_CLIP L with the predicted eta (the run clips it at the
    release, where eta is measured)."""
    pr = cfg.stats.pairs
    if pr.every is None or not cfg.particles.sets or pr.units != "eta" or "eta" not in p:
        return []
    from eddybox.particles.hooks import clip_separations

    _, msg = clip_separations(np.array([pr.r_min or pr.r_max / 100.0, pr.r_max]), p["eta"],
                              cfg.grid.length, pr.spacing)
    return ([f"{msg} with the predicted eta = {p['eta']:.4g}; the run clips it with the eta "
             "measured at the release"] if msg else [])


def _collision_warnings(cfg, p) -> list[str]:
    """A collision radius in eta units (or from physical radii) that, with the predicted eta,
    reaches the quarter box the run refuses at the release, where eta is measured."""
    col = cfg.stats.collisions
    if col.every is None or not cfg.particles.sets or "eta" not in p:
        return []
    if col.radius is not None:
        if col.units != "eta":
            return []
        r, what = col.radius * p["eta"], f"stats.collisions.radius = {col.radius:g} eta"
    else:
        from eddybox.particles.physical import physical_numbers

        phys = cfg.particles.physical
        largest = max(s.radius for s in cfg.particles.sets if s.radius is not None)
        eta_phys = physical_numbers(largest, 1000.0, phys)["eta"]
        r, what = 2 * largest / eta_phys * p["eta"], "the sum of the largest radii"
    if r * (1.0 + col.shell) < 0.25 * cfg.grid.length:
        return []
    return [f"{what} is {r:.4g} L with the predicted eta = {p['eta']:.4g}; the run refuses "
            f"R (1 + shell) beyond a quarter of the box ({0.25 * cfg.grid.length:.4g}) at the "
            "release"]
