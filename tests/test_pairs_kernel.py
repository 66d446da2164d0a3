"""Pair-statistics kernel (particles/pairs.py) and the pairs.h5 reader (solver/study/readers.py).

Outside references: scipy.spatial.cKDTree pair counts, brute-force numpy over all pairs
(numpy.searchsorted on every row of w_r edges), the ideal-gas pair density, rigid-body
kinematics, scipy.stats (sem, norm), the dissipation-range and inertial-range limits of the
longitudinal structure function (Pope 2000).
"""

from __future__ import annotations

import tracemalloc
import warnings

import h5py
import numba
import numpy as np
import pytest
from numba.core.runtime import _nrt_python, rtsys
from scipy import stats
from scipy.spatial import cKDTree

from eddybox.particles.pairs import (
    _wr_guess,
    bin_centres,
    cell_count,
    collision_kernel,
    combine_samples,
    expected_pair_counts,
    pair_statistics,
    pairs_record,
    separation_wr_edges,
    shell_volumes,
    sinh_wr_edges,
    tracer_wr_rms,
    wr_edge_rows,
    wr_edges_from_rms,
)
from eddybox.solver.study import readers as pairs_reader

L = 1.0


# ----------------------------------------------------------------------------- particle builders


def _face_and_corner_points(box, rng, n_extra=40):
    """Points on/near the faces, edges and corners of the box (all inside [0, L))."""
    near = [0.0, 1e-12, 1e-9, box - 1e-9, box - 1e-12, np.nextafter(box, 0.0)]
    corners = np.array([[a, b, c] for a in near[::2] for b in near[1::2] for c in near[::3]])
    faces = rng.random((n_extra, 3)) * box
    faces[np.arange(n_extra), rng.integers(0, 3, n_extra)] = rng.choice(near, n_extra)
    return np.vstack([corners, faces])


def _edge_pairs(box, r_edges, rng, per_edge=6, delta=1e-9):
    """Pairs whose separations lie within ``delta`` of each bin edge (both sides), with one
    member near a face or corner so that many of them cross the periodic boundary.  Base points
    are reused, so some points coincide (pairs at r = 0)."""
    base_pool = _face_and_corner_points(box, rng, 20)
    firsts, seconds = [], []
    for e in r_edges:
        for _ in range(per_edge):
            for side in (-1.0, 1.0):
                d = e + side * delta * rng.uniform(0.3, 1.0)
                if d <= 0:
                    continue
                n = rng.standard_normal(3)
                n /= np.linalg.norm(n)
                p = base_pool[rng.integers(len(base_pool))]
                firsts.append(p)
                seconds.append(np.mod(p + d * n, box))
    q = np.vstack([np.array(firsts), np.array(seconds)])
    q[q >= box] = 0.0  # np.mod can round up to L
    return q


def _test_particles(n_random, box, r_edges, rng):
    pos = np.vstack([rng.random((n_random, 3)) * box, _face_and_corner_points(box, rng),
                     _edge_pairs(box, r_edges, rng)])
    return pos[rng.permutation(len(pos))]


def _kdtree_counts(r_edges, box, pos_a, pos_b=None):
    """Pair counts per bin from scipy.spatial.cKDTree.count_neighbors (cumulative d <= r,
    periodic via boxsize), differenced; same set: (ordered incl. self − N)/2.  cKDTree bins are
    (r_k, r_k+1], ours [r_k, r_k+1): they differ only for pairs exactly on an edge, which the
    test data avoid except coincident points (d = 0), added to bin 0 when r_edges[0] = 0."""
    ta = cKDTree(pos_a, boxsize=box)
    if pos_b is None:
        cum = (ta.count_neighbors(ta, r_edges).astype(np.int64) - len(pos_a)) // 2
    else:
        cum = ta.count_neighbors(cKDTree(pos_b, boxsize=box), r_edges).astype(np.int64)
    counts = np.diff(cum)
    if r_edges[0] == 0.0:
        counts[0] += cum[0]
    return counts


def _abc_velocity(x):
    """Arnold–Beltrami–Childress flow, a smooth analytic periodic field on the 2π box
    (common practice)."""
    a, b, c = 1.0, 0.7, 0.43
    X, Y, Z = x[:, 0], x[:, 1], x[:, 2]
    return np.stack([a * np.sin(Z) + c * np.cos(Y), b * np.sin(X) + a * np.cos(Z),
                     c * np.sin(Y) + b * np.cos(X)], axis=1)


def _brute_force(pos_a, vel_a, box, r_edges, wr_edges, pos_b=None, vel_b=None):
    """All pairs in numpy: minimum image, w_r = (v_j − v_i)·r̂ (brute force, no cells)."""
    if pos_b is None:
        i, j = np.triu_indices(len(pos_a), 1)
        xa, va, xb, vb = pos_a[i], vel_a[i], pos_a[j], vel_a[j]
    else:
        i, j = np.meshgrid(np.arange(len(pos_a)), np.arange(len(pos_b)), indexing="ij")
        xa, va, xb, vb = pos_a[i.ravel()], vel_a[i.ravel()], pos_b[j.ravel()], vel_b[j.ravel()]
    dx = xb - xa
    dx -= box * np.round(dx / box)
    r = np.sqrt(np.sum(dx * dx, axis=1))
    keep = (r >= r_edges[0]) & (r < r_edges[-1])
    dx, r, dv = dx[keep], r[keep], (vb - va)[keep]
    w = np.sum(dv * dx, axis=1) / r
    nr = len(r_edges) - 1
    rows = wr_edge_rows(wr_edges, nr)  # one row of w_r edges per separation bin
    nw = rows.shape[1] - 1
    k = np.searchsorted(r_edges, r, side="right") - 1
    m = np.zeros(k.size, dtype=np.int64)
    for b in range(nr):
        sel = k == b
        m[sel] = np.clip(np.searchsorted(rows[b], w[sel], side="right") - 1, 0, nw - 1)
    hist = np.zeros((nr, nw), dtype=np.int64)
    np.add.at(hist, (k, m), 1)
    per_bin = lambda x: np.bincount(k, x, nr)  # noqa: E731
    return {
        "counts": np.bincount(k, minlength=nr), "hist": hist,
        "under": np.bincount(k[w < rows[k, 0]], minlength=nr),
        "over": np.bincount(k[w >= rows[k, -1]], minlength=nr),
        "sum_wr": per_bin(w), "sum_wr2": per_bin(w * w), "sum_abs": per_bin(np.abs(w)),
        "sum_inward": per_bin(np.maximum(-w, 0.0)),
        "sum_trans": per_bin(0.5 * (np.sum(dv * dv, axis=1) - w * w)),
        "scale": per_bin(np.abs(w)) + per_bin(w * w) + 1.0,
    }


# ----------------------------------------------------------------------------- pair counts


@pytest.mark.parametrize("r_edges, default_ncell, ncells", [
    (np.linspace(0.0, 0.3, 13), 3, (None, 1)),         # cells, and the all-pairs path
    (np.geomspace(0.01, 0.24, 11), 4, (None, 3, 2)),   # several cell sizes on the same data
    (np.linspace(0.05, 0.45, 9), 2, (None,)),          # ncell = 2: all-pairs path by default
])
def test_counts_equal_kdtree(r_edges, default_ncell, ncells):
    assert cell_count(L, r_edges[-1]) == default_ncell
    rng = np.random.default_rng(11)
    pos = _test_particles(1200, L, r_edges, rng)
    vel = rng.standard_normal(pos.shape)
    split = len(pos) // 2
    wr_edges = wr_edges_from_rms(1.0, 11)
    ref_same = _kdtree_counts(r_edges, L, pos)  # scipy.spatial.cKDTree reference
    ref_cross = _kdtree_counts(r_edges, L, pos[:split], pos[split:])
    assert ref_same.sum() > 10000 and ref_cross.sum() > 5000
    for ncell in ncells:
        same = pair_statistics(pos, vel, L, r_edges, wr_edges, ncell=ncell)
        cross = pair_statistics(pos[:split], vel[:split], L, r_edges, wr_edges,
                                pos_b=pos[split:], vel_b=vel[split:], ncell=ncell)
        np.testing.assert_array_equal(same.counts, ref_same)
        np.testing.assert_array_equal(cross.counts, ref_cross)
        # nothing is lost: every counted pair is in the w_r histogram
        np.testing.assert_array_equal(same.wr_hist.sum(axis=1), same.counts)
        np.testing.assert_array_equal(cross.wr_hist.sum(axis=1), cross.counts)


def test_ideal_gas_rdf_is_one():
    # uniform independent positions: g(r) = 1, counts Poisson-like with variance <= expected
    # (ideal gas, common practice); 4 standard deviations in every bin
    rng = np.random.default_rng(5)
    n = 20000
    pos = rng.random((n, 3))
    vel = rng.standard_normal((n, 3))
    r_edges = np.geomspace(0.01, 0.2, 21)
    wr_edges = wr_edges_from_rms(1.0, 21)
    same = pair_statistics(pos, vel, L, r_edges, wr_edges)
    cross = pair_statistics(pos[: n // 2], vel[: n // 2], L, r_edges, wr_edges,
                            pos_b=pos[n // 2:], vel_b=vel[n // 2:])
    for s, pairs in ((same, n * (n - 1) / 2), (cross, (n // 2) ** 2)):
        np.testing.assert_allclose(s.expected, pairs * shell_volumes(r_edges) / L**3, rtol=1e-14)
        assert np.all(np.abs(s.rdf - 1.0) < 4.0 / np.sqrt(s.expected))


# ----------------------------------------------------------------------------- velocities


def _irregular_rows(rng, nr):
    """Rows too irregular for a lookup table (a bin 1e-7 wide at 1e-9, edges up to 10): the
    kernel's binary search."""
    rows = []
    for _ in range(nr):
        neg, pos = -np.sort(rng.uniform(0.01, 3.0, 7))[::-1], np.sort(rng.uniform(0.01, 3.0, 7))
        rows.append(np.concatenate([[-10.0], neg, [1e-9, 1e-9 + 1e-16], pos, [10.0]]))
    return np.array(rows)


@pytest.mark.parametrize("wr_kind", ["uniform", "nonuniform", "rows-uniform", "rows-sinh",
                                     "rows-irregular"])
def test_wr_against_brute_force_abc_flow(wr_kind):
    rng = np.random.default_rng(3)
    box = 2.0 * np.pi
    pos = np.vstack([rng.random((500, 3)) * box, _face_and_corner_points(box, rng)])
    vel = _abc_velocity(pos)  # frozen analytic field evaluated at the particles
    r_edges = np.linspace(0.2, 3.0, 15)
    modes = {"uniform": 0, "nonuniform": 1, "rows-uniform": 0, "rows-sinh": 1, "rows-irregular": 2}
    if wr_kind == "uniform":
        wr_edges = wr_edges_from_rms(0.6, 31, span=1.5)  # narrow: exercises under/overflow
    elif wr_kind == "nonuniform":
        wr_edges = np.concatenate([-np.geomspace(3.0, 0.01, 12), np.geomspace(0.01, 3.0, 12)])
    elif wr_kind == "rows-uniform":  # a different uniform row per separation bin
        wr_edges = np.array([wr_edges_from_rms(0.1 + 0.05 * k, 31, span=1.5) for k in range(14)])
    elif wr_kind == "rows-sinh":  # the rows a run uses, cores growing with r, ends at +-1.5
        wr_edges = separation_wr_edges(0.02 * bin_centres(r_edges), 1.5, 41)
    else:
        wr_edges = _irregular_rows(rng, 14)
    assert _wr_guess(wr_edge_rows(wr_edges, 14))[0] == modes[wr_kind]
    split = 260
    # reference: brute force over all pairs in numpy (no cells)
    cases = [
        ((pos, vel, box, r_edges, wr_edges), {}, _brute_force(pos, vel, box, r_edges, wr_edges)),
        ((pos[:split], vel[:split], box, r_edges, wr_edges),
         {"pos_b": pos[split:], "vel_b": vel[split:]},
         _brute_force(pos[:split], vel[:split], box, r_edges, wr_edges, pos[split:], vel[split:])),
    ]
    for args, kw, ref in cases:
        for ncell in (None, 1):  # cell path (ncell = 4) and all-pairs path
            s = pair_statistics(*args, ncell=ncell, **kw)
            np.testing.assert_array_equal(s.counts, ref["counts"])
            np.testing.assert_array_equal(s.wr_hist, ref["hist"])
            np.testing.assert_array_equal(s.wr_under, ref["under"])
            np.testing.assert_array_equal(s.wr_over, ref["over"])
            for name in ("sum_wr", "sum_wr2", "sum_abs", "sum_inward", "sum_trans"):
                np.testing.assert_allclose(getattr(s, name), ref[name], rtol=1e-12,
                                           atol=1e-12 * ref["scale"].max(), err_msg=name)
    if wr_kind in ("uniform", "rows-uniform", "rows-sinh"):
        assert ref["under"].sum() > 0 and ref["over"].sum() > 0


def test_rigid_rotation_has_no_radial_velocity():
    # rigid-body rotation u = Ω × x: Δv ⟂ Δx, so w_r = 0 for every pair and the transverse
    # part is |Ω × Δx|²/2 (rigid-body kinematics, common practice).  Particles in a sub-cube of
    # side < L/2, so the minimum image is the plain difference.
    rng = np.random.default_rng(8)
    omega = np.array([0.3, -1.1, 0.7])
    pos = 0.3 + 0.35 * rng.random((600, 3))
    vel = np.cross(omega, pos - 0.5)
    r_edges = np.linspace(0.0, 0.3, 7)
    wr_edges = wr_edges_from_rms(1.0, 11, span=1e-3)
    s = pair_statistics(pos, vel, L, r_edges, wr_edges)
    assert np.array_equal(s.wr_hist[:, 5], s.counts)  # all pairs in the bin centred on w_r = 0
    scale = np.linalg.norm(omega) * r_edges[-1]
    assert np.all(np.abs(s.sum_wr) <= 1e-13 * scale * s.counts)
    i, j = np.triu_indices(len(pos), 1)
    d = pos[j] - pos[i]
    r = np.linalg.norm(d, axis=1)
    k = np.searchsorted(r_edges, r, side="right") - 1
    keep = r < r_edges[-1]
    trans = 0.5 * np.sum(np.cross(omega, d) ** 2, axis=1)
    np.testing.assert_allclose(s.sum_trans, np.bincount(k[keep], trans[keep], 6), rtol=1e-12)


# ----------------------------------------------------------------------------- subsampling


def test_subsampling_unbiased_and_near_bins_unchanged():
    rng = np.random.default_rng(21)
    n = 12000
    pos = rng.random((n, 3))
    vel = rng.standard_normal((n, 3))
    r_edges = np.linspace(0.02, 0.2, 10)
    wr_edges = wr_edges_from_rms(1.0, 11)
    full = pair_statistics(pos, vel, L, r_edges, wr_edges)
    with pytest.warns(UserWarning, match="snapped"):
        sub = pair_statistics(pos, vel, L, r_edges, wr_edges, r_sub=0.105, subsample=3000,
                              rng=np.random.default_rng(1))
    k = 4  # nearest edge to 0.105 is r_edges[4] = 0.1
    assert sub.r_sub == r_edges[k]
    np.testing.assert_array_equal(sub.subsampled, np.arange(9) >= k)
    np.testing.assert_array_equal(sub.counts[:k], full.counts[:k])
    np.testing.assert_array_equal(sub.wr_hist[:k], full.wr_hist[:k])
    np.testing.assert_allclose(sub.expected[k:], 3000 * 2999 / 2 * shell_volumes(r_edges)[k:])
    # ideal gas: g = 1 within 4 standard deviations of the subset's counts (common practice)
    assert np.all(np.abs(sub.rdf[k:] - 1.0) < 4.0 / np.sqrt(sub.expected[k:]))
    assert np.all(sub.counts[k:] < full.counts[k:] / 10)  # M(M-1)/(N(N-1)) = 1/16
    # reproducible from the Generator
    again = pair_statistics(pos, vel, L, r_edges, wr_edges, r_sub=r_edges[k], subsample=3000,
                            rng=np.random.default_rng(1))
    np.testing.assert_array_equal(again.wr_hist, sub.wr_hist)
    # cross sets: expected from M_a M_b
    cross = pair_statistics(pos[:5000], vel[:5000], L, r_edges, wr_edges, pos_b=pos[5000:],
                            vel_b=vel[5000:], r_sub=r_edges[k], subsample=2000,
                            rng=np.random.default_rng(2))
    np.testing.assert_allclose(cross.expected[k:], 2000 * 2000 * shell_volumes(r_edges)[k:])
    assert np.all(np.abs(cross.rdf[k:] - 1.0) < 4.0 / np.sqrt(cross.expected[k:]))


def test_subsampling_unbiased_for_clustered_particles():
    # clustered particles (g >> 1 at small r): the mean of the subsampled g over many subsets
    # equals the full g within its standard error (inclusion probability of a pair is
    # M(M-1)/(N(N-1)) for sampling without replacement, common practice)
    rng = np.random.default_rng(4)
    centres = rng.random((300, 3))
    pos = np.mod(np.repeat(centres, 10, axis=0) + 0.01 * rng.standard_normal((3000, 3)), L)
    vel = rng.standard_normal(pos.shape)
    r_edges = np.linspace(0.005, 0.1, 9)
    wr_edges = wr_edges_from_rms(1.0, 11)
    full = pair_statistics(pos, vel, L, r_edges, wr_edges)
    draws = np.array([pair_statistics(pos, vel, L, r_edges, wr_edges, r_sub=r_edges[0],
                                      subsample=1000, rng=np.random.default_rng(s)).rdf
                      for s in range(40)])
    assert full.rdf[0] > 10.0
    err = draws.std(axis=0, ddof=1) / np.sqrt(len(draws))
    assert np.all(np.abs(draws.mean(axis=0) - full.rdf) < 4.0 * err)


# ----------------------------------------------------------------------------- memory


def _traced_peak(fn):
    tracemalloc.start()
    try:
        fn()
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def test_memory_does_not_grow_with_pair_count():
    # same particles, r_max giving ~3·10^2 and ~3·10^3 pairs per particle (9·10^5 vs 9·10^6
    # pairs; storing them would take >= 8 bytes each)
    rng = np.random.default_rng(9)
    n = 6000
    pos = rng.random((n, 3))
    vel = rng.standard_normal((n, 3))
    wr_edges = wr_edges_from_rms(1.0, 21)
    configs = (np.linspace(0.0, 0.229, 11),  # n·(4π/3)r³ ≈ 3.0e2 (cells, ncell = 4)
               np.linspace(0.0, 0.493, 11))  # ≈ 3.0e3 (all-pairs path)
    pair_statistics(pos[:100], vel[:100], L, configs[0], wr_edges)  # compile outside the trace
    peaks, nrt_allocs, pairs = [], [], []
    _nrt_python.memsys_enable_stats()  # counts the compiled code's own heap allocations
    try:
        for edges in configs:
            start = rtsys.get_allocation_stats().alloc
            tracemalloc.start()
            sample = pair_statistics(pos, vel, L, edges, wr_edges)
            peaks.append(tracemalloc.get_traced_memory()[1])
            tracemalloc.stop()
            nrt_allocs.append(rtsys.get_allocation_stats().alloc - start)
            pairs.append(sample.counts.sum())
    finally:
        _nrt_python.memsys_disable_stats()
    assert 250 < 2 * pairs[0] / n < 350 and 2500 < 2 * pairs[1] / n < 3500
    # compiled code: only the fixed wrappers of the array arguments, whatever the pair count
    assert nrt_allocs[0] == nrt_allocs[1]
    assert abs(peaks[1] - peaks[0]) < 64 * 1024  # numpy buffers: no growth beyond a few cells
    assert peaks[1] < 2 * 1024 * 1024 < pairs[1] / 4  # far below one byte per pair


def test_result_independent_of_thread_count():
    rng = np.random.default_rng(12)
    pos, vel = rng.random((4000, 3)), rng.standard_normal((4000, 3))
    args = (pos, vel, L, np.geomspace(0.01, 0.2, 9), wr_edges_from_rms(1.0, 21))
    threads = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        one = pair_statistics(*args)
    finally:
        numba.set_num_threads(threads)
    many = pair_statistics(*args)
    for name in ("counts", "wr_hist", "sum_wr", "sum_wr2", "sum_abs", "sum_inward", "sum_trans"):
        np.testing.assert_array_equal(getattr(one, name), getattr(many, name), err_msg=name)


# ----------------------------------------------------------------------------- helpers


def test_normalisation_helpers():
    r_edges = np.geomspace(0.01, 0.2, 6)
    # shell volume 4π/3 (r2³ − r1³) (geometry, common practice)
    np.testing.assert_allclose(shell_volumes(r_edges)[0],
                               4 / 3 * np.pi * (r_edges[1] ** 3 - r_edges[0] ** 3), rtol=1e-15)
    np.testing.assert_allclose(expected_pair_counts(r_edges, 2.0, 100),
                               4950 * shell_volumes(r_edges) / 8.0, rtol=1e-15)
    np.testing.assert_allclose(expected_pair_counts(r_edges, 2.0, 100, 30),
                               3000 * shell_volumes(r_edges) / 8.0, rtol=1e-15)
    # geometric centres for log bins, arithmetic for linear bins
    np.testing.assert_allclose(bin_centres(r_edges), np.sqrt(r_edges[1:] * r_edges[:-1]))
    lin = np.linspace(0, 1, 5)
    np.testing.assert_allclose(bin_centres(lin), [0.125, 0.375, 0.625, 0.875])
    # K = 2π r² g ⟨|w_r|⟩, Wang, Wexler & Zhou (2000) JFM, spherical formulation
    g, wabs = np.full(5, 2.0), np.full(5, 0.5)
    rc = np.sqrt(r_edges[1:] * r_edges[:-1])
    np.testing.assert_allclose(collision_kernel(r_edges, g, wabs), 2 * np.pi * rc**2, rtol=1e-14)
    edges = wr_edges_from_rms(0.5, 101)
    assert edges.size == 102 and np.isclose(edges[-1], 8 * np.sqrt(2) * 0.5)
    np.testing.assert_allclose(edges, -edges[::-1], atol=1e-15)
    assert np.isclose(edges[50] + edges[51], 0.0, atol=1e-15)  # bin 50 centred on 0
    with pytest.raises(ValueError):
        wr_edges_from_rms(1.0, 100)


def test_input_checks_and_combine():
    rng = np.random.default_rng(1)
    pos, vel = rng.random((300, 3)), rng.standard_normal((300, 3))
    w = wr_edges_from_rms(1.0, 11)
    with pytest.raises(ValueError):
        pair_statistics(pos, vel, L, np.linspace(0, 0.5, 5), w)  # r_max must be < L/2
    with pytest.raises(ValueError):
        pair_statistics(pos, vel, L, np.linspace(0, 0.2, 5), w, ncell=6)  # cells < r_max
    with pytest.raises(TypeError):  # subsampling needs a Generator
        pair_statistics(pos, vel, L, np.linspace(0, 0.2, 5), w, r_sub=0.1, subsample=50)
    with pytest.raises(ValueError):  # a repeated particle would double-count its pairs
        pair_statistics(pos, vel, L, np.linspace(0, 0.2, 5), w, r_sub=0.1,
                        subsample=np.array([1, 2, 2, 3]))
    edges = np.linspace(0.0, 0.3, 7)
    a = pair_statistics(pos, vel, L, edges, w)
    b = pair_statistics(rng.random((300, 3)), vel, L, edges, w)
    ab = combine_samples([a, b])
    np.testing.assert_array_equal(ab.counts, a.counts + b.counts)
    np.testing.assert_allclose(ab.rdf, (a.counts + b.counts) / (a.expected + b.expected))
    assert ab.n_samples == 2
    # positions outside [0, L) are wrapped: shifting all particles by whole boxes changes nothing
    shifted = pair_statistics(pos + np.array([1.0, -2.0, 3.0]), vel, L, edges, w)
    np.testing.assert_array_equal(shifted.counts, a.counts)


# ----------------------------------------------------------------------------- w_r rows


def test_sinh_rows_and_predicted_tracer_scale():
    # edges uniform in asinh(w/a): symmetric, ends at +-w_max, one bin centred on 0, bins
    # a du wide near 0 and a fixed fraction du of |w| far out (the definition)
    e = sinh_wr_edges(0.1, 50.0, 101)
    du = 2 * np.arcsinh(50.0 / 0.1) / 101
    assert e[0] == -50.0 and e[-1] == 50.0 and e.size == 102
    np.testing.assert_allclose(e, -e[::-1], rtol=0, atol=1e-14)
    np.testing.assert_allclose(np.diff(np.arcsinh(e / 0.1)), du, rtol=1e-9)
    assert np.isclose(e[50] + e[51], 0.0, atol=1e-15)
    np.testing.assert_allclose(np.diff(e)[50], 2 * 0.1 * np.sinh(du / 2), rtol=1e-12)
    np.testing.assert_allclose(np.diff(e)[-1] / 50.0, 1 - np.exp(-du), rtol=1e-3)
    rows = separation_wr_edges([0.01, 0.1, 1.0], 8.0, 21)
    assert rows.shape == (3, 22) and np.all(rows[:, -1] == 8.0)
    with pytest.raises(ValueError):
        sinh_wr_edges(1.0, 1.0, 21)  # core must be below the far end
    # predicted rms of w_r for tracers: r sqrt(eps/(15 nu)) as r -> 0, since
    # <(du/dx)^2> = eps/(15 nu) (Pope 2000, eq. 6.73; from memory); C2^(1/2) (eps r)^(1/3) in
    # the inertial range (Kolmogorov 1941, C2 = 2.0, Pope 2000 sec. 6.2; from memory); sqrt(2) u'
    # for uncorrelated velocities at large r (definition)
    eps, nu, u = 0.1, 1e-4, 1.0
    eta = (nu**3 / eps) ** 0.25
    np.testing.assert_allclose(tracer_wr_rms(1e-3 * eta, eps, nu, u), 1e-3 * eta * np.sqrt(eps / (15 * nu)),
                               rtol=1e-4)
    r = 300 * eta  # well inside the inertial range of this made-up flow, D_LL << 2u'^2
    np.testing.assert_allclose(tracer_wr_rms(r, 1e-3 * eps, nu * 1e-3, 1e3),
                               np.sqrt(2.0 * (1e-3 * eps * r) ** (2 / 3)), rtol=0.05)
    np.testing.assert_allclose(tracer_wr_rms(1e6, eps, nu, u), np.sqrt(2) * u, rtol=1e-3)


# ----------------------------------------------------------------------------- reader


def _write_pairs_h5(path, group, r_edges, wr_edges, times, records, with_tails=True):
    """Write a pairs.h5 in the design layout from per-sample record dicts."""
    with h5py.File(path, "w") as f:
        g = f.create_group("pairs").create_group(group)
        g["r_edges"] = r_edges
        g["wr_edges"] = wr_edges
        g["time"] = np.asarray(times)
        names = ["counts", "expected", "rdf", "wr_hist", "wr_mean", "wr_sq", "wr_abs",
                 "wr_inward", "kernel"]
        if with_tails:
            names += ["wr_under", "wr_over"]
        for name in names:
            g[name] = np.stack([rec[name] for rec in records])
            g[name].attrs["units"] = "1"
            g[name].attrs["description"] = name


def _gaussian_records(rng, r_edges, wr_edges, sigmas, n_samples, n_per_bin):
    """Synthetic samples: w_r Gaussian with rms sigmas[k] in bin k."""
    nw = len(wr_edges) - 1
    records = []
    for _ in range(n_samples):
        w = rng.standard_normal((len(sigmas), n_per_bin)) * sigmas[:, None]
        m = np.clip(np.searchsorted(wr_edges, w, side="right") - 1, 0, nw - 1)
        hist = np.stack([np.bincount(row, minlength=nw) for row in m])
        rdf = 1.0 + 0.05 * rng.standard_normal(len(sigmas))
        records.append({
            "counts": np.full(len(sigmas), n_per_bin), "expected": n_per_bin / rdf, "rdf": rdf,
            "wr_hist": hist,
            "wr_mean": w.mean(axis=1), "wr_sq": (w * w).mean(axis=1),
            "wr_abs": np.abs(w).mean(axis=1), "wr_inward": np.maximum(-w, 0).mean(axis=1),
            "kernel": collision_kernel(r_edges, rdf, np.abs(w).mean(axis=1)),
            "wr_under": (w < wr_edges[0]).sum(axis=1), "wr_over": (w >= wr_edges[-1]).sum(axis=1),
        })
    return records


def test_reader_averages_and_pdf(tmp_path):
    rng = np.random.default_rng(17)
    r_edges = np.geomspace(0.05, 1.0, 5)
    sigmas = np.array([0.1, 0.2, 0.4, 0.8])
    wr_edges = wr_edges_from_rms(0.2, 41, span=3.0)  # ±3·√2·0.2 = ±0.85: bin 3 has tails
    records = _gaussian_records(rng, r_edges, wr_edges, sigmas, 6, 40000)
    times = np.arange(6) * 0.5
    path = tmp_path / "pairs.h5"
    _write_pairs_h5(path, "heavy__heavy", r_edges, wr_edges, times, records)
    assert pairs_reader.list_pair_groups(path) == ["heavy__heavy"]

    avg, pdfs = pairs_reader.read_pairs(path, "heavy__heavy", separations=[0.07, 0.9],
                                        t_min=0.5)
    counts = np.stack([r["counts"] for r in records])[1:].astype(float)
    expected = np.stack([r["expected"] for r in records])[1:]
    assert avg.n_samples == 5 and avg.window.method == "start"
    # pooled: g = sum(counts) / sum(expected), the ratio estimator
    g = counts.sum(axis=0) / expected.sum(axis=0)
    np.testing.assert_allclose(avg.rdf, g, rtol=1e-14)
    # its standard error by the delta method, z_i = (c_i - g E_i) / mean(E), from scipy.stats.sem
    # (5 samples: blocking stays at level 0, where it is the plain standard error)
    z = (counts - g * expected) / expected.mean(axis=0)
    np.testing.assert_allclose(avg.rdf_err, stats.sem(z, axis=0), rtol=1e-10)
    # ⟨w_r²⟩ of a Gaussian is σ² (handbook), and ⟨|w_r|⟩ = σ√(2/π)
    np.testing.assert_allclose(avg.wr_rms, sigmas, rtol=0.01)
    np.testing.assert_allclose(avg.wr_abs, sigmas * np.sqrt(2 / np.pi), rtol=0.01)
    np.testing.assert_array_equal(avg.counts, 5 * 40000)

    near, far = pdfs
    assert (near.r_bin, far.r_bin) == (0, 3)
    # PDF of w/σ is the standard normal: bin averages from scipy.stats.norm.cdf
    for p in (near, far):
        ref = np.diff(stats.norm.cdf(p.x_edges)) / np.diff(p.x_edges)
        inner = slice(1, -1)
        assert np.all(np.abs(p.pdf[inner] - ref[inner]) < 5 * p.pdf_err[inner] + 2e-3)
        ref_tail = stats.norm.cdf(p.x_edges[0]) + stats.norm.sf(p.x_edges[-1])
        assert abs(p.tail_fraction - ref_tail) < 5e-3
        area = np.sum(p.pdf * np.diff(p.x_edges))
        assert abs(area - (1.0 - p.tail_fraction)) < 1e-12
    assert far.tail_fraction > 0.2  # ±0.85 is about ±1.06 σ of the widest bin
    assert abs(near.skewness) < 0.05 and abs(near.flatness - 3.0) < 0.1  # Gaussian: 0 and 3


def test_reader_truncates_partial_sample_and_roundtrips_kernel_output(tmp_path):
    rng = np.random.default_rng(2)
    r_edges = np.linspace(0.0, 0.3, 7)
    wr_edges = wr_edges_from_rms(1.0, 11)
    samples = [pair_statistics(rng.random((2000, 3)), rng.standard_normal((2000, 3)), L,
                               r_edges, wr_edges) for _ in range(3)]
    records = [pairs_record(s) for s in samples]
    path = tmp_path / "pairs.h5"
    # a killed writer: time already holds a fourth sample, the other datasets do not
    _write_pairs_h5(path, "a__b", r_edges, wr_edges, [0.0, 1.0, 2.0, 3.0], records)
    series = pairs_reader.read_pair_group(path, "a__b")
    assert series.n_samples == 3
    avg = pairs_reader.time_average(series, t_min=0.0)
    pooled = combine_samples(samples)
    np.testing.assert_allclose(avg.rdf, pooled.rdf, rtol=1e-12)  # both ratios of sums
    means = pairs_record(pooled)
    np.testing.assert_allclose(avg.wr_sq, means["wr_sq"], rtol=1e-12)
    np.testing.assert_allclose(avg.kernel, means["kernel"], rtol=1e-12)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        pdf = pairs_reader.wr_pdf(series, 0.23, t_min=0.0)
    assert pdf.r_bin == 4 and pdf.tail_fraction == 0.0
