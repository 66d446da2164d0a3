"""Benchmark of the per-step cost of collision detection against the pair statistics of one
sample at the same particle count, and of the memory the Lagrangian statistics keep per
particle.

Particles: uniform random positions in a 2π box and Gaussian velocities of rms 1 per component,
with η the Kolmogorov length typical of an n_grid³ run (k_max η ≈ 1.5, as in bench_pairs).
Collision detection counts the contacts at R = η of one step whose longest displacement is half
a grid cell (a run at time.cfl ≈ 0.5 moves no particle further), as `particles.collisions`
does in every step; the pair statistics are one sample of the default ``stats.pairs`` (40 log
bins to 10 η, 101 sinh-spaced w_r bins per separation bin). Both are timed side by side,
interleaved, in CPU time on one thread (best of several), which other processes on shared cores
disturb far less than wall time. ``collision_step_over_pair_sample`` is their ratio: a run
samples pairs every ``stats.pairs.every`` but detects contacts in every step.

The Lagrangian memory per followed particle is measured with tracemalloc around building a
correlator and adding ``lags + 1`` samples (its ring buffer fills), against the documented
48 (lags + 1) bytes.
"""
from __future__ import annotations

import time
import tracemalloc

import numba
import numpy as np

from eddybox.particles.lagrangian import LagrangianCorrelator, history_bytes
from eddybox.particles.pairs import (
    bin_centres,
    ghost_collisions,
    pair_statistics,
    separation_wr_edges,
    tracer_wr_rms,
)

__all__ = ["bench_collisions", "bench_lagrangian_memory"]


def _cpu_best(fn, repeats):
    best = np.inf
    for _ in range(repeats):
        t0 = time.process_time()
        fn()
        best = min(best, time.process_time() - t0)
    return best


def bench_collisions(n_particles: int = 10**5, n_grid: int = 128, repeats: int = 5,
                     seed: int = 2026) -> dict:
    """Seconds of one step of contact detection and of one pair-statistics sample, same
    particles, one thread, interleaved (best of ``repeats`` each), and their ratio."""
    rng = np.random.default_rng(seed)
    box = 2.0 * np.pi
    eta = 1.5 / (n_grid / 3.0)
    pos = rng.random((n_particles, 3)) * box
    vel = rng.standard_normal((n_particles, 3))
    disp = vel * (0.5 * box / n_grid / np.max(np.linalg.norm(vel, axis=1)))
    r_edges = np.geomspace(0.1 * eta, 10.0 * eta, 41)
    wr_edges = separation_wr_edges(tracer_wr_rms(bin_centres(r_edges) / eta, 1.0, 1.0, 1.0),
                                   8.0 * np.sqrt(2.0), 101)
    threads = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        ghost_collisions(pos[:1000], disp[:1000], box, eta)  # compile outside the timing
        pair_statistics(pos[:1000], vel[:1000], box, r_edges, wr_edges)
        t_contact = t_pairs = np.inf
        for _ in range(repeats):
            t_contact = min(t_contact, _cpu_best(lambda: ghost_collisions(pos, disp, box, eta), 1))
            t_pairs = min(t_pairs, _cpu_best(
                lambda: pair_statistics(pos, vel, box, r_edges, wr_edges), 1))
        contacts = ghost_collisions(pos, disp, box, eta)
    finally:
        numba.set_num_threads(threads)
    return {"collision_particles": n_particles, "collision_radius_eta": 1.0,
            "collision_step_longest_displacement_dx": 0.5,
            "contacts_per_step": int(contacts),
            "collision_seconds_per_step": t_contact,
            "collision_ns_per_particle_step": 1e9 * t_contact / n_particles,
            "pairs_seconds_per_sample": t_pairs,
            "collision_step_over_pair_sample": t_contact / t_pairs}


def bench_lagrangian_memory(particles: int = 2000, lags: int = 100) -> dict:
    """Bytes per followed particle of a Lagrangian correlator with ``lags`` lags, measured
    (tracemalloc peak while its ring buffer fills; the row of each sample is freed after it),
    and the CPU seconds of one sample."""
    rng = np.random.default_rng(1)
    v = rng.standard_normal((particles, 3))
    x = rng.standard_normal((particles, 3))
    tracemalloc.start()
    try:
        corr = LagrangianCorrelator(particles, lags)
        base = tracemalloc.get_traced_memory()[0]
        t0 = time.process_time()
        for i in range(lags + 1):
            corr.add(0.1 * i, v, x)
        seconds = (time.process_time() - t0) / (lags + 1)
        held = tracemalloc.get_traced_memory()[0]
    finally:
        tracemalloc.stop()
    return {"lagrangian_particles": particles, "lagrangian_lags": lags,
            "lagrangian_bytes_per_particle": held / particles,
            "lagrangian_bytes_per_particle_documented": history_bytes(particles, lags) / particles,
            "lagrangian_allocated_at_start_per_particle": base / particles,
            "lagrangian_seconds_per_sample": seconds}
