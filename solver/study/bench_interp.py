"""Benchmark of the particle interpolation kernel, measured side by side in one call.

``bench_interpolation`` times :func:`particles.interpolation.interpolate` (order 8, three
components, random particles in a periodic n^3 field) against a vectorised numpy
gather-and-sum reference written here, and puts both next to a memory-bandwidth estimate
measured on the same machine in the same call.
"""

import math

import numba
import numpy as np
from numba import njit, prange

from eddybox.particles.interpolation import (
    INTERPOLATION_ORDERS,
    InterleavedField,
    cell_order,
    interpolate,
    interpolate_interleaved,
)
from eddybox.solver.study.calibration import best_times

__all__ = ["interpolate_numpy", "bench_interpolation"]

_CACHE_LINE = 64
_DOUBLE = 8


def _numpy_weights(t, order):
    """Lagrange weights prod_{n != m} (t - o_n) / (o_m - o_n), shape (P, order), computed
    directly from the product formula (independent of the numba kernel's prefix/suffix form)."""
    nodes = np.arange(order) - order // 2 + 1.0
    diff = t[:, None] - nodes[None, :]
    others = ~np.eye(order, dtype=bool)
    numer = np.array([np.prod(diff[:, others[m]], axis=1) for m in range(order)]).T
    denom = np.array([np.prod(nodes[m] - nodes[others[m]]) for m in range(order)])
    return numer / denom


def interpolate_numpy(field, h, positions, order, chunk=2048):
    """Reference: tensor-product Lagrange interpolation on a whole periodic grid with numpy
    fancy indexing over the order^3 stencil, in particle chunks that bound the memory."""
    ncomp = field.shape[0]
    n_global = np.array(field.shape[1:])
    first = 1 - order // 2
    out = np.empty((len(positions), ncomp))
    for lo in range(0, len(positions), chunk):
        s = positions[lo:lo + chunk] / h
        j = np.floor(s).astype(np.int64)
        t = s - j
        idx = [(j[:, a, None] + first + np.arange(order)[None, :]) % n_global[a]
               for a in range(3)]
        w = [_numpy_weights(t[:, a], order) for a in range(3)]
        stencil = field[:, idx[0][:, :, None, None], idx[1][:, None, :, None],
                        idx[2][:, None, None, :]]                    # (C, P, p, p, p)
        acc = np.einsum("cpijk,pk->cpij", stencil, w[2])
        acc = np.einsum("cpij,pj->cpi", acc, w[1])
        out[lo:lo + chunk] = np.einsum("cpi,pi->pc", acc, w[0])
    return out


_SUM_BLOCK = 4096
_STREAM_BYTES = 128 * 2**20


@njit(parallel=True, cache=True)
def _parallel_sum(a):
    """Sum of a (length a multiple of 8) with eight independent accumulators per block, so
    the add latency (no reassociation without fastmath) does not hide the memory speed."""
    n_blocks = (a.shape[0] + _SUM_BLOCK - 1) // _SUM_BLOCK
    total = 0.0
    for b in prange(n_blocks):
        s0 = s1 = s2 = s3 = s4 = s5 = s6 = s7 = 0.0
        for i in range(b * _SUM_BLOCK, min(a.shape[0], (b + 1) * _SUM_BLOCK), 8):
            s0 += a[i]
            s1 += a[i + 1]
            s2 += a[i + 2]
            s3 += a[i + 3]
            s4 += a[i + 4]
            s5 += a[i + 5]
            s6 += a[i + 6]
            s7 += a[i + 7]
        total += ((s0 + s1) + (s2 + s3)) + ((s4 + s5) + (s6 + s7))
    return total


def bench_interpolation(n_particles=10**6, n=128, order=8, repeats=3, numpy_particles=2 * 10**5,
                        seed=2026):
    """Particles per second of the order-``order`` interpolation of a 3-component field.

    Returns a dict with
      interp_particles_per_second       default call (cell sort chosen automatically)
      interp_particles_per_second_unsorted / _cell_sorted / _presorted
                                        random order, sorted inside the call (sort time
                                        included), and particles already stored in cell order
      interp_numpy_particles_per_second vectorised numpy reference (interpolate_numpy) on the
                                        first ``numpy_particles`` of the same particles (it is
                                        slow; its rate per particle does not depend on n)
      interp_speedup_vs_numpy           default rate / numpy rate
      interp_max_abs_difference_vs_numpy
      interp_results_identical_sorted_or_not  bit-for-bit equality of all numba variants
      interp_bytes_per_particle_touched field values read plus position read and result
                                        written: (C p^3 + 3 + C) * 8 bytes
      interp_cache_line_bytes_per_particle  64-byte lines the stencil spans: C p^2 rows of p
                                        doubles, each spanning on average
                                        mean_{o=0..7} ceil((o + p)/8) lines (random alignment)
      stream_read_bytes_per_second      measured: parallel sum over a 128 MiB array, same
                                        threads, interleaved with the kernel timings
      interp_bandwidth_bound_particles_per_second
                                        stream bandwidth / cache-line bytes per particle: the
                                        rate if every stencil line came from memory with no
                                        reuse between particles (random order); sorted
                                        particles share lines and can beat it
      interleaved_particles_per_second_float32 / _float64 / _float32_unsorted
                                        the run loop's kernel (interpolate_interleaved) on a
                                        single- (double-) precision interleaved copy, particles
                                        in cell order (or random order)
      interleaved_copy_seconds_float32  the copy itself (InterleavedField.fill), once per step
      interleaved_speedup_vs_presorted  float32 rate / today's kernel on presorted particles
      interleaved_max_relative_difference_float32 / _float64
                                        max |interleaved - today's| / max |u|
    """
    stencil = INTERPOLATION_ORDERS[order]
    p = stencil.points
    ncomp = 3
    length = 2.0 * np.pi
    h = length / n
    rng = np.random.default_rng(seed)
    field = rng.standard_normal((ncomp, n, n, n))
    positions = rng.uniform(0.0, length, (n_particles, 3))
    out = np.empty((n_particles, ncomp))
    args = (field, (0, 0, 0), (n, n, n), h)

    # compile / warm up every path on a few particles
    for sort in (None, False, True):
        interpolate(*args, positions[:2048], order, out[:2048], cell_sort=sort)

    m = min(numpy_particles, n_particles)
    perm = cell_order(positions, h, (n, n, n))
    presorted = np.ascontiguousarray(positions[perm])
    results = {name: np.empty_like(out) for name in ("default", "unsorted", "cell_sorted",
                                                       "presorted")}
    # read bandwidth: a parallel sum over an array far larger than the caches
    stream = np.ones(_STREAM_BYTES // _DOUBLE)
    _parallel_sum(stream[:_SUM_BLOCK])
    copies = {dt.__name__: InterleavedField(field.shape, (0, 0, 0), (n, n, n), order, dt).fill(field)
              for dt in (np.float32, np.float64)}
    for name, c in copies.items():  # compile / warm up
        results[name] = np.empty_like(out)
        interpolate_interleaved(c, h, presorted[:64], order, results[name][:64])
    results["float32_unsorted"] = np.empty_like(out)
    best = best_times({
        "float32": lambda: interpolate_interleaved(copies["float32"], h, presorted, order,
                                                   results["float32"]),
        "float64": lambda: interpolate_interleaved(copies["float64"], h, presorted, order,
                                                   results["float64"]),
        "float32_unsorted": lambda: interpolate_interleaved(copies["float32"], h, positions, order,
                                                            results["float32_unsorted"]),
        "copy": lambda: copies["float32"].fill(field),
        "default": lambda: interpolate(*args, positions, order, results["default"]),
        "unsorted": lambda: interpolate(*args, positions, order, results["unsorted"],
                                        cell_sort=False),
        "cell_sorted": lambda: interpolate(*args, positions, order, results["cell_sorted"],
                                           cell_sort=True),
        "sort_only": lambda: cell_order(positions, h, (n, n, n)),
        "presorted": lambda: interpolate(*args, presorted, order, results["presorted"],
                                         cell_sort=False),
        "numpy": lambda: results.__setitem__(
            "numpy", interpolate_numpy(field, h, positions[:m], order)),
        "stream": lambda: _parallel_sum(stream),
    }, repeats)
    identical = (np.array_equal(results["default"], results["unsorted"])
                 and np.array_equal(results["default"], results["cell_sorted"])
                 and np.array_equal(results["default"][perm], results["presorted"]))
    max_diff = float(np.abs(results["numpy"] - results["default"][:m]).max())

    lines_per_row = np.mean([math.ceil((o + p) / 8) for o in range(_CACHE_LINE // _DOUBLE)])
    io_bytes = (3 + ncomp) * _DOUBLE
    bytes_touched = ncomp * p ** 3 * _DOUBLE + io_bytes
    line_bytes = ncomp * p * p * lines_per_row * _CACHE_LINE + io_bytes
    bandwidth = stream.nbytes / best["stream"]

    rate = n_particles / best["default"]
    numpy_rate = m / best["numpy"]
    scale = float(np.abs(field).max())
    interleaved = {
        "interleaved_particles_per_second_float32": n_particles / best["float32"],
        "interleaved_particles_per_second_float64": n_particles / best["float64"],
        "interleaved_particles_per_second_float32_unsorted": n_particles / best["float32_unsorted"],
        "interleaved_copy_seconds_float32": best["copy"],
        "interleaved_speedup_vs_presorted": best["presorted"] / best["float32"],
        "interleaved_max_relative_difference_float32":
            float(np.abs(results["float32"] - results["presorted"]).max()) / scale,
        "interleaved_max_relative_difference_float64":
            float(np.abs(results["float64"] - results["presorted"]).max()) / scale,
    }
    return interleaved | {
        "n_particles": n_particles,
        "grid_points": n,
        "order": order,
        "components": ncomp,
        "threads": numba.get_num_threads(),
        "interp_particles_per_second": rate,
        "interp_particles_per_second_unsorted": n_particles / best["unsorted"],
        "interp_particles_per_second_cell_sorted": n_particles / best["cell_sorted"],
        "interp_particles_per_second_presorted": n_particles / best["presorted"],
        "interp_cell_sort_seconds": best["sort_only"],
        "interp_numpy_particles": m,
        "interp_numpy_particles_per_second": numpy_rate,
        "interp_speedup_vs_numpy": rate / numpy_rate,
        "interp_max_abs_difference_vs_numpy": max_diff,
        "interp_results_identical_sorted_or_not": bool(identical),
        "interp_bytes_per_particle_touched": bytes_touched,
        "interp_cache_line_bytes_per_particle": line_bytes,
        "stream_read_bytes_per_second": bandwidth,
        "interp_bandwidth_bound_particles_per_second": bandwidth / line_bytes,
    }
