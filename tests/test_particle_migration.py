"""Particles across ranks (particles.migration): ownership, ghost layers, migration, halos,
distributed pair statistics, gather / scatter by id.

The geometry and the serial layout (one process: everything on rank 0) are checked in-process;
the distributed behaviour runs under `mpiexec -n 2` and `-n 4` (oversubscribed on small
machines) through tests/mpi_scripts/particle_check.py, which compares every result with a
serial reference on the global data: numpy indexing of the global field, the serial
interpolation kernel on the whole field, brute-force numpy ownership and periodic distances,
and the serial pair_statistics kernel on all particles.
"""
import os

import numpy as np
import pytest

from eddybox.particles import migration as mig
from eddybox.particles.interpolation import cell_index, interpolate
from eddybox.particles.pairs import pair_statistics, wr_edges_from_rms
from eddybox.solver.fluid.mpi_layout import split_range
from eddybox.solver.fluid.serial_layout import SerialLayout
from tests.mpi_helpers import cached_results

SCRIPT = os.path.join(os.path.dirname(__file__), "mpi_scripts", "particle_check.py")
L = 2.0 * np.pi

CASES = {
    # 1x2 at N = 27 splits y 14 + 13 (uneven); N = 16 on two ranks holds the axis whole from
    # order 4 on (8 + 2w >= 16), N = 32 keeps real ghost planes for every order
    2: ["slab:16", "pencil:1x2:16", "pencil:2x1:16", "pencil:1x2:27", "slab:32"],
    # 2x2 at N = 29: 15 + 14 on both axes, ghosted corners; slab 16 and 18 over 4 ranks give
    # blocks of 4 or 5 planes, thinner than w = 5, 6 (orders 6, 8): ghosts from two ranks away
    4: ["pencil:2x2:16", "pencil:2x2:29", "slab:16", "slab:18"],
}
ALL = [(p, c) for p in CASES for c in CASES[p]]


# ---------------------------------------------------------------------------------------------
# geometry, no MPI
# ---------------------------------------------------------------------------------------------
def test_ghost_width_covers_the_stencil_and_the_predictor_margin():
    # a centred p-point stencil of the cell j reaches j - p/2 + 1 .. j + p/2 (Lagrange nodes,
    # particles.interpolation); two extra cells for the predictor position
    for p in (2, 4, 6, 8):
        assert mig.ghost_width(p) == p // 2 + 2


@pytest.mark.parametrize("n, parts, w", [(16, 2, 3), (16, 4, 5), (18, 4, 6), (29, 2, 6), (10, 5, 4),
                                         (13, 3, 2)])
def test_every_ghost_plane_comes_once_from_its_owner(n, parts, w):
    counts, starts = split_range(n, parts)
    ranges = [(s, s + c) for s, c in zip(starts, counts)]
    plans = [mig._axis_plan(ranges, n, w, k) for k in range(parts)]
    for k, (lo, hi) in enumerate(ranges):
        start, size, off = mig._axis_extent(lo, hi, n, w, True)
        assert size <= n and off == (lo - start)
        held = np.zeros(size, int)
        held[off:off + hi - lo] += 1                                 # interior
        for d in range(parts):
            recv = plans[k][1][d]
            send = plans[d][0][k]                                     # what d sends to k
            assert [(a, m) for a, _, m in recv] == [(a, m) for a, _, m in send]
            for dst, src, m in send:
                held[dst:dst + m] += 1
                # d sends its own interior planes: global index matches on both sides
                g_dst = (start + dst + np.arange(m)) % n
                d_start = mig._axis_extent(*ranges[d], n, w, True)[0]
                g_src = (d_start + src + np.arange(m)) % n
                assert np.array_equal(g_dst, g_src)
                assert ((g_src >= ranges[d][0]) & (g_src < ranges[d][1])).all()
        assert (held == 1).all()


def test_ghost_bytes_hand_counts():
    # slab 2 x 1, w = 6: block 32 + 12 planes of 64 x 64, plus 12 planes sent and 12 received
    assert mig.ghost_field_bytes(64, 8, 2, "slab") == 3 * 8 * 64 * 64 * (44 + 24)
    # pencil 2 x 2: 44 x 44 x 64 block; x stage moves 24 planes of 32 x 64 (interior y rows),
    # y stage 24 planes of 44 x 64 (the x-extended rows)
    assert mig.ghost_field_bytes(64, 8, 4, "pencil") == 3 * 8 * 64 * (44 * 44 + 24 * 32 + 24 * 44)
    # an explicit grid: 1 x 4 splits only y (16 per rank): 64 x 28 x 64, 24 planes of 64 x 64
    assert mig.ghost_field_bytes(64, 8, 4, "pencil", [1, 4]) == 3 * 8 * 64 * (64 * 28 + 24 * 64)
    assert mig.ghost_field_bytes(64, 8, 1, "serial") == 0


# ---------------------------------------------------------------------------------------------
# the serial layout: one rank owns everything
# ---------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def serial():
    lay = SerialLayout(16, L, threads=1)
    return lay, mig.BlockMap(lay)


def test_serial_owner_and_cell_rule(serial):
    lay, bm = serial
    h = L / 16
    pos = np.array([[0.0, L, np.nextafter(L, 0.0)], [L - 1e-13, 3 * h, -1e-17], [1.0, 2.0, 3.0]])
    assert bm.proc_grid == (1, 1) and bm.split == (False, False)
    assert np.array_equal(bm.owner(pos, h), [0, 0, 0])
    # the cell rule is interpolation.cell_index: floor(x/h) mod N, so x == L is cell 0
    assert np.array_equal(bm.cells(pos, h), cell_index(pos, np.full(3, h), np.full(3, 16)))
    assert bm.cells(pos, h)[0, 1] == 0 and bm.cells(pos, h)[1, 2] == 15
    with pytest.raises(ValueError, match="finite"):
        bm.owner(np.array([[np.nan, 0.0, 0.0]]), h)


def test_serial_ghost_field_is_the_field(serial):
    lay, bm = serial
    rng = np.random.default_rng(3)
    u = rng.standard_normal((3, 16, 16, 16))
    gf = mig.GhostField(lay, bm, 3, mig.ghost_width(8))
    assert gf.array.shape == (3, 16, 16, 16) and gf.start == (0, 0, 0)
    assert gf.nbytes == u.nbytes  # no exchange buffers on one rank
    np.testing.assert_array_equal(gf.fill(u), u)
    pos = rng.uniform(0.0, L, (200, 3))
    a, b = np.empty((200, 3)), np.empty((200, 3))
    gf.interpolate(pos, 8, a)
    interpolate(u, (0, 0, 0), (16,) * 3, L / 16, pos, 8, b)
    np.testing.assert_array_equal(a, b)


def test_serial_migrate_halo_gather_scatter(serial):
    lay, bm = serial
    rng = np.random.default_rng(4)
    x, v = rng.uniform(0.0, L, (50, 3)), rng.standard_normal((50, 3))
    ids = rng.permutation(50).astype(np.int64)
    out = mig.migrate(lay, bm, L / 16, {"ids": ids, "x": x, "v": v})
    assert out["x"] is x and out["ids"] is ids
    ph, vh = mig.halo(lay, bm, L, 1.0, x, v)
    assert ph.shape == (0, 3) and vh.shape == (0, 3)
    g = mig.gather_by_id(lay, ids, {"x": x, "v": v})
    order = np.argsort(ids)
    assert np.array_equal(g["ids"], np.arange(50)) and np.array_equal(g["x"], x[order])
    back = mig.scatter_by_owner(lay, bm, L / 16, g["ids"], {"x": g["x"], "v": g["v"]})
    assert np.array_equal(back["x"], g["x"]) and np.array_equal(back["v"], g["v"])
    with pytest.raises(ValueError, match="same number of rows"):
        mig.migrate(lay, bm, L / 16, {"x": x, "v": v[:3]})


@pytest.mark.parametrize("cross", [False, True])
def test_serial_distributed_pairs_equal_the_kernel(serial, cross):
    lay, bm = serial
    rng = np.random.default_rng(5)
    pa, va = rng.uniform(0.0, L, (400, 3)), rng.standard_normal((400, 3))
    pb, vb = rng.uniform(0.0, L, (300, 3)), rng.standard_normal((300, 3))
    ids_a, ids_b = np.arange(400) + 10, np.arange(300) + 500
    sub_a = np.sort(rng.choice(400, 150, replace=False))
    sub_b = np.sort(rng.choice(300, 90, replace=False))
    r_edges, wr = np.geomspace(0.05, 1.5, 9), wr_edges_from_rms(1.0, 11)
    if cross:
        d = mig.distributed_pair_statistics(lay, bm, L, r_edges, wr, pa, va, pb, vb, ids_a=ids_a,
                                            ids_b=ids_b, r_sub=r_edges[4],
                                            subsample_ids=(ids_a[sub_a], ids_b[sub_b]))
        s = pair_statistics(pa, va, L, r_edges, wr, pb, vb, r_sub=r_edges[4], subsample=(sub_a, sub_b))
    else:
        d = mig.distributed_pair_statistics(lay, bm, L, r_edges, wr, pa, va, ids_a=ids_a,
                                            r_sub=r_edges[4], subsample_ids=ids_a[sub_a])
        s = pair_statistics(pa, va, L, r_edges, wr, r_sub=r_edges[4], subsample=sub_a)
    for k in ("counts", "wr_hist", "expected", "rdf", "sum_wr", "sum_wr2", "sum_abs",
              "sum_inward", "sum_trans", "subsampled", "wr_under", "wr_over"):
        np.testing.assert_array_equal(getattr(d, k), getattr(s, k), err_msg=k)
    assert (d.n_a, d.n_b, d.m_a, d.m_b, d.r_sub) == (s.n_a, s.n_b, s.m_a, s.m_b, s.r_sub)
    assert d.subsampled.any() and d.counts.sum() > 0


# ---------------------------------------------------------------------------------------------
# under MPI
# ---------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def results():
    return cached_results(SCRIPT, CASES)


@pytest.mark.parametrize("ranks, case", ALL)
def test_ghost_fill_and_interpolation(results, ranks, case):
    r = results(ranks)["cases"][case]
    # every ghosted element equals the periodic slice of the global field (numpy indexing),
    # also after the block was overwritten with NaN and filled again
    assert r["ghost_fill_exact"]
    # particles on block faces (x0 h, nextafter(x1 h, 0)), at 0, nextafter(L, 0), L - 1e-13,
    # and predictor positions two cells out: ghosted block == whole field, bit for bit
    assert r["interp_bitwise"]
    # one cell further out is refused (IndexError), on every ghosted axis
    assert r["reach_tight"] and r["ghosted_axes"] > 0
    # what the blocks allocate is what the memory estimate predicts (largest rank, order 8)
    assert r["ghost_bytes"]["8"] == r["ghost_bytes_predicted"]


@pytest.mark.parametrize("ranks, case", ALL)
def test_migration(results, ranks, case):
    r = results(ranks)["cases"][case]
    assert r["owner_matches"]          # BlockMap.owner == brute-force block search
    assert r["moved"] > 0
    assert r["migrate_count"] and r["migrate_ids"]     # conserved, each id exactly once
    assert r["migrate_owner"]          # every particle on its owner
    assert r["migrate_order"]          # kept in order, then received by source rank
    assert r["migrate_rows"]           # rows travel intact, int32 and float64 alike


@pytest.mark.parametrize("ranks, case", ALL)
def test_halo_equals_brute_force_selection(results, ranks, case):
    r = results(ranks)["cases"][case]
    for r_max in ("0.5", "1.9"):       # 1.9 reaches past the next block on 4-rank slabs
        for sources in ("all", "higher"):
            assert r[f"halo_{sources}_{r_max}"], (sources, r_max)
            assert r[f"halo_{sources}_{r_max}_size"] > 0
    assert r["halo_pair_form"]


@pytest.mark.parametrize("ranks, case", ALL)
def test_distributed_pairs_equal_serial_kernel(results, ranks, case):
    pairs = results(ranks)["cases"][case]["pairs"]
    assert len(pairs) == 8  # same / cross set, log / linear bins, with / without subsampling
    for name, p in pairs.items():
        # counts, histograms, under/overflow, subsampled flags exactly, the same on every rank
        assert p["ints_exact"], name
        # n_a, n_b, m_a, m_b, r_sub, expected counts and g(r) exactly
        assert p["meta_exact"], name
        # float sums differ only in the order of additions (common practice: 1e-12 relative)
        assert p["sum_error"] < 1e-12, name
        if p["boundary_pairs"] is not None:
            assert p["boundary_pairs"] > 1000, name  # pairs across blocks and periodic faces


@pytest.mark.parametrize("ranks, case", ALL)
def test_distributed_collisions_equal_serial_kernel(results, ranks, case):
    found = results(ranks)["cases"][case]["collisions"]
    assert len(found) == 4  # same / cross set, two collision radii
    for name, c in found.items():
        # the contacts counted over the ranks equal the serial count on all particles,
        # exactly and the same on every rank (as the pair counts)
        assert c["exact"], name
        assert c["count"] > 20, name
        if ranks > 1 and name.endswith("0.4"):
            assert c["across_ranks"] > 0, name  # contacts of particles on different ranks


@pytest.mark.parametrize("ranks, case", ALL)
def test_gather_scatter_round_trip(results, ranks, case):
    r = results(ranks)["cases"][case]
    assert r["gather_exact"] and r["gather_none_elsewhere"]
    assert r["scatter_every"] and r["scatter_root"]
