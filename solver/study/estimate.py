"""`eddybox estimate`: peak memory per rank, time per step and core-hours of a production run,
from a cost model calibrated on this machine; `plan` is the same for `eddybox check`.

Model (per rank, P ranks, S = RK stages per step, N^3 points, M particles in total):

    t_fft    = a * 9 S N^3 log2(N^3) / P            9 real 3-D transforms per stage
    t_local  = b * S N^3 / P                        the other passes over the arrays
    t_comm   = S * 9 * (bytes_moved / B + messages * latency)   transposes (P > 1)
    t_part   = c_p * M / P  (+ three inverse transforms of the velocity per step)
    t_pairs  = c_pair * pairs_in_r_max / (steps between samples)
    t_step   = t_fft + t_local + t_comm + t_part + t_pairs

a and b are fitted to measured serial steps at several N, each to its own measured share
(`calibration.fit_fluid_model`: a to the transforms timed alone, b to the rest of the step), so
both are positive; c_p and c_pair come from the particle-step and pair benchmarks. The number
of steps follows from dt = cfl dx / U_max with U_max = r * u' (r = max(|u|+|v|+|w|)/u'
measured in the calibration runs) and u' predicted from the forcing's target dissipation (or
the initial energy); core-hours = steps * t_step * P * threads / 3600. Memory is the peak of a
rank (eddybox.solver.run.inventory.memory_needed: the solver's arrays, the largest short-lived
arrays, start-up included, and the process itself), the same model `run` refuses with.

The viscosity may be chosen for a target (`target_viscosity`): eta = (nu^3/eps)^(1/4) and
Re_lambda = u'^2 sqrt(15/(nu eps)) (Pope 2000, ch. 6) at the forcing's eps, with u' from
eps = C_eps u'^3/L (eddybox.solver.run.scales).
"""
from __future__ import annotations

import math

from eddybox.solver.errors import ConfigError
from eddybox.solver.run import scales
from eddybox.solver.run.inventory import PROCESS_BYTES, human_bytes, memory_needed
from eddybox.solver.study.calibration import STAGES, load_calibration, machine_calibration

#: interconnect defaults: effective all-to-all bandwidth per rank and message latency of a
#: current 100-200 Gb/s InfiniBand-class network shared by the cores of a node (stated
#: assumptions, override with --network-bandwidth / --network-latency)
DEFAULT_BANDWIDTH = 2.0e9
DEFAULT_LATENCY = 2.0e-6
#: the largest rank count an estimate is made for
MAX_RANKS = 1 << 24
#: seconds per particle and step (order 8) when no benchmark measured it: two interpolations
#: of three components at about 1e-6 s each (an order of magnitude; `eddybox bench` measures it)
DEFAULT_PARTICLE_SECONDS = 2e-6
#: seconds per pair found within r_max when no benchmark measured it (an order of magnitude)
DEFAULT_PAIR_SECONDS = 2e-8


def transpose_bytes_per_transform(n, ranks, layout="auto", keep=None):
    """Bytes each rank sends per 3-D transform and the messages it takes (the layout's own
    buffer arithmetic, uneven blocks included; with `keep`, the truncated transposes of
    dealiased fields)."""
    if ranks == 1:
        return 0.0, 0
    from eddybox.solver.fluid.mpi_layout import resolve_grid, transpose_bytes_sent

    kind, (p1, p2) = resolve_grid(n, ranks, layout)
    return float(transpose_bytes_sent(n, ranks, kind, keep=keep)), (p1 - 1) + (p2 - 1)


def particle_seconds(cal) -> float:
    """Seconds per particle and step at order 8: the particle benchmark's figure, else twice an
    older calibration's interpolation time, else DEFAULT_PARTICLE_SECONDS."""
    if cal.get("particle_seconds"):
        return cal["particle_seconds"]
    if cal.get("interp_seconds_per_particle"):
        return 2 * cal["interp_seconds_per_particle"]
    return DEFAULT_PARTICLE_SECONDS


def step_time(cal, n, ranks, scheme, layout="auto", particles=0, order=8, bandwidth=DEFAULT_BANDWIDTH,
              latency=DEFAULT_LATENCY, pairs_per_step=0.0, dealias="two-thirds", frozen=False):
    """Predicted seconds per step and its parts (a frozen field costs no fluid step)."""
    m = cal["fluid_model"]
    s = STAGES[scheme]
    n3 = float(n) ** 3
    parts = {}
    if not frozen:
        fft_factor, evaluations, keep = dealias_costs(dealias, n)
        s_eval = s * evaluations
        parts = {"fft": m["a"] * s_eval * fft_factor * 9 * n3 * math.log2(n3) / ranks,
                 "local": m["b"] * s_eval * n3 / ranks}
        nbytes, msgs = transpose_bytes_per_transform(n, ranks, layout, keep)
        if ranks > 1:
            parts["transposes"] = s_eval * 9 * (nbytes / bandwidth + msgs * latency)
    if particles:
        parts["particles"] = (particles / ranks * particle_seconds(cal) * (order / 8.0) ** 3
                              + 3 * m["a"] * n3 * math.log2(n3) / ranks)
    if pairs_per_step:
        parts["pairs"] = pairs_per_step / ranks * cal.get("pair_seconds", DEFAULT_PAIR_SECONDS)
    return sum(parts.values()), parts


def _check_figures(n, ranks, particles, bandwidth, latency):
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


def estimate(cfg, n: int, ranks: int, particles=None, bandwidth=None, latency=None, cal=None):
    """A dict of every figure the estimate table prints, for the validated config `cfg` run
    at n^3 on `ranks` ranks (with `particles` in all, split as the config's sets are).
    `changes` holds the config keys that differ from `cfg` (a job script sets them)."""
    _check_figures(n, ranks, particles, bandwidth, latency)
    layout = "serial"
    if ranks > 1:
        from eddybox.solver.fluid.mpi_layout import resolve_grid

        try:
            layout, _ = resolve_grid(n, ranks, "auto")
        except ConfigError as exc:
            raise ConfigError(f"--ranks: {exc}") from None
    sets = cfg.particles.sets
    total_particles = particles if particles is not None else sum(s.count for s in sets)
    changes = {"grid.points": n} if n != cfg.grid.points else {}
    if particles is not None and sets:
        # scale every set to the requested total, keeping their proportions
        tot = sum(s.count for s in sets)
        new = [dict({k: v for k, v in raw.items() if v is not None},
                    count=max(1, int(round(s.count * particles / tot))))
               for s, raw in zip(sets, cfg.data["particles"]["sets"])]
        if [x["count"] for x in new] != [s.count for s in sets]:
            changes["particles.sets"] = new
    try:
        cfg = cfg.with_changes(changes)
    except ConfigError as exc:
        raise ConfigError(f"--points/--particles: {exc}") from None
    sets = cfg.particles.sets
    if cal is None:
        cal, _ = machine_calibration()
    process = cal.get("memory_overhead_bytes") or PROCESS_BYTES
    # rank 0 (root) gathers the global field for checkpoints; the others do not
    need = {root: memory_needed(cfg, ranks, layout, threads=cal.get("threads", 1), root=root,
                                process_bytes=process) for root in (True, False)}
    bw = DEFAULT_BANDWIDTH if bandwidth is None else bandwidth
    lat = DEFAULT_LATENCY if latency is None else latency
    # steps to the end time from the CFL condition at the predicted u'
    pred = scales.predicted(cfg)
    u, u_source = scales.velocity_estimate(cfg)
    dx = cfg.grid.length / n
    umax = cal.get("umax_over_urms", 6.0) * u if u else None
    dt = cfg.time.cfl * dx / umax if umax else None
    if cfg.time.max_dt:
        dt = min(dt, cfg.time.max_dt) if dt else cfg.time.max_dt
    steps = math.ceil(cfg.time.end / dt) if dt else None
    if cfg.time.max_steps:
        steps = min(steps, cfg.time.max_steps) if steps else cfg.time.max_steps
    # pairs inside r_max per sample, amortised over the steps between samples
    pairs_per_step = 0.0
    pr = cfg.stats.pairs
    if sets and pr.every and dt:
        eta = pred.get("eta", dx)
        r = pr.r_max * (eta if pr.units == "eta" else 1.0)
        vol = cfg.grid.length ** 3
        groups = [(a.count, a.count / 2.0) for a in sets]
        npairs = sum(na * nb for na, nb in groups) * 4 / 3 * math.pi * r**3 / vol
        pairs_per_step = npairs / max(1.0, pr.every / dt)
    order = cfg.particles.interpolation
    t, parts = step_time(cal, n, ranks, cfg.time.scheme, "auto",
                         total_particles if sets else 0, order, bw, lat, pairs_per_step,
                         cfg.fluid.dealias, cfg.fluid.frozen)
    nbytes, msgs = transpose_bytes_per_transform(n, ranks, "auto", dealias_costs(cfg.fluid.dealias, n)[2])
    threads = cal.get("threads", 1)
    wall = t * steps if steps else None
    if wall and sets and cfg.particles.release > 0:
        # no particle (nor pair) cost before the release: steps taken as even in time
        before = min(1.0, cfg.particles.release / cfg.time.end) if cfg.time.end > 0 else 0.0
        fluid_only = t - parts.get("particles", 0.0) - parts.get("pairs", 0.0)
        wall = steps * (before * fluid_only + (1.0 - before) * t)
    return {"points": n, "ranks": ranks, "layout": layout, "particles": total_particles if sets else 0,
            "memory_per_rank": sum(need[ranks == 1].values()), "memory_rank0": sum(need[True].values()),
            "memory": need[True], "memory_other": need[False], "process_bytes": process,
            "dt": dt, "steps": steps, "seconds_per_step": t, "parts": parts, "wall_seconds": wall,
            "release": cfg.particles.release if sets else 0.0,
            "core_hours": wall * ranks * threads / 3600.0 if wall is not None else None,
            "threads_per_rank": threads, "u_rms": u, "u_source": u_source, "umax": umax,
            "bandwidth": bw, "latency": lat, "transpose_bytes": nbytes, "transpose_messages": msgs,
            "viscosity": cfg.fluid.viscosity, "kmax_eta": pred.get("kmax_eta"),
            "re_lambda": pred.get("re_lambda_estimate"), "changes": changes, "config": cfg,
            "calibration": cal.get("created", "?"),
            "calibration_source": cal.get("source", "eddybox bench")}


def target_viscosity(cfg, points=None, kmax_eta=None, re_lambda=None):
    """(config with nu chosen, N, what was done) for `estimate`'s targets. Of N, k_max eta and
    Re_lambda any two may be given and nu follows (with the config's target dissipation):
    N and k_max eta: nu holds k_max eta at N; N and Re_lambda: nu reaches Re_lambda, k_max eta
    follows; Re_lambda alone or with k_max eta: nu reaches Re_lambda and N is the smallest
    FFT-friendly size with k_max eta >= the target (default: the config's own k_max eta).
    All three over-determine nu: refused."""
    for option, value in (("--kmax-eta", kmax_eta), ("--re-lambda", re_lambda)):
        if value is not None and not (math.isfinite(value) and value > 0):
            raise ConfigError(f"{option}: expected a finite number > 0, got {value}")
    if None not in (points, kmax_eta, re_lambda):
        raise ConfigError("--points, --kmax-eta, --re-lambda: give at most two; the viscosity "
                          "follows from them (three over-determine it)")
    if kmax_eta is None and re_lambda is None:
        return cfg, points, None
    if points is not None:
        try:
            sized = cfg.with_changes({"grid.points": points})
        except ConfigError as exc:
            raise ConfigError(f"--points: {exc}") from None
        if re_lambda is not None:
            nu = scales.viscosity_for_re_lambda(sized, re_lambda)
            note = f"fluid.viscosity {nu:.4g} for Re_lambda = {re_lambda:g} (k_max eta follows)"
            option = "--re-lambda"
        else:
            nu = scales.viscosity_for_kmax_eta(sized, kmax_eta)
            note = f"fluid.viscosity {nu:.4g} for k_max eta = {kmax_eta:g} at N = {points}"
            option = "--kmax-eta"
        return _with_viscosity(cfg, nu, option), points, note
    nu = scales.viscosity_for_re_lambda(cfg, re_lambda)
    held = kmax_eta is None
    if held:
        kmax_eta = scales.predicted(cfg)["kmax_eta"]
    new = _with_viscosity(cfg, nu, "--re-lambda")
    eta = scales.predicted(new)["eta"]
    from eddybox.solver.run.config_warnings import points_for_kmax

    n = fft_friendly(points_for_kmax(new, kmax_eta / eta), "--re-lambda")
    return new, n, (f"fluid.viscosity {nu:.4g} for Re_lambda = {re_lambda:g}; N = {n}, the "
                    f"smallest FFT-friendly size with k_max eta >= {kmax_eta:.3g}"
                    + (" (the config's own)" if held else ""))


def _with_viscosity(cfg, nu, option):
    try:
        return cfg.with_changes({"fluid.viscosity": float(nu)})
    except ConfigError as exc:
        raise ConfigError(f"{option}: the viscosity it needs is out of range: {exc}") from None


def print_estimate(args):
    from eddybox.solver.run import config as cfgmod

    if args.points is None and getattr(args, "re_lambda", None) is None:
        raise ConfigError("--points: give the grid points N (or --re-lambda to choose the "
                          "viscosity and N, or --kmax-eta alone to let estimate choose N and the "
                          "dealiasing)")
    cfg = cfgmod.load(args.config, args.set)
    job = job_options(args) if getattr(args, "job_script", None) else None
    cal, how = (load_calibration(args.calibration), f"--calibration {args.calibration}") \
        if args.calibration else machine_calibration()
    base = cfg
    cfg, n, note = target_viscosity(cfg, args.points, args.kmax_eta, getattr(args, "re_lambda", None))
    e = estimate(cfg, n, args.ranks, args.particles, args.network_bandwidth,
                 args.network_latency, cal)
    if cfg is not base:
        e["changes"] = dict(e["changes"], **{"fluid.viscosity": cfg.fluid.viscosity})
    for line in estimate_lines(e, how, note, args.network_bandwidth is not None):
        print(line)
    if job is not None:
        write_job(args, e["config"], e, *job)


def estimate_lines(e, how, note=None, network_given=False) -> list[str]:
    """The estimate table of `estimate` and its assumptions."""
    cfg = e["config"]
    out = [f"estimate for {cfg.source} at {e['points']}^3 on {e['ranks']} rank(s) ({e['layout']} layout)"]
    if note:
        out.append(f"  {note}")
    out.append(f"  viscosity nu            {e['viscosity']:.4g}")
    if e["kmax_eta"] is not None:
        out += [f"  k_max eta               {e['kmax_eta']:.3g}" + ("  (< 1: the dissipation range "
                                                                  "is not resolved)" if e["kmax_eta"] < 1 else ""),
                f"  Re_lambda (predicted)   {e['re_lambda']:.3g}"]
    out += memory_lines(e)
    out += time_lines(e, cfg)
    out.append("assumptions:")
    out += [f"  {a}" for a in assumption_lines(e, how, network_given)]
    return out


def memory_lines(e) -> list[str]:
    """Peak memory of a rank, with its parts."""
    peak, rank0 = e["memory_per_rank"], e["memory_rank0"]
    out = [f"  peak memory per rank    {human_bytes(peak)}"
           + (f"; rank 0 {human_bytes(rank0)} (it gathers the whole field for each checkpoint)"
              if e["ranks"] > 1 else "")]
    out += [f"    {k:22s} {human_bytes(v)}" for k, v in (e["memory"] if e["ranks"] == 1
                                                       else e["memory_other"]).items()]
    return out


def time_lines(e, cfg) -> list[str]:
    if e["dt"] is None:
        return [f"  seconds per step        {e['seconds_per_step']:.4g}",
                f"  steps                   unknown: {e['u_source']}"]
    out = [f"  time step dt            {e['dt']:.4g}"
           + (f"  (cfl {cfg.time.cfl} x dx / U_max, U_max = {e['umax']:.3g} from u' = "
              f"{e['u_rms']:.3g})" if e["umax"] else "  (time.max_dt)"),
           f"  steps to t = {cfg.time.end:<10g} {e['steps']}",
           f"  seconds per step        {e['seconds_per_step']:.4g}"]
    out += [f"    {k:22s} {v:.4g} s" for k, v in e["parts"].items()]
    if e["release"] > 0 and "particles" in e["parts"]:
        out.append(f"    (particles and pairs from their release at t = {e['release']:g} on)")
    out += [f"  wall time               {_duration(e['wall_seconds'])}",
            f"  core-hours              {e['core_hours']:.4g}  ({e['threads_per_rank']} thread(s) "
            "per rank)"]
    return out


def _duration(seconds) -> str:
    if seconds < 120:
        return f"{seconds:.3g} s"
    return f"{seconds / 60:.3g} min" if seconds < 7200 else f"{seconds / 3600:.3g} h"


def assumption_lines(e, how, network_given=False, here=False) -> list[str]:
    """What the estimate takes for granted, one line each (`here`: for this machine)."""
    out = [f"cost model: {how}" + ("" if here else "; a core elsewhere is taken to be as fast "
                                                 "as one here")]
    if e["ranks"] > 1:
        out.append(f"network: {e['bandwidth'] / 1e9:.3g} GB/s effective all-to-all bandwidth per "
                   f"rank, {e['latency'] * 1e6:.3g} us per message"
                   + ("" if network_given else " (defaults for a current InfiniBand-class "
                      "interconnect; --network-bandwidth, --network-latency)")
                   + f"; each rank sends {human_bytes(e['transpose_bytes'])} in "
                   f"{e['transpose_messages']} messages per 3-D transform, no overlap with computing")
    else:
        out.append("network: none (one process)")
    if e["u_rms"]:
        out.append(f"u' = {e['u_rms']:.3g} {e['u_source']}; U_max = {e['umax'] / e['u_rms']:.3g} u' "
                   "as measured in the calibration runs")
    mem = (f"memory: peaks, start-up included (initial field, FFT buffers, the first sample, "
           f"checkpoints); eddybox itself {human_bytes(e['process_bytes'])} per process")
    out += [mem, "no allowance for I/O time, checkpoints or queue time"]
    return out


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
    job = plan_job(args.config, out, cfg.name, e, args.cores_per_node, args.margin, limit, forced,
                   sets=e["changes"])
    path = write_job_script(args.job_script, job, args.scheduler)
    print(f"job script ({args.scheduler}) written to {path}: {job.nodes} node(s), {job.ranks} "
          f"rank(s), limit {job.limit_seconds} s, time.walltime {job.budget_seconds} s; submit "
          "it once, it resubmits itself until the run is done")


# ---------------------------------------------------------------------------------------------
# The dealiasing options: their cost, and the cheapest one for a target k_max eta
# ---------------------------------------------------------------------------------------------
def pruned_share(dealias, n) -> float:
    """The share of the full 3-D transform work that the pruned transforms of a dealiasing
    option do at N (`serial_layout.BandTransforms`): their three 1-D stages run on all lines,
    on the kept k_z planes (f_z = (keep+1)/(N/2+1)) and on the kept (k_y, k_z) lines (f_z f_y,
    f_y = (2 keep+1)/N), so (1 + f_z + f_z f_y)/3 (1 when nothing is pruned)."""
    from eddybox.solver.fluid.navier_stokes import DEALIASING

    k = DEALIASING[dealias].axis_index(n)
    if 2 * k + 1 >= n:
        return 1.0
    fz, fy = (k + 1) / (n // 2 + 1), (2 * k + 1) / n
    return (1 + fz + fz * fy) / 3


def dealias_costs(dealias, n):
    """(fft_factor, evaluations, keep) of a dealiasing option at N: its transform work relative
    to the 2/3 rule's pruned transforms (with which the calibration is measured), the products
    per stage, and the kept band |k_i| <= keep."""
    from eddybox.solver.fluid.navier_stokes import DEALIASING

    method = DEALIASING[dealias]
    return (pruned_share(dealias, n) / pruned_share("two-thirds", n), method.evaluations,
            method.axis_index(n))


def fft_friendly(n_min: float, option="--kmax-eta") -> int:
    """The smallest even N >= n_min whose only prime factors are 2, 3, 5 and 7 (sizes the
    FFT libraries handle fastest); ConfigError naming `option` beyond grid.points' limit."""
    from eddybox.solver.run.config import GridConfig

    limit = GridConfig.points.hi
    if not n_min <= limit:
        raise ConfigError(f"{option}: needs N >= {n_min:.4g}, beyond the largest grid.points "
                          f"({limit:g})")
    n = max(4, int(math.ceil(n_min)))
    while True:
        if n % 2 == 0:
            m = n
            for p in (2, 3, 5, 7):
                while m % p == 0:
                    m //= p
            if m == 1:
                return n
        n += 1


def resolution_options(cfg, kmax_eta: float, ranks: int = 1, cal=None, bandwidth=None,
                       latency=None):
    """For each dealiasing option (with the config's scheme, and RK4 where that scheme cannot
    take it): the smallest FFT-friendly N that reaches k_max eta >= kmax_eta at the config's
    target dissipation, and the predicted steps, seconds, core-hours and memory to the end time.

    time.cfl keeps the config's stability margin: divided by sqrt(2) with spherical truncation
    (whose |k_i| reach sqrt(2) further per dx), so every option takes the same time step at the
    same k_max (`timestepping.spectral_cfl_bound`). Sorted by core-hours, cheapest first."""
    from eddybox.solver.fluid.navier_stokes import DEALIASING
    from eddybox.solver.fluid.timestepping import SCHEMES
    from eddybox.solver.run import scales

    if not (kmax_eta > 0 and math.isfinite(kmax_eta)):
        raise ConfigError(f"--kmax-eta: expected a finite number > 0, got {kmax_eta}")
    pred = scales.predicted(cfg)
    if "eta" not in pred:
        raise ConfigError("--kmax-eta: the config's forcing sets no target dissipation, so eta is "
                          "unknown; give forcing.dissipation (ou, linear, reinject with mode power)")
    k0 = 2 * math.pi / cfg.grid.length
    if cal is None:
        cal, _ = machine_calibration()
    schemes = [cfg.time.scheme] + (["rk4"] if cfg.time.scheme != "rk4" else [])
    rows = []
    for name, method in DEALIASING.items():
        for scheme in schemes:
            if method.stage_shifted and not SCHEMES[scheme].stage_shifts:
                continue
            if scheme != cfg.time.scheme and any(r["dealias"] == name for r in rows):
                continue  # RK4 only stands in where the config's scheme cannot serve
            n = fft_friendly(kmax_eta / (pred["eta"] * k0 * method.kmax_index(1)))
            cfl = min(cfg.time.cfl / method.cfl_factor(), SCHEMES[scheme].cfl_limit)
            c = cfg.with_changes({"grid.points": n, "fluid.dealias": name, "time.scheme": scheme,
                                  "time.cfl": cfl})
            e = estimate(c, n, ranks, bandwidth=bandwidth, latency=latency, cal=cal)
            rows.append({"dealias": name, "scheme": scheme, "points": n, "cfl": cfl,
                         "kmax_eta": k0 * method.kmax_index(n) * pred["eta"],
                         "kept_modes": method.kept_modes(n),
                         **{k: e[k] for k in ("dt", "steps", "seconds_per_step", "wall_seconds",
                                              "core_hours", "memory_per_rank")}})
    return sorted(rows, key=lambda r: r["core_hours"])


def print_resolution_options(args):
    from eddybox.solver.run import config as cfgmod

    cfg = cfgmod.load(args.config, args.set)
    cal = load_calibration(args.calibration) if args.calibration else None
    ranks = args.ranks
    if ranks < 1:
        raise ConfigError(f"--ranks: expected a positive integer, got {ranks}")
    rows = resolution_options(cfg, args.kmax_eta, ranks, cal, args.network_bandwidth,
                              args.network_latency)
    print(f"dealiasing options for {cfg.source} at k_max eta >= {args.kmax_eta:g} on {ranks} rank(s) "
          f"(time to t = {cfg.time.end:g})")
    print(f"  {'fluid.dealias':13s} {'scheme':6s} {'N':>5s} {'time.cfl':>8s} {'kmax eta':>8s} "
          f"{'steps':>7s} {'s/step':>9s} {'core-hours':>11s} {'memory/rank':>12s}")
    for r in rows:
        print(f"  {r['dealias']:13s} {r['scheme']:6s} {r['points']:5d} {r['cfl']:8.3g} "
              f"{r['kmax_eta']:8.3g} {r['steps']:7d} {r['seconds_per_step']:9.3g} "
              f"{r['core_hours']:11.4g} {human_bytes(r['memory_per_rank']):>12s}")
    best = rows[0]
    print(f"cheapest: fluid.dealias {best['dealias']}, time.scheme {best['scheme']}, grid.points "
          f"{best['points']}, time.cfl {best['cfl']:.3g} ({rows[-1]['core_hours'] / best['core_hours']:.2g}x "
          f"less than the dearest)")
    print("assumptions: as for eddybox estimate; at the same k_max every option takes the same "
          "time step (time.cfl divided by sqrt(2) with spherical truncation); N is rounded up to "
          "a size with prime factors 2, 3, 5, 7")
