"""`eddybox estimate`: memory per rank, time per step and core-hours of a production run,
from a cost model calibrated on this machine.

Model (per rank, P ranks, S = RK stages per step, N^3 points, M particles in total):

    t_fft    = a * 9 S N^3 log2(N^3) / P            9 real 3-D transforms per stage
    t_local  = b * S N^3 / P                        the other passes over the arrays
    t_comm   = S * 9 * (bytes_moved / B + messages * latency)   transposes (P > 1)
    t_part   = c_p * 2 M / P  (+ one inverse transform of the velocity per step)
    t_pairs  = c_pair * pairs_in_r_max / (steps between samples)
    t_step   = t_fft + t_local + t_comm + t_part + t_pairs

a and b are fitted by least squares to measured serial steps at several N (`calibrate`);
c_p and c_pair come from the interpolation and pair benchmarks. The number of steps follows
from dt = cfl dx / U_max with U_max = r * u' (r = max(|u|+|v|+|w|)/u' measured in the
calibration runs) and u' predicted from the forcing's target dissipation (or the initial
energy); core-hours = steps * t_step * P * threads / 3600. Memory per rank is the solver's own
array inventory (eddybox.solver.run.inventory), the same list a live Simulation reports.
"""
from __future__ import annotations

import math

from eddybox.solver.errors import ConfigError
from eddybox.solver.run.inventory import human_bytes, predicted_inventory
from eddybox.solver.study.calibration import STAGES, calibrate, load_calibration

#: interconnect defaults: effective all-to-all bandwidth per rank and message latency of a
#: current 100-200 Gb/s InfiniBand-class network shared by the cores of a node (stated
#: assumptions, override with --network-bandwidth / --network-latency)
DEFAULT_BANDWIDTH = 2.0e9
DEFAULT_LATENCY = 2.0e-6
#: the largest rank count an estimate is made for
MAX_RANKS = 1 << 24


def transpose_bytes_per_transform(n, ranks, layout="auto"):
    """Bytes each rank sends per 3-D transform and the messages it takes (the layout's own
    buffer arithmetic, uneven blocks included)."""
    if ranks == 1:
        return 0.0, 0
    from eddybox.solver.fluid.mpi_layout import resolve_grid, transpose_bytes_sent

    kind, (p1, p2) = resolve_grid(n, ranks, layout)
    return float(transpose_bytes_sent(n, ranks, kind)), (p1 - 1) + (p2 - 1)


def step_time(cal, n, ranks, scheme, layout="auto", particles=0, order=8, bandwidth=DEFAULT_BANDWIDTH,
              latency=DEFAULT_LATENCY, pairs_per_step=0.0):
    """Predicted seconds per step and its parts."""
    m = cal["fluid_model"]
    s = STAGES[scheme]
    n3 = float(n) ** 3
    parts = {"fft": m["a"] * s * 9 * n3 * math.log2(n3) / ranks, "local": m["b"] * s * n3 / ranks}
    nbytes, msgs = transpose_bytes_per_transform(n, ranks, layout)
    parts["transposes"] = s * 9 * (nbytes / bandwidth + msgs * latency) if ranks > 1 else 0.0
    if particles:
        c = cal.get("interp_seconds_per_particle", 1e-6) * (order / 8.0) ** 3
        parts["particles"] = 2 * particles / ranks * c + 3 * m["a"] * n3 * math.log2(n3) / ranks
    if pairs_per_step:
        parts["pairs"] = pairs_per_step / ranks * cal.get("pair_seconds", 2e-8)
    return sum(parts.values()), parts


def estimate(cfg, n: int, ranks: int, particles=None, bandwidth=None, latency=None, cal=None):
    """A dict of every figure the estimate table prints, for the validated config `cfg` run
    at n^3 on `ranks` ranks (with `particles` in all, split as the config's sets are)."""
    from eddybox.solver.run import scales

    if n < 4 or n % 2:
        raise ConfigError(f"--points: expected an even integer >= 4, got {n}")
    if not 1 <= ranks <= MAX_RANKS:
        raise ConfigError(f"--ranks: expected an integer from 1 to {MAX_RANKS}, got {ranks}")
    if particles is not None and not 1 <= particles <= 10**15:
        raise ConfigError(f"--particles: expected an integer from 1 to 1e15, got {particles}")
    for option, value, lo_open in (("--network-bandwidth", bandwidth, True),
                                   ("--network-latency", latency, False)):
        if value is not None and not (math.isfinite(value) and (value > 0 if lo_open else value >= 0)):
            raise ConfigError(f"{option}: expected a finite number {'>' if lo_open else '>='} 0, "
                              f"got {value}")
    layout = "serial"
    if ranks > 1:
        from eddybox.solver.fluid.mpi_layout import resolve_grid

        try:
            layout, _ = resolve_grid(n, ranks, "auto")
        except ConfigError as exc:
            raise ConfigError(f"--ranks: {exc}") from None
    sets = cfg.particles.sets
    total_particles = particles if particles is not None else sum(s.count for s in sets)
    changes = {"grid.points": n}
    if particles is not None and sets:
        # scale every set to the requested total, keeping their proportions
        tot = sum(s.count for s in sets)
        for i, s in enumerate(sets):
            changes[f"particles.sets.{i}.count"] = max(1, int(round(s.count * particles / tot)))
    try:
        cfg = cfg.with_changes(changes)
    except ConfigError as exc:
        raise ConfigError(f"--points/--particles: {exc}") from None
    sets = cfg.particles.sets
    inv = predicted_inventory(cfg, ranks, layout, particles_per_rank=-(-total_particles // ranks)
                              if sets else None)
    cal = cal or load_calibration() or calibrate()
    bw = DEFAULT_BANDWIDTH if bandwidth is None else bandwidth
    lat = DEFAULT_LATENCY if latency is None else latency
    # steps to the end time from the CFL condition at the predicted u'
    pred = scales.predicted(cfg)
    u = pred.get("u_rms_estimate")
    if u is None:
        init = cfg.fluid.initial
        u = math.sqrt(2 * init.energy / 3) if init.kind == "spectrum" else 0.5
    umax = cal.get("umax_over_urms", 6.0) * u
    dx = cfg.grid.length / n
    dt = cfg.time.cfl * dx / umax
    if cfg.time.max_dt:
        dt = min(dt, cfg.time.max_dt)
    steps = math.ceil(cfg.time.end / dt)
    if cfg.time.max_steps:
        steps = min(steps, cfg.time.max_steps)
    # pairs inside r_max per sample, amortised over the steps between samples
    pairs_per_step = 0.0
    pr = cfg.stats.pairs
    if sets and pr.every:
        eta = pred.get("eta", dx)
        r = pr.r_max * (eta if pr.units == "eta" else 1.0)
        vol = cfg.grid.length ** 3
        groups = [(a.count, a.count / 2.0) for a in sets]
        npairs = sum(na * nb for na, nb in groups) * 4 / 3 * math.pi * r**3 / vol
        pairs_per_step = npairs / max(1.0, pr.every / dt)
    order = cfg.particles.interpolation
    t, parts = step_time(cal, n, ranks, cfg.time.scheme, "auto",
                         total_particles if sets else 0, order, bw, lat, pairs_per_step)
    threads = cal.get("threads", 1)
    return {"points": n, "ranks": ranks, "layout": layout, "particles": total_particles if sets else 0,
            "memory_per_rank": sum(inv.values()) + cal.get("memory_overhead_bytes", 0.0),
            "inventory": dict(inv, process_overhead=cal.get("memory_overhead_bytes", 0.0)), "dt": dt, "steps": steps,
            "seconds_per_step": t, "parts": parts, "wall_seconds": t * steps,
            "core_hours": t * steps * ranks * threads / 3600.0, "threads_per_rank": threads,
            "u_rms": u, "umax": umax, "bandwidth": bw, "latency": lat,
            "calibration": cal.get("created", "?")}


def print_estimate(args):
    from eddybox.solver.run import config as cfgmod

    cfg = cfgmod.load(args.config, args.set)
    job = job_options(args) if getattr(args, "job_script", None) else None
    cal = load_calibration(args.calibration) if args.calibration else None
    e = estimate(cfg, args.points, args.ranks, args.particles, args.network_bandwidth,
                 args.network_latency, cal)
    print(f"estimate for {cfg.source} at {e['points']}^3 on {e['ranks']} rank(s) ({e['layout']} layout)")
    print(f"  memory per rank         {human_bytes(e['memory_per_rank'])}")
    for k, v in e["inventory"].items():
        print(f"    {k:22s} {human_bytes(v)}")
    print(f"  time step dt            {e['dt']:.4g}  (cfl {cfg.time.cfl} x dx / U_max, U_max = "
          f"{e['umax']:.3g} from u' = {e['u_rms']:.3g})")
    print(f"  steps to t = {cfg.time.end:g}      {e['steps']}")
    print(f"  seconds per step        {e['seconds_per_step']:.4g}")
    for k, v in e["parts"].items():
        print(f"    {k:22s} {v:.4g} s")
    print(f"  wall time               {e['wall_seconds'] / 3600:.3g} h")
    print(f"  core-hours              {e['core_hours']:.4g}  ({e['threads_per_rank']} thread(s) per rank)")
    print("assumptions:")
    print(f"  cost model calibrated on this machine ({e['calibration']}); a cluster core is taken "
          "to be as fast as one here")
    print(f"  network: {e['bandwidth'] / 1e9:.3g} GB/s effective all-to-all bandwidth per rank, "
          f"{e['latency'] * 1e6:.3g} us latency" + ("" if args.network_bandwidth else
                                                   " (defaults for a current InfiniBand-class interconnect)"))
    print("  u' from the forcing's target dissipation (eps = 0.5 u'^3 / L, L = 0.45 x forcing "
          "wavelength) or the initial energy; "
          "no allowance for I/O, checkpoints or queue time")
    if job is not None:
        write_job(args, cfg, e, *job)


def job_options(args):
    """The job-script options checked before anything is computed: (limit, forced limit)."""
    import os

    from eddybox.solver.fields import Duration
    from eddybox.solver.study.jobscript import SCHEDULERS

    if args.scheduler not in SCHEDULERS:
        raise ConfigError(f"--scheduler: {args.scheduler!r} is not supported; choose one of "
                          + ", ".join(SCHEDULERS))
    if args.cores_per_node < 1:
        raise ConfigError(f"--cores-per-node: expected a positive integer, got {args.cores_per_node}")
    if not (math.isfinite(args.margin) and 0.0 <= args.margin <= 10.0):
        raise ConfigError(f"--margin: expected a number between 0 and 10, got {args.margin}")
    if os.path.exists(args.job_script):
        raise ConfigError(f"--job-script {args.job_script}: exists; give a new file name")
    return (Duration(none_ok=True).check("--max-walltime", args.max_walltime),
            Duration(none_ok=True).check("--job-walltime", args.job_walltime))


def write_job(args, cfg, e, limit, forced):
    """`--job-script`: the batch script of the run's restart chain (solver.study.jobscript)."""
    from eddybox.solver.study.jobscript import plan_job, write_job_script

    out = args.out or str(cfg.output)
    job = plan_job(args.config, out, cfg.name, e, args.cores_per_node, args.margin, limit, forced)
    path = write_job_script(args.job_script, job, args.scheduler)
    print(f"job script ({args.scheduler}) written to {path}: {job.nodes} node(s), {job.ranks} "
          f"rank(s), limit {job.limit_seconds} s, time.walltime {job.budget_seconds} s; submit "
          "it once, it resubmits itself until the run is done")
