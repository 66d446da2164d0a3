"""The cost-model calibration of this machine, in one owner: timing helpers, the measured
serial step times and peak memory, the least-squares fit, and the calibration file in the user
cache that `eddybox bench` writes and `eddybox estimate` reads."""
from __future__ import annotations

import json
import math
import os
import subprocess
import sys
import time

import numpy as np

from eddybox.solver.errors import ConfigError
from eddybox.solver.fluid.fft import cache_dir, thread_count
from eddybox.solver.run.output import write_json_atomic

CALIBRATION_FILE = "calibration.json"
#: stages per step of each scheme
STAGES = {"rk4": 4, "rk3": 3, "rk2": 2}


def best_time(fn, repeats):
    """The shortest of `repeats` timed calls of fn() (seconds)."""
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def best_times(timed: dict, repeats):
    """Best wall time of each callable; the repeats are interleaved so that a change in
    machine load during the run affects all of them alike."""
    best = dict.fromkeys(timed, float("inf"))
    for _ in range(repeats):
        for name, fn in timed.items():
            t0 = time.perf_counter()
            fn()
            best[name] = min(best[name], time.perf_counter() - t0)
    return best


#: sizes of the short measurement `eddybox check` (and `estimate` without a calibration) makes
#: when this machine has none: a few seconds, beyond the caches where the local passes' cost
#: per point settles
QUICK_SIZES = (32, 48, 64)
#: sizes `eddybox bench` calibrates on (its estimate section predicts 96^3 and 128^3 from them)
BENCH_SIZES = (48, 64, 80, 112)
QUICK_BENCH_SIZES = (32, 48, 64, 80)
#: the process measured for the memory of eddybox itself (interpreter, libraries, kernels)
PROCESS_PROBE_POINTS = 16


class CalibrationError(RuntimeError):
    """A measurement that gives no physical cost model (a coefficient <= 0)."""


def benchmark_config(n, scheme="rk4", dealias="two-thirds", viscosity=0.01, particles=0, order=8,
                     tau_p=0.05, out=None) -> dict:
    """The raw config of the timing runs: forced n^3, spectrum initial field, no statistics
    (`particles` > 0 adds one set of that many, released at t = 0)."""
    return {"name": "bench", "grid": {"points": n}, "seed": 1,
            "fluid": {"viscosity": viscosity, "dealias": dealias,
                      "initial": {"kind": "spectrum", "energy": 0.5}},
            "time": {"scheme": scheme, "cfl": 0.5, "end": 1e9},
            "forcing": {"kind": "ou", "band": 2.0, "timescale": 1.0, "dissipation": 0.1},
            "stats": {"fluid": {"every": None}, "spectra": {"every": None}},
            "particles": {"release": 0.0, "interpolation": order,
                          "sets": [{"name": "p", "tau_p": tau_p, "count": particles}]
                          if particles else []},
            "output": out}


def benchmark_simulation(n, scheme="rk4", out=None, threads=None, dealias="two-thirds",
                         viscosity=0.01, pruned=True, particles=0, order=8, tau_p=0.05):
    """A forced n^3 simulation for timing (`benchmark_config`; no output but its folder).
    pruned=False gives the nonlinear term today's full transforms, for side-by-side figures."""
    import tempfile

    from eddybox.solver.fluid.navier_stokes import NonlinearTerm
    from eddybox.solver.run.config import validate
    from eddybox.solver.run.simulation import Simulation

    if out is None:
        import atexit
        import shutil

        out = tempfile.mkdtemp(prefix="eddybox-bench-")
        atexit.register(shutil.rmtree, out, True)  # its own folder: gone when the process ends
    cfg = validate(benchmark_config(n, scheme, dealias, viscosity, particles, order, tau_p, out))
    sim = Simulation(cfg, overwrite=True, quiet=True)
    if not pruned:
        sim.nl = sim.scheme.nl = NonlinearTerm(sim.layout, dealias, seed=1, pruned=False)
        sim.nl.set_stage_shifts(sim.scheme.stage_shifts, scheme)
    return sim


def transform_floor(sim, pruned=True):
    """A callable doing only the 3-D transforms of one RK4 step of `sim` on its own arrays
    (4 stages x 9: u and omega to physical space, u x omega back), through the pruned
    transforms the step uses (`pruned`) or the full ones."""
    lay, nl = sim.layout, sim.nl
    inverse, forward = (nl._inv, nl._fwd) if pruned else (lay.inverse, lay.forward)

    def run():
        for _ in range(STAGES["rk4"]):
            for c in range(3):
                inverse(lay.scratch, nl.u[c])
            for c in range(3):
                inverse(lay.scratch, nl.w[c])
            for c in range(3):
                forward(nl.w[c], lay.scratch)
    return run


def peak_rss_of_run(raw: dict, timeout=1800) -> int:
    """Peak resident memory (bytes) of a fresh process that runs the raw config `raw` through
    `eddybox run`'s machinery (start-up, hooks, steps, final checkpoint) in a temporary folder
    that is removed afterwards."""
    # VmHWM, not getrusage: Linux carries ru_maxrss over exec, so a child of a large process
    # would report its parent's peak
    code = (
        "import json, sys, tempfile\n"
        "from eddybox.solver.run.config import validate\n"
        "from eddybox.solver.run.simulation import Simulation\n"
        "raw = json.loads(sys.argv[1])\n"
        "with tempfile.TemporaryDirectory(prefix='eddybox-peak-') as tmp:\n"
        "    raw['output'] = tmp + '/run'\n"
        "    code = Simulation(validate(raw), quiet=True).run()\n"
        "hwm = [l for l in open('/proc/self/status') if l.startswith('VmHWM')][0].split()[1]\n"
        "print('PEAK_KB', code, hwm)\n")
    r = subprocess.run([sys.executable, "-c", code, json.dumps(raw)], capture_output=True,
                       text=True, timeout=timeout)
    lines = [ln for ln in r.stdout.splitlines() if ln.startswith("PEAK_KB")]
    if r.returncode != 0 or not lines or lines[-1].split()[1] != "0":
        raise RuntimeError(f"the memory probe failed: {r.stderr[-2000:]}")
    return int(lines[-1].split()[2]) * 1024


def peak_run_config(n, scheme="rk4", steps=2, **changes) -> dict:
    """`benchmark_config` for `steps` steps with a fluid sample at the start and a checkpoint
    at the end, as every run has."""
    raw = benchmark_config(n, scheme)
    raw["time"].update(max_steps=steps)
    raw["stats"]["fluid"] = {"every": 1e6}
    raw.update(changes)
    return raw


def peak_rss_bytes(n, scheme):
    """Peak resident memory of a two-step n^3 run (`peak_rss_of_run`)."""
    return peak_rss_of_run(peak_run_config(n, scheme))


def measured_process_bytes() -> float:
    """Resident memory of eddybox itself on this machine: a tiny run's peak less its arrays at
    their peak (the interpreter, numpy, scipy, numba and its compiled kernels, pyFFTW, h5py)."""
    from eddybox.solver.run.config import validate
    from eddybox.solver.run.inventory import memory_needed

    raw = peak_run_config(PROCESS_PROBE_POINTS)
    arrays = sum(memory_needed(validate(raw), process_bytes=0).values())
    return max(0.0, float(peak_rss_of_run(raw) - arrays))


def calibration_path():
    return cache_dir() / CALIBRATION_FILE


def _positive_fit(x, y, weight):
    """c minimising sum(((y - c x) w)^2): sum(x y w^2) / sum(x^2 w^2)."""
    x, y, w = (np.asarray(v, float) for v in (x, y, weight))
    return float(np.sum(x * y * w * w) / np.sum(x * x * w * w))


def fit_fluid_model(points):
    """The coefficients of t = S (9 a N^3 log2 N^3 + b N^3) from measured points
    [{n, scheme, step_seconds, fft_seconds}], each fitted to its own measured share, so each
    is physically positive: a to the transforms alone (`fft_seconds`, the step's 9 S pruned
    3-D transforms timed on their own), b to the rest of the step (step - transforms), both by
    least squares in relative terms (every size counts alike). The two terms are nearly
    collinear over the sizes a calibration can afford, so one fit to the step time alone can
    put all the cost in either. CalibrationError when a coefficient comes out <= 0."""
    xa, xb, fft_s, rest, step = [], [], [], [], []
    for p in points:
        n3 = float(p["n"]) ** 3
        s = STAGES[p.get("scheme", "rk4")]
        xa.append(s * 9 * n3 * math.log2(n3))
        xb.append(s * n3)
        fft_s.append(p["fft_seconds"] * s / STAGES["rk4"])  # the floor is timed as 4 stages
        rest.append(p["step_seconds"] - fft_s[-1])
        step.append(p["step_seconds"])
    fft_s, step = np.array(fft_s), np.array(step)
    a = _positive_fit(xa, fft_s, 1.0 / fft_s)
    b = _positive_fit(xb, rest, 1.0 / step)
    if not (a > 0 and b > 0 and math.isfinite(a) and math.isfinite(b)):
        raise CalibrationError(f"the measured steps give no positive cost model (a = {a:.3g}, "
                               f"b = {b:.3g}: the steps took no longer than their transforms); "
                               "the machine was probably too busy; measure again")
    return {"a": a, "b": b}


def measure_fluid_points(sizes=QUICK_SIZES, scheme="rk4", repeats=3):
    """Measured serial step times, the time of their transforms alone, and U_max/u', at
    several sizes, timed interleaved (a change in the machine's load affects every size alike);
    each simulation in a temporary folder, removed afterwards."""
    import shutil
    import tempfile

    out = tempfile.mkdtemp(prefix="eddybox-calibrate-")
    sims = {}
    try:
        timed = {}
        for n in sizes:
            sims[n] = benchmark_simulation(n, scheme, out=f"{out}/{n}")
            sims[n].advance()  # compile kernels, warm caches
            timed[("step", n)], timed[("fft", n)] = sims[n].advance, transform_floor(sims[n])
        t = best_times(timed, repeats)
        pts = []
        for n, sim in sims.items():
            u_rms = math.sqrt(2 * sim.energy() / 3)
            pts.append({"n": n, "scheme": scheme, "step_seconds": t[("step", n)],
                        "fft_seconds": t[("fft", n)],
                        "umax_over_urms": sim.nl.umax / u_rms if u_rms > 0 else 6.0})
        return pts
    finally:
        for sim in sims.values():
            sim.close()
        shutil.rmtree(out, ignore_errors=True)


def calibrate(sizes=BENCH_SIZES, save=True, extra=None, memory=True, repeats=3, source=None,
              points=None):
    """Measure this machine (step times at `sizes`, or the given measured `points`; with
    `memory`, the memory of eddybox itself) and, with `save`, store the calibration in the
    user cache directory."""
    pts = points or measure_fluid_points(sizes, repeats=repeats)
    cal = {"created": time.strftime("%Y-%m-%dT%H:%M:%S"), "threads": thread_count(),
           "sizes": list(sizes), "source": source or f"measured at {_sizes_text(sizes)}",
           "fluid_points": pts, "fluid_model": fit_fluid_model(pts),
           "umax_over_urms": float(np.mean([p["umax_over_urms"] for p in pts]))}
    if memory:
        cal["memory_overhead_bytes"] = measured_process_bytes()
    cal.update(extra or {})
    if save:
        save_calibration(cal)
    return cal


def _sizes_text(sizes):
    return ", ".join(f"{n}^3" for n in sizes)


def save_calibration(cal, path=None):
    """Write `cal` atomically (a reader sees the old file or the new one)."""
    path = path or calibration_path()
    path.parent.mkdir(parents=True, exist_ok=True)
    write_json_atomic(path, cal, indent=2)


def machine_calibration():
    """(calibration, how it was obtained): the one in the user cache (written by `eddybox
    bench`, or by an earlier short measurement), else a short measurement at QUICK_SIZES made
    now (a few seconds, in temporary folders) and cached for the next time. Never replaces a
    cached calibration."""
    cal = load_calibration()
    if cal is not None:
        return cal, f"cached calibration of {cal.get('created', '?')} ({cal.get('source', 'eddybox bench')})"
    cal = calibrate(QUICK_SIZES, save=False, memory=False, repeats=2,
                    source=f"a short measurement at {_sizes_text(QUICK_SIZES)} "
                           "(eddybox bench calibrates on larger sizes)")
    if load_calibration() is None:  # a parallel bench may have written one meanwhile
        try:
            save_calibration(cal)
        except OSError:
            pass  # a read-only cache: the next check measures again
    return cal, f"{cal['source']}, made now"


def load_calibration(path=None):
    p = path or calibration_path()
    if path is not None and not os.path.exists(p):
        raise ConfigError(f"--calibration {path}: no such file")
    if os.path.exists(p):
        try:
            with open(p) as fh:
                cal = json.loads(fh.read(1 << 20))
            _check_calibration(cal)
            return cal
        except (OSError, ValueError, KeyError, TypeError) as exc:
            if path is not None:
                raise ConfigError(f"--calibration {path}: not an eddybox calibration ({exc})") from None
    return None


def _check_calibration(cal):
    """ValueError unless the measured figures are finite and >= 0, the fitted coefficients, the
    velocity ratio and threads > 0 (else: free, negative or infinite times and core-hours)."""
    m = cal["fluid_model"]
    figures = {"fluid_model.a": m["a"], "fluid_model.b": m["b"]}
    figures.update((k, v) for k, v in cal.items() if k in (
        "threads", "umax_over_urms", "interp_seconds_per_particle", "pair_seconds",
        "memory_overhead_bytes"))
    for k, v in figures.items():
        # divisors and multipliers of the time, and the cost coefficients (a coefficient of 0
        # would price its term at nothing)
        positive = k in ("threads", "umax_over_urms", "fluid_model.a", "fluid_model.b")
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) \
                or v < 0 or (positive and v == 0):
            raise ValueError(f"{k} = {v!r} is not a finite number {'>' if positive else '>='} 0")
