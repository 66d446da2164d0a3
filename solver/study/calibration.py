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


def benchmark_simulation(n, scheme="rk4", out=None, threads=None):
    """A forced n^3 simulation for timing (no output but its folder, spectrum initial field)."""
    import tempfile

    from eddybox.solver.run.config import validate
    from eddybox.solver.run.simulation import Simulation

    out = out or tempfile.mkdtemp(prefix="eddybox-bench-")
    cfg = validate({"name": "bench", "grid": {"points": n}, "seed": 1,
                    "fluid": {"viscosity": 0.01, "initial": {"kind": "spectrum", "energy": 0.5}},
                    "time": {"scheme": scheme, "cfl": 0.5, "end": 1e9},
                    "forcing": {"kind": "ou", "band": 2.0, "timescale": 1.0, "dissipation": 0.1},
                    "stats": {"fluid": {"every": None}, "spectra": {"every": None}},
                    "output": out})
    return Simulation(cfg, overwrite=True, quiet=True)


def peak_rss_bytes(n, scheme):
    """Peak resident memory of a fresh process that builds an n^3 simulation and takes two
    steps (bytes)."""
    # VmHWM, not getrusage: Linux carries ru_maxrss over exec, so a child of a large process
    # would report its parent's peak
    code = (
        "from eddybox.solver.study import calibration\n"
        f"s = calibration.benchmark_simulation({n}, {scheme!r})\n"
        "s.advance(); s.advance()\n"
        "hwm = [l for l in open('/proc/self/status') if l.startswith('VmHWM')][0].split()[1]\n"
        "print('PEAK_KB', hwm)\n")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=1800)
    lines = [ln for ln in r.stdout.splitlines() if ln.startswith("PEAK_KB")]
    if r.returncode != 0 or not lines:
        raise RuntimeError(r.stderr[-2000:])
    return int(lines[-1].split()[1]) * 1024


def calibration_path():
    return cache_dir() / CALIBRATION_FILE


def fit_fluid_model(points):
    """Least-squares a, b >= 0 in t = S (9 a N^3 log2 N^3 + b N^3) over measured points
    [{n, scheme, step_seconds}]."""
    rows, rhs = [], []
    for p in points:
        n3 = float(p["n"]) ** 3
        s = STAGES[p.get("scheme", "rk4")]
        rows.append([s * 9 * n3 * math.log2(n3), s * n3])
        rhs.append(p["step_seconds"])
    A, y = np.array(rows), np.array(rhs)
    # weight by 1/t so every size counts in relative terms
    w = 1.0 / y
    from scipy.optimize import nnls

    coef, _ = nnls(A * w[:, None], y * w)
    return {"a": float(coef[0]), "b": float(coef[1])}


def measure_fluid_points(sizes=(16, 24, 32, 48), scheme="rk4", repeats=3):
    """Measured serial step times (and U_max/u') at several sizes."""
    pts = []
    for n in sizes:
        sim = benchmark_simulation(n, scheme)
        sim.advance()
        t = best_time(sim.advance, repeats)
        u_rms = math.sqrt(2 * sim.energy() / 3)
        pts.append({"n": n, "scheme": scheme, "step_seconds": t,
                    "umax_over_urms": sim.nl.umax / u_rms if u_rms > 0 else 6.0})
    return pts


def calibrate(sizes=(16, 24, 32, 48), save=True, extra=None):
    """Measure this machine and store the calibration in the user cache directory."""
    pts = measure_fluid_points(sizes)
    cal = {"created": time.strftime("%Y-%m-%dT%H:%M:%S"), "threads": thread_count(),
           "fluid_points": pts, "fluid_model": fit_fluid_model(pts),
           "umax_over_urms": float(np.mean([p["umax_over_urms"] for p in pts]))}
    # resident memory beyond the array inventory (interpreter, libraries, compiled kernels)
    from eddybox.solver.run.config import validate
    from eddybox.solver.run.inventory import predicted_inventory

    n = sizes[0]
    c = validate({"grid": {"points": n}})
    cal["memory_overhead_bytes"] = max(0.0, peak_rss_bytes(n, "rk4") - sum(predicted_inventory(c).values()))
    cal.update(extra or {})
    if save:
        path = calibration_path()
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps(cal, indent=2))
    return cal


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
    """ValueError unless the fitted coefficients and measured figures are finite and >= 0, the
    velocity ratio and threads > 0 (else: negative or infinite times and core-hours)."""
    m = cal["fluid_model"]
    figures = {"fluid_model.a": m["a"], "fluid_model.b": m["b"]}
    figures.update((k, v) for k, v in cal.items() if k in (
        "threads", "umax_over_urms", "interp_seconds_per_particle", "pair_seconds",
        "memory_overhead_bytes"))
    for k, v in figures.items():
        positive = k in ("threads", "umax_over_urms")  # divisors and multipliers of the time
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) \
                or v < 0 or (positive and v == 0):
            raise ValueError(f"{k} = {v!r} is not a finite number {'>' if positive else '>='} 0")
