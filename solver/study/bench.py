"""`eddybox bench`: performance ratios measured side by side in one run on this machine.

Sections (each a function returning a dict of named figures):
  fluid      one RK4 step against the FFT floor (the same plans doing only the 36 real 3-D
             transforms of a step: the pruned ones the step uses, and the full ones), the step
             with today's full transforms, a straightforward numpy.fft step with temporary
             arrays, and peak memory per grid point for RK4 and low-storage RK3
  resolution the time to advance one large-eddy turnover at k_max eta = 1.5 and eps = 0.1 with
             each dealiasing option at the N it needs, against the 2/3 rule with full
             transforms (the default before pruning), and memory per resolved mode
  particles  order-8 interpolation of three components (eddybox.solver.study.bench_interp):
             today's kernel and the interleaved copies; and one step of 10^6 particles
             (order 8, tau_p = 0.05) against the 128^3 fluid step of the same run
  pairs      pair statistics against a cKDTree + numpy pipeline (eddybox.solver.study.bench_pairs)
  collisions one step of collision detection against one pair-statistics sample of the same
             particles, and the Lagrangian statistics' memory per particle
             (eddybox.solver.study.bench_collisions)
  scaling    strong scaling over MPI ranks and bytes moved by the transposes
  estimate   accuracy of `eddybox estimate` against measured runs
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from eddybox.solver.run.output import write_json_atomic
from eddybox.solver.study.calibration import (
    benchmark_simulation,
    best_time,
    best_times,
    calibrate,
    calibration_path,
    load_calibration,
    measure_fluid_points,
    peak_rss_bytes,
    save_calibration,
    transform_floor,
)

BENCHES: dict[str, callable] = {}
#: the cost-model calibration measured by the `estimate` section, saved for `eddybox estimate`
_LAST_CALIBRATION: dict = {}


def register(name):
    def deco(fn):
        BENCHES[name] = fn
        return fn

    return deco


def numpy_reference_step(uh, kx, ky, kz, nu, dt, n):
    """RK4 with integrating factor written the straightforward way: numpy.fft and temporary
    arrays everywhere (what a first implementation looks like). Returns the new uh."""
    k2 = kx[:, None, None] ** 2 + ky[None, :, None] ** 2 + kz[None, None, :] ** 2
    kvec = [kx[:, None, None], ky[None, :, None], kz[None, None, :]]
    k2s = np.where(k2 == 0, 1.0, k2)
    ik = np.abs(np.fft.fftfreq(n, 1.0 / n))
    keep = (3 * ik[:, None, None] < n) & (3 * ik[None, :, None] < n) & (3 * np.arange(n // 2 + 1)[None, None, :] < n)

    def rhs(v):
        u = np.fft.irfftn(v, s=(n, n, n), axes=(1, 2, 3)) * n**3
        w = np.stack([1j * (kvec[1] * v[2] - kvec[2] * v[1]), 1j * (kvec[2] * v[0] - kvec[0] * v[2]),
                      1j * (kvec[0] * v[1] - kvec[1] * v[0])])
        w = np.fft.irfftn(w, s=(n, n, n), axes=(1, 2, 3)) * n**3
        c = np.cross(u, w, axis=0)
        ch = np.fft.rfftn(c, axes=(1, 2, 3)) / n**3 * keep
        d = (kvec[0] * ch[0] + kvec[1] * ch[1] + kvec[2] * ch[2]) / k2s
        return np.stack([ch[i] - kvec[i] * d for i in range(3)])

    e = np.exp(-nu * k2 * dt)
    eh = np.exp(-nu * k2 * dt / 2)
    k1 = rhs(uh)
    k2_ = rhs(eh * (uh + dt / 2 * k1))
    k3 = rhs(eh * uh + dt / 2 * k2_)
    k4 = rhs(e * uh + dt * eh * k3)
    return e * uh + dt / 6 * (e * k1 + 2 * eh * k2_ + 2 * eh * k3 + k4)


def _fluid_point(n, repeats, with_numpy):
    sim = benchmark_simulation(n)
    full = benchmark_simulation(n, pruned=False)
    sim.advance()  # compile kernels, warm caches
    full.advance()
    lay = sim.layout
    t = best_times({"step": sim.advance, "step_full": full.advance,
                    "floor_pruned": transform_floor(sim), "floor_full": transform_floor(sim, False)},
                   repeats)
    out = {f"step_seconds_{n}": t["step"], f"step_seconds_full_transforms_{n}": t["step_full"],
           f"pruned_step_speedup_{n}": t["step_full"] / t["step"],
           f"fft_floor_pruned_seconds_{n}": t["floor_pruned"],
           f"fft_floor_full_seconds_{n}": t["floor_full"],
           f"step_over_fft_floor_{n}": t["step"] / t["floor_pruned"],
           f"step_over_full_fft_floor_{n}": t["step"] / t["floor_full"]}
    t_step = t["step"]
    if with_numpy:
        uh = sim.uh.copy()
        t_np = best_time(lambda: numpy_reference_step(uh, lay.kx, lay.ky, lay.kz, sim.nu, 1e-3, n),
                     max(1, repeats // 2))
        out[f"numpy_step_seconds_{n}"] = t_np
        out[f"step_speedup_vs_numpy_{n}"] = t_np / t_step
    return out


def peak_bytes_per_point(n, scheme, n_small=None):
    """Memory per grid point: the growth of the peak resident memory between an n_small^3 and
    an n^3 run, divided by the growth in points (the interpreter, libraries and compiled
    kernels cancel out; this is what decides whether 512^3 fits)."""
    n_small = n_small or max(16, n // 4)
    big, small = peak_rss_bytes(n, scheme), peak_rss_bytes(n_small, scheme)
    return (big - small) / float(n**3 - n_small**3)


@register("fluid")
def bench_fluid(quick=False):
    sizes = (64,) if quick else (64, 128)
    out = {}
    for n in sizes:
        out.update(_fluid_point(n, 2 if quick else 3, with_numpy=True))
    big = sizes[-1]
    out["fft_floor"] = "pruned: the 36 transforms of the step as it runs them (band-limited)"
    out["step_over_fft_floor"] = out[f"step_over_fft_floor_{big}"]
    out["step_over_full_fft_floor"] = out[f"step_over_full_fft_floor_{big}"]
    out["step_speedup_vs_numpy"] = out[f"step_speedup_vs_numpy_{big}"]
    out["bytes_per_point_rk4"] = peak_bytes_per_point(big, "rk4")
    out["bytes_per_point_rk3"] = peak_bytes_per_point(big, "rk3")
    out["bytes_per_point"] = out["bytes_per_point_rk4"]
    return out


#: the options of the resolution section: (dealias, pruned transforms)
RESOLUTION_OPTIONS = {"two-thirds-full": ("two-thirds", False), "two-thirds": ("two-thirds", True),
                      "phase-shift": ("phase-shift", True), "stage-shift": ("stage-shift", True),
                      "stage-shift-full": ("stage-shift", False)}


@register("resolution")
def bench_resolution(quick=False, kmax_eta=1.5, eps=0.1):
    """One large-eddy turnover at k_max eta = 1.5 and eps = 0.1 with each dealiasing option.

    nu is fixed by the baseline: the 2/3 rule at N (128, or 64 with --quick) reaches k_max eta
    = 1.5 at eps. Every other option runs at the smallest FFT-friendly N whose k_max reaches
    the same (within 1 %). All take the same physical time step (the CFL step of the baseline:
    the same k_max and u'), so the steps per turnover T_E = L/u' (u', L predicted from eps as
    in `eddybox check`) are the same, and the time per turnover is steps x the measured step
    time; the options' step times are measured side by side, repeats interleaved.
    Memory per resolved mode: the solver's arrays (run.inventory) over the kept modes."""
    from eddybox.solver.fluid.navier_stokes import DEALIASING
    from eddybox.solver.run import scales
    from eddybox.solver.run.config import validate
    from eddybox.solver.run.inventory import predicted_inventory
    from eddybox.solver.study.estimate import fft_friendly

    n_ref = 64 if quick else 128
    kmax = n_ref / 3.0
    eta = kmax_eta / kmax
    nu = (eta**4 * eps) ** (1.0 / 3.0)
    sims, out = {}, {"kmax_eta": kmax_eta, "dissipation": eps, "viscosity": nu}
    for name, (dealias, pruned) in RESOLUTION_OPTIONS.items():
        method = DEALIASING[dealias]
        n = n_ref if dealias == "two-thirds" else fft_friendly(0.99 * kmax / method.kmax_index(1))
        sims[name] = benchmark_simulation(n, dealias=dealias, viscosity=nu, pruned=pruned)
        sims[name].advance()
        out[f"points_{name}"] = n
        out[f"kmax_eta_{name}"] = method.kmax_index(n) * eta
        cfg = validate({"grid": {"points": n}, "fluid": {"dealias": dealias}})
        out[f"bytes_per_resolved_mode_{name}"] = (sum(predicted_inventory(cfg).values())
                                                  / method.kept_modes(n))
    t = best_times({k: s.advance for k, s in sims.items()}, 2 if quick else 3)
    pred = scales.predicted(validate({"grid": {"points": n_ref}, "fluid": {"viscosity": nu},
                                      "forcing": {"kind": "ou", "band": 2.0,
                                                  "dissipation": eps}}))
    u = pred["u_rms_estimate"]
    turnover = scales.INTEGRAL_OVER_FORCING_WAVELENGTH * 2 * np.pi / 2.0 / u  # L/u', band 2
    dt = 0.6 * (2 * np.pi / n_ref) / (6.0 * u)  # the default time.cfl, U_max = 6 u'
    steps = turnover / dt
    out["steps_per_turnover"] = steps
    base = t["two-thirds-full"] * steps
    for name in sims:
        out[f"step_seconds_{name}"] = t[name]
        out[f"seconds_per_turnover_{name}"] = t[name] * steps
        out[f"speedup_vs_two_thirds_full_{name}"] = base / (t[name] * steps)
    out["physics_check"] = ("tests/test_stage_shift.py: stage-shift 48^3 against the 2/3 rule at "
                            "68^3 (same k_max), eps, Re_lambda, skewness, spectrum to 0.8 k_max "
                            "within 2 %")
    return out


@register("particles")
def bench_particles(quick=False):
    from eddybox.solver.study.bench_interp import bench_interpolation

    n, count = (64, 2 * 10**5) if quick else (128, 10**6)
    out = bench_interpolation(n_particles=count, n=n)
    out.update(particle_step_point(n, count))
    return out


def particle_step_point(n, count, order=8, tau_p=0.05):
    """Seconds per step of the particles (inverse transform and interleaved copy of the
    velocity, integrator, interpolations, and the re-sort by cell once in SORT_EVERY steps)
    against the fluid step of the same run, measured step by step in turn over SORT_EVERY
    steps per particle scheme: the run loop's (multistep ETD2, one interpolation per step)
    and ETD2RK (two)."""
    from eddybox.particles import integrator
    from eddybox.particles.system import SCHEME, SORT_EVERY

    sim = benchmark_simulation(n, particles=count, order=order, tau_p=tau_p)
    sim.advance()  # compile, warm caches, the first (ETD2RK) particle step
    parts = sim.particles
    fluid, per_scheme = [], {}
    for name in (SCHEME, "etd2rk"):
        parts.scheme = integrator.PARTICLE_SCHEMES[name]()
        times = per_scheme[name] = []
        for _ in range(SORT_EVERY):  # one re-sort in every SORT_EVERY steps
            t0 = time.perf_counter()
            dt = sim.scheme.step(sim.uh, sim.forcing, sim._choose_dt, sim)
            sim.forcing.end_step(sim, dt)
            fluid.append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            parts.advance(sim, dt)
            times.append(time.perf_counter() - t0)
            sim.t += dt
            sim.step += 1
    parts.scheme = integrator.PARTICLE_SCHEMES[SCHEME]()
    t_fluid = float(np.median(fluid))
    one, two = float(np.mean(per_scheme[SCHEME])), float(np.mean(per_scheme["etd2rk"]))
    return {"particle_step_particles": count, "particle_step_grid": n,
            "fluid_step_seconds": t_fluid, "particle_step_seconds": one,
            "particle_step_seconds_two_interpolations": two,
            "particle_step_over_fluid_step": one / t_fluid,
            "particle_step_over_fluid_step_two_interpolations": two / t_fluid}


@register("pairs")
def bench_pairs_section(quick=False):
    from eddybox.solver.study.bench_pairs import bench_pairs

    return bench_pairs(n_particles=10**5 if quick else 10**6, repeats=2 if quick else 1)


@register("collisions")
def bench_collisions_section(quick=False):
    from eddybox.solver.study.bench_collisions import bench_collisions, bench_lagrangian_memory

    out = bench_collisions(n_particles=2 * 10**4 if quick else 10**5,
                           repeats=3 if quick else 5)
    out.update(bench_lagrangian_memory(particles=2000, lags=20 if quick else 100))
    return out


def particle_seconds(cal, figures) -> float:
    """Seconds per particle and step (order 8) from the particles section's measured step, less
    the three inverse transforms of the velocity that the cost model prices on their own."""
    n3 = float(figures["particle_step_grid"]) ** 3
    step = figures["particle_step_seconds"]
    rest = step - 3 * cal["fluid_model"]["a"] * n3 * np.log2(n3)
    return (rest if rest > 0 else step) / figures["particle_step_particles"]


def _check_json_target(path):
    """--json may replace only an earlier bench's figures (a JSON object with its "machine"
    entry), so a file of the user's is never overwritten; checked before any section runs."""
    from eddybox.solver.errors import ConfigError

    target = Path(path)
    if target.exists():
        try:
            old = json.loads(target.read_text())
            ours = isinstance(old, dict) and isinstance(old.get("machine"), dict)
        except (OSError, ValueError, UnicodeDecodeError):
            ours = False
        if not ours:
            raise ConfigError(f"--json {path}: exists and is not the figures of an earlier eddybox "
                              "bench; give a new file name")
    parent = target.parent if str(target.parent) else Path(".")
    if not parent.is_dir() or not os.access(parent, os.W_OK):
        raise ConfigError(f"--json {path}: cannot write there (no such folder, or not writable)")


def run_bench(quick=False, json_path=None, sections=None) -> int:
    import platform

    from eddybox.solver.fluid.fft import available_cores, thread_count

    if json_path:
        _check_json_target(json_path)

    results = {"machine": {"cores": available_cores(), "threads": thread_count(),
                           "python": platform.python_version(), "quick": bool(quick)}}
    for name, fn in BENCHES.items():
        if sections and name not in sections:
            continue
        t0 = time.perf_counter()
        print(f"[bench] {name} ...", flush=True)
        try:
            res = fn(quick=quick)
        except Exception as exc:  # noqa: BLE001 - a failing section is reported, not fatal
            res = {"error": f"{type(exc).__name__}: {exc}"}
        res["section_seconds"] = time.perf_counter() - t0
        results[name] = res
        for k, v in res.items():
            print(f"  {k:40s} {v:.4g}" if isinstance(v, (int, float)) else f"  {k:40s} {v}", flush=True)
    if _LAST_CALIBRATION:
        cal = dict(_LAST_CALIBRATION)
        part = results.get("particles", {})
        if part.get("interp_particles_per_second"):
            cal["interp_seconds_per_particle"] = 1.0 / part["interp_particles_per_second"]
        if part.get("particle_step_seconds"):
            cal["particle_seconds"] = particle_seconds(cal, part)
        if results.get("pairs", {}).get("pairs_per_second"):
            cal["pair_seconds"] = 1.0 / results["pairs"]["pairs_per_second"]
        # figures of sections not run this time: kept from the calibration they replace
        old = load_calibration() or {}
        for k in ("interp_seconds_per_particle", "particle_seconds", "pair_seconds"):
            if k not in cal and k in old:
                cal[k] = old[k]
        save_calibration(cal)
        print(f"cost-model calibration written to {calibration_path()} (used by eddybox check "
              "and estimate)")
    if json_path:
        write_json_atomic(json_path, results, indent=2, default=float)
        print(f"figures written to {json_path}")
    return 0


if __name__ == "__main__":  # pragma: no cover
    run_bench(quick="--quick" in sys.argv)


def _mpi_step_seconds(n, ranks, repeats=3, layout="auto"):
    """Median-free best step time of an n^3 RK4 step on `ranks` MPI ranks (1 thread each),
    and the bytes each rank sends per step in the transposes."""
    code = (
        "import json, os\n"
        "from mpi4py import MPI\n"
        "from eddybox.solver.run.config import validate\n"
        "from eddybox.solver.run.simulation import Simulation\n"
        "import tempfile\n"
        "comm = MPI.COMM_WORLD\n"
        "out = comm.bcast(tempfile.mkdtemp(prefix='eddybox-scal-') if comm.rank == 0 else None)\n"
        f"cfg = validate({{'name': 'scal', 'grid': {{'points': {n}}}, 'fluid': {{'viscosity': 0.01}},"
        f" 'forcing': {{'kind': 'ou', 'band': 2.0, 'dissipation': 0.1}}, 'time': {{'end': 1e9}},"
        f" 'stats': {{'fluid': {{'every': None}}, 'spectra': {{'every': None}}}},"
        f" 'parallel': {{'layout': {layout!r}}}, 'output': out}})\n"
        "sim = Simulation(cfg, overwrite=True, quiet=True, comm=comm if comm.size > 1 else None)\n"
        "sim.advance()\n"
        "import time\n"
        "best = 1e30\n"
        f"for _ in range({repeats}):\n"
        "    comm.Barrier(); t0 = time.perf_counter(); sim.advance(); comm.Barrier()\n"
        "    best = min(best, time.perf_counter() - t0)\n"
        "moved = sim.nl.bytes_moved_per_transform()\n"
        "full = sim.layout.bytes_moved_per_transform() if hasattr(sim.layout, 'bytes_moved_per_transform') else 0\n"

        "if comm.rank == 0: print(json.dumps({'seconds': best, 'bytes_per_transform': moved,"
        " 'bytes_per_transform_full': full, 'layout': sim.layout.summary()}))\n")
    env = dict(os.environ, EDDYBOX_THREADS="1")
    mpiexec = os.path.join(os.path.dirname(sys.executable), "mpiexec")
    cmd = [mpiexec, "-n", str(ranks), sys.executable, "-c", code]
    r = subprocess.run(cmd, capture_output=True, text=True, timeout=3600, env=env)
    if r.returncode != 0:
        raise RuntimeError(r.stderr[-2000:])
    return json.loads(r.stdout.strip().splitlines()[-1])


@register("scaling")
def bench_scaling(quick=False):
    """Strong scaling at 128^3 (64^3 with --quick) on 1, 2 and (oversubscribed) 4 ranks."""
    n = 64 if quick else 128
    out = {"scaling_points": n}
    base = None
    for p in (1, 2, 4):
        res = _mpi_step_seconds(n, p, repeats=2 if quick else 3)
        t = res["seconds"]
        base = base or t
        out[f"step_seconds_{p}_ranks"] = t
        out[f"speedup_{p}_ranks"] = base / t
        out[f"efficiency_{p}_ranks"] = base / t / p
        # 4 stages x 9 transforms per RK4 step, sent by rank 0: truncated transposes (what
        # the step moves) and full ones (before pruning)
        out[f"transpose_bytes_per_step_{p}_ranks"] = 36 * res["bytes_per_transform"]
        out[f"transpose_bytes_per_step_full_{p}_ranks"] = 36 * res["bytes_per_transform_full"]
        if res["bytes_per_transform_full"]:
            out[f"transpose_bytes_saved_{p}_ranks"] = 1 - res["bytes_per_transform"] / res["bytes_per_transform_full"]
    out["note_4_ranks"] = "4 ranks on 2 cores are oversubscribed: efficiency below 0.5 is expected"
    return out


@register("estimate")
def bench_estimate(quick=False):
    """`eddybox estimate` against measured runs: the step time at 96^3 and 128^3 predicted by
    a model calibrated on smaller sizes only (BENCH_SIZES), and the peak memory of two-step runs
    (start-up, a fluid sample and the final checkpoint included) predicted by the solver's
    memory model with the process size measured on a 16^3 run."""
    from eddybox.solver.run.config import validate
    from eddybox.solver.run.inventory import memory_needed
    from eddybox.solver.study import estimate as est
    from eddybox.solver.study.calibration import BENCH_SIZES, QUICK_BENCH_SIZES, peak_run_config

    cal_sizes = QUICK_BENCH_SIZES if quick else BENCH_SIZES
    # the calibration sizes and the two predicted ones timed side by side, interleaved
    measured = {p["n"]: p for p in measure_fluid_points(cal_sizes + (96, 128), repeats=5)}
    cal = calibrate(cal_sizes, save=False, points=[measured[n] for n in cal_sizes])
    _LAST_CALIBRATION.clear()
    _LAST_CALIBRATION.update(cal)
    out = {"calibration_sizes": list(cal_sizes), "fluid_model_a": cal["fluid_model"]["a"],
           "fluid_model_b": cal["fluid_model"]["b"],
           "process_bytes": cal["memory_overhead_bytes"]}
    t_err, m_err = [], []
    for n in (96, 128):
        step = measured[n]["step_seconds"]
        predicted, _ = est.step_time(cal, n, 1, "rk4")
        mem_measured = peak_rss_bytes(n, "rk4")
        mem_predicted = sum(memory_needed(validate(peak_run_config(n)),
                                          process_bytes=cal["memory_overhead_bytes"]).values())
        out[f"step_seconds_measured_{n}"] = step
        out[f"step_seconds_predicted_{n}"] = predicted
        out[f"step_predicted_over_measured_{n}"] = predicted / step
        out[f"peak_memory_measured_{n}"] = mem_measured
        out[f"peak_memory_predicted_{n}"] = mem_predicted
        out[f"peak_memory_predicted_over_measured_{n}"] = mem_predicted / mem_measured
        t_err.append(abs(predicted / step - 1))
        m_err.append(abs(mem_predicted / mem_measured - 1))
    out["estimate_time_error"] = max(t_err)
    out["estimate_memory_error"] = max(m_err)
    return out
