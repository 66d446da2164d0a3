"""Benchmark of the pair-statistics kernel against the pipeline a user would otherwise write.

Both pipelines run in the same call on the same particles: uniform random positions and Gaussian
velocities in a 2π box, r_max = r_max_eta · η with η the Kolmogorov length typical of an n_grid³
run (k_max η ≈ 1.5 with k_max = n_grid/3, the 2/3-rule cut-off in a 2π box: η = 1.5 / (n_grid/3),
0.0352 for 128³).  The reference pipeline is scipy.spatial.cKDTree(boxsize=L).query_pairs(r_max,
output_type='ndarray'), then numpy minimum-image separations, w_r, np.histogram (counts),
np.histogram2d (w_r histogram) and np.bincount (the per-bin sums).

The w_r bins are those a run uses: one sinh-spaced row per separation bin
(particles.pairs.separation_wr_edges, core at the tracer rms of w_r predicted for a flow with
eps = nu = 1 in these units, far end at 8 sqrt(2) u').  ``pairs_per_second_uniform_wr`` times the
same call with one uniform row for all separation bins (the layout before rows per separation
bin), interleaved with it.  ``pairs_sinh_over_uniform_wr``, the speed with the rows over the
speed with one uniform row, is measured side by side in CPU time on one thread (best of 5,
interleaved), which other processes on shared cores disturb far less than wall time.
"""

from __future__ import annotations

import time
import tracemalloc

import numba
import numpy as np
from scipy.spatial import cKDTree

from eddybox.particles.pairs import (
    bin_centres,
    cell_count,
    pair_statistics,
    separation_wr_edges,
    tracer_wr_rms,
    wr_edges_from_rms,
    wr_edge_rows,
)

__all__ = ["bench_pairs", "scipy_pair_pipeline"]

_LOG_DECADES = 2.0  # r_edges span r_max/100 .. r_max, log-spaced (as in the default config)
_R_BINS = 40
_WR_BINS = 101
_N_CALIBRATION = 4000
#: largest set the materialising reference pipeline is run on (memory: 16 bytes per pair)
SCIPY_MAX_PARTICLES = 10**5


def scipy_pair_pipeline(pos, vel, box_length, r_edges, wr_edges):
    """Same-set counts, w_r histogram and sums with cKDTree + numpy (materialises all pairs)."""
    r_max = r_edges[-1]
    pairs = cKDTree(pos, boxsize=box_length).query_pairs(r_max, output_type="ndarray")
    i, j = pairs[:, 0], pairs[:, 1]
    dx = pos[j] - pos[i]
    dx -= box_length * np.round(dx / box_length)
    r = np.sqrt(np.einsum("ij,ij->i", dx, dx))
    dv = vel[j] - vel[i]
    w = np.einsum("ij,ij->i", dv, dx) / r
    counts, _ = np.histogram(r, r_edges)
    k = np.searchsorted(r_edges, r, side="right") - 1
    ok = (k >= 0) & (k < r_edges.size - 1)
    nr = r_edges.size - 1
    rows = wr_edge_rows(wr_edges, nr)
    hist = np.stack([np.histogram(np.clip(w[k == b], row[0], row[-1]), row)[0]
                     for b, row in enumerate(rows)])
    sums = [np.bincount(k[ok], x[ok], nr) for x in
            (w, w * w, np.abs(w), np.maximum(-w, 0.0),
             0.5 * (np.einsum("ij,ij->i", dv, dv) - w * w))]
    return counts, hist, sums


def _best_time(fn, repeats):
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def _peak_bytes(fn):
    tracemalloc.start()
    try:
        fn()
        return int(tracemalloc.get_traced_memory()[1])
    finally:
        tracemalloc.stop()


def bench_pairs(n_particles: int = 10**5, n_grid: int = 128, r_max_eta: float = 20.0,
                eta: float | None = None, repeats: int = 2, seed: int = 2026) -> dict:
    """Measure pairs per second of :func:`particles.pairs.pair_statistics` and its speed-up over
    the cKDTree + numpy pipeline, side by side in this call (best of ``repeats`` for each).

    "Pairs" are the pairs inside [r_edges[0], r_max), the ones both pipelines bin.
    ``pairs_peak_bytes`` is the tracemalloc peak of one kernel call (numpy buffers; the compiled
    kernel itself allocates nothing that grows with the pairs), ``scipy_peak_bytes`` the same for
    the reference.

    ``projected_seconds_all_pairs_L2_1e6_one_core`` projects one sample of N = 10^6 particles
    with r_max → L/2 (all pairs within half the box) on one core: there ncell < 3, so every one of
    the N(N−1)/2 pairs is a candidate and the cost is proportional to N(N−1)/2.  The time of one
    thread for n_cal (<= 4000) of these particles with r_max = 0.499 L and the same bins is
    measured here and scaled by N(N−1) / (n_cal(n_cal−1)).
    """
    rng = np.random.default_rng(seed)
    box = 2.0 * np.pi
    if eta is None:
        eta = 1.5 / (n_grid / 3.0)
    r_max = r_max_eta * eta
    pos = rng.random((n_particles, 3)) * box
    vel = rng.standard_normal((n_particles, 3))
    r_edges = np.geomspace(r_max / 10**_LOG_DECADES, r_max, _R_BINS + 1)
    # the rows a run would use for Gaussian velocities of rms 1 (u' = 1, eps = nu = 1 here)
    wr_edges = separation_wr_edges(tracer_wr_rms(bin_centres(r_edges) / eta, 1.0, 1.0, 1.0),
                                   8.0 * np.sqrt(2.0), _WR_BINS)
    uniform = wr_edges_from_rms(1.0, _WR_BINS)

    def ours():
        return pair_statistics(pos, vel, box, r_edges, wr_edges)

    def ours_uniform():
        return pair_statistics(pos, vel, box, r_edges, uniform)

    pair_statistics(pos[:2000], vel[:2000], box, r_edges, wr_edges)  # compile outside the timing
    pair_statistics(pos[:2000], vel[:2000], box, r_edges, uniform)
    t_ours = t_uniform = np.inf
    for _ in range(max(3, repeats)):  # interleaved, best of 3: both see the same machine load
        t, sample = _best_time(ours, 1)
        t_ours = min(t_ours, t)
        t, _ = _best_time(ours_uniform, 1)
        t_uniform = min(t_uniform, t)
    n_pairs = int(sample.counts.sum())
    # the ratio of the two layouts from CPU time on one thread, interleaved, best of 5, on the
    # first 10^5 particles: wall time on shared cores swings by more than the ratio measured
    m_ratio = min(n_particles, 10**5)
    threads = numba.get_num_threads()
    cpu = {"rows": np.inf, "uniform": np.inf}
    try:
        numba.set_num_threads(1)
        for _ in range(5):
            for name, edges in (("rows", wr_edges), ("uniform", uniform)):
                t0 = time.process_time()
                pair_statistics(pos[:m_ratio], vel[:m_ratio], box, r_edges, edges)
                cpu[name] = min(cpu[name], time.process_time() - t0)
    finally:
        numba.set_num_threads(threads)
    # the reference materialises every pair (16 bytes each for the indices alone): above
    # SCIPY_MAX_PARTICLES it would not fit in memory, so the ratio is measured side by side on
    # the first SCIPY_MAX_PARTICLES particles, with our kernel timed again on the same subset
    m = min(n_particles, SCIPY_MAX_PARTICLES)
    sub_pos, sub_vel = pos[:m], vel[:m]
    if m < n_particles:
        t_ours_sub, sub = _best_time(lambda: pair_statistics(sub_pos, sub_vel, box, r_edges, wr_edges),
                                     repeats)
    else:
        t_ours_sub, sub = t_ours, sample
    t_ref, (counts_ref, hist_ref, _) = _best_time(
        lambda: scipy_pair_pipeline(sub_pos, sub_vel, box, r_edges, wr_edges), repeats)
    ncell = cell_count(box, r_max)

    # one-thread calibration for the projection: all pairs within r_max = 0.499 L of n_cal
    # particles (the ncell < 3 path, every pair a candidate), scaled by the number of pairs
    n_cal = min(n_particles, _N_CALIBRATION)
    r_cal = 0.499 * box
    edges_cal = np.geomspace(r_cal / 10**_LOG_DECADES, r_cal, _R_BINS + 1)
    try:
        numba.set_num_threads(1)
        t_cal, _ = _best_time(lambda: pair_statistics(pos[:n_cal], vel[:n_cal], box, edges_cal,
                                                      wr_edges), 1)
    finally:
        numba.set_num_threads(threads)
    n_big = 10**6
    projected = t_cal * (n_big * (n_big - 1.0)) / (n_cal * (n_cal - 1.0))

    return {
        "n_particles": n_particles,
        "box_length": box,
        "eta": eta,
        "r_max": r_max,
        "ncell": ncell,
        "threads": threads,
        "n_pairs": n_pairs,
        # agreement of the two pipelines (0 unless a pair sits within rounding of an edge)
        "counts_max_abs_diff_vs_scipy": int(np.max(np.abs(sub.counts - counts_ref))),
        "wr_hist_max_abs_diff_vs_scipy": int(np.max(np.abs(sub.wr_hist - hist_ref))),
        "pairs_seconds": t_ours,
        "scipy_particles": m,
        "scipy_seconds": t_ref,
        "pairs_per_second": n_pairs / t_ours,
        "pairs_per_second_uniform_wr": n_pairs / t_uniform,
        "pairs_sinh_over_uniform_wr": cpu["uniform"] / cpu["rows"],
        "scipy_pairs_per_second": int(sub.counts.sum()) / t_ref,
        "pairs_speedup_vs_scipy": t_ref / t_ours_sub,
        "pairs_peak_bytes": _peak_bytes(lambda: pair_statistics(sub_pos, sub_vel, box, r_edges, wr_edges)),
        "scipy_peak_bytes": _peak_bytes(
            lambda: scipy_pair_pipeline(sub_pos, sub_vel, box, r_edges, wr_edges)),
        "calibration_particles": n_cal,
        "calibration_one_thread_seconds": t_cal,
        "projected_seconds_all_pairs_L2_1e6_one_core": projected,
    }


if __name__ == "__main__":
    import json
    import sys

    n = int(sys.argv[1]) if len(sys.argv) > 1 else 3 * 10**4
    print(json.dumps(bench_pairs(n_particles=n), indent=2))
