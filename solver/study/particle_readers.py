"""Readers of a run folder's per-set and collision results: the detected collision kernel of
``collisions.h5`` beside the kinematic kernel at the same radius, the Lagrangian statistics and
settling velocities of ``particles.h5``, and, for sets given by radius and density, all of them
in physical units (m, s) as well.

Every average is a pooled ratio of sums over the samples of a window with a delta-method error
from blocking of the correlated samples (eddybox.solver.estimators): the detected kernel
Γ = Σ N_c / Σ (pairs/V) Δt, the kinematic kernel at R, K = 2πR² Σ|w_r| / Σ E over the shell
R(1 ± δ), their quotient, and both in Kolmogorov units (Γ τ_η / R³ against Saffman & Turner's
√(8π/15)), normalised sample by sample. Physical values are those Kolmogorov-unit averages times
the physical flow's Kolmogorov scales (eddybox.particles.physical.from_kolmogorov_units); the
collision rate per unit volume is taken at the number densities the run represents, N / V with
the box in physical units L η_phys / η.

    table = collision_table(["runs/a"])          # one row per run and set pair
    sets = set_table(["runs/a"])                 # one row per run and set
    est = lagrangian_average("runs/a", "tracers")  # R_L(τ), T_L, the dispersion, with errors
"""
from __future__ import annotations

import math
from pathlib import Path

import h5py
import numpy as np

from eddybox.particles.collisions import SAFFMAN_TURNER
from eddybox.particles.physical import from_kolmogorov_units
from eddybox.solver.errors import ConfigError
from eddybox.solver.estimators import lagrangian as lag_est
from eddybox.solver.estimators import pairs as est
from eddybox.solver.estimators import timeseries
from eddybox.solver.study.readers import PairTable, open_output

__all__ = ["COLLISION_COLUMNS", "SET_COLUMNS", "read_collision_group", "collision_window",
           "collision_average", "collision_table", "read_lagrangian", "lagrangian_average",
           "set_table"]

_NAN = math.nan


def _text(v):
    return v.decode() if isinstance(v, bytes) else v


def _file(run_dir, name) -> Path:
    p = Path(run_dir)
    return p / name if p.is_dir() else p


def _run_files(run_dirs, names, filename):
    """(run name, run folder, path) of every run that has ``filename``; names default to the
    folder names."""
    run_dirs = list(run_dirs)
    names = list(names) if names is not None else [Path(d).name for d in run_dirs]
    for name, d in zip(names, run_dirs):
        path = _file(d, filename)
        if path.is_file():
            yield name, d, path


# --- detected collisions ----------------------------------------------------------------------
def read_collision_group(path, group: str) -> dict:
    """One /collisions/<group> of collisions.h5: its datasets truncated to the samples all of
    them hold (a run killed between two appends), and ``attrs``."""
    with open_output(path) as f:
        if "collisions" not in f or group not in f["collisions"]:
            raise KeyError(f"{path}: no group /collisions/{group}")
        g = f["collisions"][group]
        n = min(g[k].shape[0] for k in g if isinstance(g[k], h5py.Dataset))
        out = {k: np.asarray(g[k][:n]) for k in g if isinstance(g[k], h5py.Dataset)}
        out["attrs"] = {k: _text(v) for k, v in g.attrs.items()}
    return out


def collision_groups(path) -> list[str]:
    with open_output(path) as f:
        return sorted(f["collisions"].keys()) if "collisions" in f else []


def collision_window(series: dict, t_min: float | None = None) -> est.Window:
    """The averaging window: ``t_min``, else the configured start, else (start: auto) MSER-5 on
    g(R) of the shell after release + 3 τ_p (estimators.pairs.detect_window)."""
    a = series["attrs"]
    if t_min is not None:
        return est.Window(float(t_min), "start")
    if a.get("window") == "start" and math.isfinite(float(a.get("window_start", _NAN))):
        return est.Window(float(a["window_start"]), "start")
    floor = float(a.get("window_floor", -math.inf))
    t = series["time"]
    if t.size == 0:
        return est.Window(floor, "auto", False, floor, "no samples")
    with np.errstate(invalid="ignore", divide="ignore"):
        g = np.where(series["shell_expected"] > 0,
                     series["shell_counts"] / series["shell_expected"], 1.0)
    return est.detect_window(t, g, floor)


def collision_average(series: dict, t_min: float | None = None) -> dict:
    """Pooled averages of one group over its window, each with ``_err``: ``detected`` Γ,
    ``kinematic`` K(R) = 2πR²g⟨|w_r|⟩ and ``kinematic_inward`` 4πR²g⟨w_r⁻⟩ (the inward flux;
    the two agree when ⟨w_r⟩ = 0, i.e. once g(R) is stationary), the ``ratio`` Γ/K, both
    over R³/τ_η (``*_norm``), g(R) and ⟨|w_r|⟩(R) from the shell, and, in Kolmogorov units
    per sample, the numbers the physical values are made from (``*_kolmogorov``)."""
    a = series["attrs"]
    window = collision_window(series, t_min)
    keep = window.mask(series["time"])
    if not keep.any():
        raise ValueError(f"no collision samples in the averaging window {window.describe()}")
    s = {k: np.asarray(v, dtype=float)[keep] for k, v in series.items() if k != "attrs"}
    r = float(a["radius"])
    exposure = float(a["pairs"]) / float(a["volume"]) * s["interval"]  # n_a n_b V dt
    sum_kernel = 2.0 * math.pi * r * r * s["shell_sum_abs"]
    eta, tau = s["eta"], s["tau_eta"]
    norm = tau / r**3  # Γ τ_η / R³ per sample
    out = {"window": window, "samples": int(keep.sum()), "collisions": int(s["collisions"].sum()),
           "t_start": float(s["time"].min()), "t_end": float(s["time"].max()),
           "radius": r, "radius_eta": float(np.mean(s["radius_eta"]))}

    def put(name, e):
        out[name], out[name + "_err"] = float(e.value), float(e.stderr)
        return e

    det = put("detected", est.ratio_estimate(s["collisions"], exposure))
    put("kinematic", est.ratio_estimate(sum_kernel, s["shell_expected"]))
    # the inward-flux form 4πR² g ⟨w_r⁻⟩: what ghost contacts count, equal to K when ⟨w_r⟩ = 0
    put("kinematic_inward", est.ratio_estimate(4.0 * math.pi * r * r * s["shell_sum_inward"],
                                               s["shell_expected"]))
    put("ratio", est.quotient_estimate(s["collisions"], exposure, sum_kernel, s["shell_expected"]))
    with np.errstate(invalid="ignore"):
        put("detected_norm", est.ratio_estimate(s["collisions"] * norm, exposure))
        put("kinematic_norm", est.ratio_estimate(sum_kernel * norm, s["shell_expected"]))
    put("g_contact", est.ratio_estimate(s["shell_counts"], s["shell_expected"]))
    put("wr_abs", est.ratio_estimate(s["shell_sum_abs"], s["shell_counts"]))
    # Kolmogorov units, sample by sample: kernels over eta^3/tau_eta, velocities over
    # eta/tau_eta, the rate per unit volume times eta^3 tau_eta (NaN in a flow at rest)
    with np.errstate(invalid="ignore", divide="ignore"):
        k3, k1, rate = tau / eta**3, tau / eta, eta**3 * tau / float(a["volume"])
        put("detected_kolmogorov", est.ratio_estimate(s["collisions"] * k3, exposure))
        put("kinematic_kolmogorov", est.ratio_estimate(sum_kernel * k3, s["shell_expected"]))
        put("wr_abs_kolmogorov", est.ratio_estimate(s["shell_sum_abs"] * k1, s["shell_counts"]))
        put("rate_kolmogorov", est.ratio_estimate(s["collisions"] * rate, s["interval"]))
    out["converged"] = bool(np.all(det.reliable) and window.accepted)
    return out


#: columns of :func:`collision_table`, with units ('' for text); physical ones are NaN unless
#: both sets are given by radius and density
COLLISION_COLUMNS = {
    "run": "", "set_a": "", "set_b": "", "stokes_a": "1", "stokes_b": "1", "radius": "L",
    "radius_eta": "1", "detected": "L^3 T^-1", "detected_err": "L^3 T^-1",
    "kinematic": "L^3 T^-1", "kinematic_err": "L^3 T^-1", "kinematic_inward": "L^3 T^-1",
    "kinematic_inward_err": "L^3 T^-1", "ratio": "1", "ratio_err": "1",
    "detected_norm": "1", "detected_norm_err": "1", "kinematic_norm": "1",
    "kinematic_norm_err": "1", "saffman_turner_norm": "1", "g_contact": "1",
    "g_contact_err": "1", "wr_abs": "L T^-1", "wr_abs_err": "L T^-1", "collisions": "1",
    "samples": "1", "t_start": "T", "t_end": "T", "window": "", "converged": "1",
    "radius_m": "m", "detected_m3_s": "m^3 s^-1", "detected_m3_s_err": "m^3 s^-1",
    "kinematic_m3_s": "m^3 s^-1", "kinematic_m3_s_err": "m^3 s^-1", "rate_m3_s": "m^-3 s^-1",
    "rate_m3_s_err": "m^-3 s^-1", "wr_abs_m_s": "m s^-1", "wr_abs_m_s_err": "m s^-1",
}


def _physical_collisions(avg: dict, attrs: dict) -> dict:
    """The physical columns of one group (NaN unless both sets are given by radius)."""
    eta_p = float(attrs.get("physical_eta", _NAN))
    tau_p = float(attrs.get("physical_tau_eta", _NAN))
    out = {"radius_m": float(attrs.get("physical_radius", _NAN))}
    for name, (length, time) in (("detected", (3, -1)), ("kinematic", (3, -1)),
                                 ("rate", (-3, -1)), ("wr_abs", (1, -1))):
        col = {"detected": "detected_m3_s", "kinematic": "kinematic_m3_s", "rate": "rate_m3_s",
               "wr_abs": "wr_abs_m_s"}[name]
        for suffix in ("", "_err"):
            out[col + suffix] = float(from_kolmogorov_units(avg[f"{name}_kolmogorov{suffix}"],
                                                            length, time, eta_p, tau_p))
    return out


def collision_table(run_dirs, names=None, t_min: float | None = None) -> PairTable:
    """Every collision group of every run as one tidy table (:data:`COLLISION_COLUMNS`): the
    detected kernel beside the kinematic kernel at the same R, their ratio, both over R³/τ_η
    beside Saffman & Turner's √(8π/15), g and ⟨|w_r|⟩ at contact, and in physical units for
    sets given by radius and density (kernels in m³/s, the collision rate per unit volume in
    m⁻³ s⁻¹, ⟨|w_r|⟩ at contact in m/s). Runs without collisions.h5 add no rows."""
    cols = {k: [] for k in COLLISION_COLUMNS}
    for name, d, path in _run_files(run_dirs, names, "collisions.h5"):
        try:
            groups = [read_collision_group(path, g) for g in collision_groups(path)]
        except (OSError, RuntimeError, KeyError, ValueError, TypeError) as exc:
            raise ConfigError(f"{path}: not a readable collisions file of eddybox ({exc})") from None
        for series in groups:
            a = series["attrs"]
            if series["time"].size == 0:
                continue
            try:
                avg = collision_average(series, t_min)
            except ValueError:
                continue
            row = {"run": name, "set_a": a.get("set_a", ""), "set_b": a.get("set_b", ""),
                   "stokes_a": float(a.get("stokes_a", _NAN)),
                   "stokes_b": float(a.get("stokes_b", _NAN)),
                   "saffman_turner_norm": SAFFMAN_TURNER, "window": avg["window"].describe(),
                   **{k: v for k, v in avg.items() if k in COLLISION_COLUMNS and k != "window"},
                   **_physical_collisions(avg, a)}
            row["converged"] = int(avg["converged"])
            for k in COLLISION_COLUMNS:
                cols[k].append(row[k])
    return PairTable(_typed(cols, COLLISION_COLUMNS, ("collisions", "samples", "converged")),
                     dict(COLLISION_COLUMNS))


def _typed(cols, units, ints=()):
    return {k: np.array(v, dtype=object if units[k] == "" else
                        (np.int64 if k in ints else np.float64)) for k, v in cols.items()}


# --- Lagrangian statistics and settling ---------------------------------------------------------
def read_lagrangian(run_dir, set_name: str) -> tuple[dict, np.ndarray, dict]:
    """(rows, times, attrs) of /sets/<set>/lagrangian of particles.h5 (rows: name -> samples ×
    lags [× 3]), truncated to the samples every dataset holds."""
    path = _file(run_dir, "particles.h5")
    with open_output(path) as f:
        base = f"sets/{set_name}/lagrangian"
        if base not in f:
            raise KeyError(f"{path}: no Lagrangian statistics of set {set_name!r}")
        g = f[base]
        names = [k for k in g if isinstance(g[k], h5py.Dataset) and k not in ("lag", "component")]
        n = min(g[k].shape[0] for k in names)
        rows = {k: np.asarray(g[k][:n]) for k in names}
        attrs = {k: _text(v) for k, v in g.attrs.items()}
    return rows, rows.pop("time"), attrs


def lagrangian_average(run_dir, set_name: str, start: float | None = None,
                       fit_from: float = 2.0 / 3.0) -> lag_est.LagrangianEstimate:
    """R_L(τ), T_L, the mean-square displacement and Taylor's dispersion slope of one set,
    pooled over the particles and time origins at or after ``start`` (default: the run's
    window, ``stats.lagrangian.start``), with errors (estimators.lagrangian)."""
    rows, times, attrs = read_lagrangian(run_dir, set_name)
    if start is None:
        start = float(attrs.get("window_start", -math.inf))
    return lag_est.lagrangian_estimate(rows, times, start, fit_from)


#: columns of :func:`set_table`, with units
SET_COLUMNS = {
    "run": "", "set": "", "stokes": "1", "tau_p": "T", "count": "1",
    "settling": "L T^-1", "settling_err": "L T^-1", "u2": "L^2 T^-2", "u2_err": "L^2 T^-2",
    "t_l": "T", "t_l_err": "T", "dispersion_slope": "L^2 T^-1",
    "dispersion_slope_err": "L^2 T^-1", "taylor_ratio": "1", "taylor_ratio_err": "1",
    "lagrangian_particles": "1",
    "radius_m": "m", "density_kg_m3": "kg m^-3", "tau_p_s": "s", "terminal_m_s": "m s^-1",
    "settling_m_s": "m s^-1", "settling_m_s_err": "m s^-1", "u_rms_m_s": "m s^-1",
    "t_l_s": "s",
}


def _fluid_kolmogorov(run_dir):
    """(times, eta, tau_eta) of fluid.h5's series, or None."""
    path = _file(run_dir, "fluid.h5")
    if not path.is_file():
        return None
    with open_output(path) as f:
        g = f.get("series")
        if g is None or "eta" not in g or "tau_eta" not in g:
            return None
        n = min(g[k].shape[0] for k in ("time", "eta", "tau_eta"))
        return (np.asarray(g["time"][:n]), np.asarray(g["eta"][:n]),
                np.asarray(g["tau_eta"][:n]))


def _stationary(times, values):
    """(mean, stderr) of a series by MSER-5 and blocking, NaN when it cannot be estimated."""
    v = np.asarray(values, dtype=float)
    if v.size < 2 or not np.all(np.isfinite(v)):
        return _NAN, _NAN
    try:
        s = timeseries.stationary_summary(times, v)
    except ValueError:
        return _NAN, _NAN
    return s.mean, s.stderr


def set_table(run_dirs, names=None) -> PairTable:
    """One row per run and particle set (:data:`SET_COLUMNS`): the mean settling velocity
    (stationary mean of particles.h5's series, MSER-5 and blocking), u′², T_L, the dispersion
    slope and its Taylor ratio (when stats.lagrangian ran), and, for sets given by radius and
    density, the same in physical units: the Stokes terminal velocity τ_p g and the measured
    settling velocity in m/s (divided by the simulation's u_η sample by sample), u′ in m/s and
    T_L in s (through the window's mean Kolmogorov scales)."""
    cols = {k: [] for k in SET_COLUMNS}
    for name, d, path in _run_files(run_dirs, names, "particles.h5"):
        fluid = _fluid_kolmogorov(d)
        with open_output(path) as f:
            sets = {k: ({a: _text(v) for a, v in g.attrs.items()},
                        {s: np.asarray(g["series"][s][()]) for s in ("time", "settling_velocity")}
                        if "series" in g else None, "lagrangian" in g)
                    for k, g in f.get("sets", {}).items()}
        for set_name, (attrs, series, has_lag) in sets.items():
            row = {k: _NAN for k in SET_COLUMNS}
            row.update(run=name, set=set_name, stokes=float(attrs.get("stokes", _NAN)),
                       tau_p=float(attrs.get("tau_p", _NAN)), count=int(attrs.get("count", 0)),
                       lagrangian_particles=0)
            u_eta_norm = None
            if series is not None and series["time"].size:
                n = min(series["time"].size, series["settling_velocity"].size)
                t, v = series["time"][:n], series["settling_velocity"][:n]
                row["settling"], row["settling_err"] = _stationary(t, v)
                if fluid is not None:
                    u_eta = np.interp(t, fluid[0], fluid[1] / fluid[2])
                    u_eta_norm = (t, v / u_eta)
            lag_start = -math.inf
            if has_lag:
                lag_attrs = read_lagrangian(d, set_name)[2]
                lag_start = float(lag_attrs.get("window_start", -math.inf))
                e = lagrangian_average(d, set_name)
                row.update(u2=e.u2, u2_err=e.u2_err, t_l=e.t_l, t_l_err=e.t_l_err,
                           dispersion_slope=e.slope, dispersion_slope_err=e.slope_err,
                           taylor_ratio=e.taylor_ratio, taylor_ratio_err=e.taylor_ratio_err,
                           lagrangian_particles=int(lag_attrs.get("particles", 0)))
            if "physical_eta" in attrs:
                row.update(_physical_set(attrs, row, u_eta_norm, fluid, lag_start))
            for k in SET_COLUMNS:
                cols[k].append(row[k])
    return PairTable(_typed(cols, SET_COLUMNS, ("count", "lagrangian_particles")),
                     dict(SET_COLUMNS))


def _physical_set(attrs, row, u_eta_norm, fluid, lag_start) -> dict:
    eta_p, tau_p = float(attrs["physical_eta"]), float(attrs["physical_tau_eta"])
    out = {"radius_m": float(attrs.get("physical_radius", _NAN)),
           "density_kg_m3": float(attrs.get("physical_density", _NAN)),
           "tau_p_s": float(attrs.get("physical_tau_p", _NAN)),
           "terminal_m_s": float(attrs.get("physical_settling_velocity", _NAN))}
    if u_eta_norm is not None:
        m, e = _stationary(*u_eta_norm)
        out["settling_m_s"] = float(from_kolmogorov_units(m, 1, -1, eta_p, tau_p))
        out["settling_m_s_err"] = float(from_kolmogorov_units(e, 1, -1, eta_p, tau_p))
    if fluid is not None and np.isfinite(row["u2"]):
        window = fluid[0] >= lag_start if np.any(fluid[0] >= lag_start) else slice(None)
        eta_s, tau_s = float(np.mean(fluid[1][window])), float(np.mean(fluid[2][window]))
        out["u_rms_m_s"] = float(from_kolmogorov_units(math.sqrt(row["u2"]) * tau_s / eta_s, 1,
                                                       -1, eta_p, tau_p))
        out["t_l_s"] = float(from_kolmogorov_units(row["t_l"] / tau_s, 0, 1, eta_p, tau_p))
    return out
