"""MPI worker for tests/test_particle_migration.py: checks the distributed particle layer
(particles.migration) against serial references computed on the global data, which every rank
builds identically from a fixed seed, and prints one JSON line of flags and figures from rank 0.

    mpiexec -n P python particle_check.py CASE [CASE ...]

CASE is slab:N or pencil:P1xP2:N. References: numpy indexing of the global field (ghost
planes), the serial interpolation kernel on the whole field, a brute-force numpy ownership and
distance test (migration, halos), and the serial pair_statistics and ghost_collisions kernels
on all particles.
"""
import json
import sys

import numpy as np
from mpi4py import MPI

from eddybox.particles import migration as mig
from eddybox.particles.interpolation import interpolate
from eddybox.particles.pairs import (
    bin_centres,
    ghost_collisions,
    pair_statistics,
    separation_wr_edges,
    velocity_rms_1comp,
    wr_edges_from_rms,
)
from eddybox.solver.fluid.mpi_layout import make_distributed_layout

L = 2.0 * np.pi
ORDERS = (2, 4, 6, 8)
comm = MPI.COMM_WORLD
rank, size = comm.Get_rank(), comm.Get_size()


def parse(case):
    parts = case.split(":")
    grid = [int(g) for g in parts[1].split("x")] if len(parts) == 3 else None
    return parts[0], grid, int(parts[-1])


def every(flag):
    return bool(comm.allreduce(bool(flag), op=MPI.LAND))


def brute_owner(pos, n, blocks):
    """Owner by a direct search: the rank whose block holds the cell floor(x/h) mod N."""
    h = L / n
    cell = np.floor(pos / h).astype(np.int64) % n
    owner = np.full(len(pos), -1)
    for r, ((x0, y0, _), (nx, ny, _)) in enumerate(blocks):
        inside = ((cell[:, 0] >= x0) & (cell[:, 0] < x0 + nx)
                  & (cell[:, 1] >= y0) & (cell[:, 1] < y0 + ny))
        assert (owner[inside] == -1).all()
        owner[inside] = r
    assert (owner >= 0).all()
    return owner


def brute_distance(pos, n, block, split):
    """Periodic distance to a block in x, y: nearest of the images x + kL, k = -1, 0, 1, of
    the clipped distance max(lo - x, 0, x - hi) per axis."""
    h = L / n
    (x0, y0, _), (nx, ny, _) = block
    d2 = np.zeros(len(pos))
    for a, (lo, hi) in enumerate(((x0 * h, (x0 + nx) * h), (y0 * h, (y0 + ny) * h))):
        if not split[a]:
            continue
        d = np.min([np.maximum(np.maximum(lo - (pos[:, a] + k * L), 0.0), pos[:, a] + k * L - hi)
                    for k in (-1, 0, 1)], axis=0)
        d2 += d * d
    return np.sqrt(d2)


def global_particles(n, blocks, rng, count):
    """Uniform particles plus crowds near every block face and the periodic faces, and edge
    values (0, x == L, nextafter(L, 0), block faces exactly)."""
    h = L / n
    faces = sorted({b[0][0] * h for b in blocks} | {b[0][1] * h for b in blocks} | {0.0})
    uni = rng.uniform(0.0, L, (count, 3))
    crowd = rng.uniform(0.0, L, (count, 3))
    axis = rng.integers(0, 2, count)
    f = np.array(faces)[rng.integers(0, len(faces), count)]
    crowd[np.arange(count), axis] = np.mod(f + rng.uniform(-0.3, 0.3, count), L)
    edge = rng.uniform(0.0, L, (24, 3))
    special = [0.0, L, np.nextafter(L, 0.0), L - 1e-13] + faces[:4]
    for i, s in enumerate(special):
        edge[3 * i:3 * i + 3, i % 2] = s
        edge[3 * i + 1, 2] = s
    return np.concatenate([uni, crowd, edge])


def check_ghosts(lay, bm, n, u, res):
    h = L / n
    x0, y0, _ = lay.phys_start
    nx, ny, _ = lay.phys_shape
    local = np.ascontiguousarray(u[:, x0:x0 + nx, y0:y0 + ny, :])
    rng = np.random.default_rng(77 + rank)
    fill_ok = interp_ok = reach_ok = True
    ghosted_axes = 0
    for order in ORDERS:
        w = mig.ghost_width(order)
        gf = mig.GhostField(lay, bm, 3, w)
        got = gf.fill(local).copy()
        gf.array[...] = np.nan  # a second fill must rewrite every element
        gf.fill(local)
        sx, sy, sz = gf.start
        _, mx, my, mz = gf.array.shape
        ref = u[:, np.mod(sx + np.arange(mx), n)][:, :, np.mod(sy + np.arange(my), n)]
        fill_ok &= bool(np.array_equal(got, ref) and np.array_equal(gf.array, ref) and mz == n
                        and sz == 0)
        # positions: cells x0-3 .. x1+1 on ghosted axes (owned particles and predictor
        # positions two cells out), all cells on whole axes; plus the faces and edge values
        lo = np.array([x0, y0, 0], float)
        hi = np.array([x0 + nx, y0 + ny, n], float)
        for a, m in ((0, mx), (1, my)):
            if m < n:
                lo[a] -= mig.GHOST_MARGIN + 1
                hi[a] += mig.GHOST_MARGIN
        pos = np.mod((lo + rng.random((400, 3)) * (hi - lo)) * h, L)
        faces = [x0 * h, np.nextafter((x0 + nx) * h, 0.0), 0.0, np.nextafter(L, 0.0), L - 1e-13,
                 y0 * h, np.nextafter((y0 + ny) * h, 0.0)]
        edge = np.array([[a, b, c] for a in faces for b in faces for c in (0.0, 1.0)])
        mine = bm.owner(edge, h) == rank
        pos = np.concatenate([pos, edge[mine]])
        a_out, b_out = np.empty((len(pos), 3)), np.empty((len(pos), 3))
        gf.interpolate(pos, order, a_out)
        interpolate(u, (0, 0, 0), (n,) * 3, h, pos, order, b_out)
        interp_ok &= bool(np.array_equal(a_out, b_out)) and bool(mine.sum() > 0)
        # one more cell out on a ghosted axis leaves the block: the reach is as documented
        for a, m, start in ((0, mx, x0), (1, my, y0)):
            if m == n:
                continue
            ghosted_axes += 1
            for cell in (lo[a] - 1, hi[a]):
                p = np.full((1, 3), 0.5 * h)
                p[0, a] = np.mod((cell + 0.5) * h, L)
                try:
                    gf.interpolate(p, order, np.empty((1, 3)))
                    reach_ok = False
                except IndexError:
                    pass
        res.setdefault("ghost_bytes", {})[str(order)] = int(comm.allreduce(gf.nbytes, op=MPI.MAX))
    res["ghost_fill_exact"] = every(fill_ok)
    res["interp_bitwise"] = every(interp_ok)
    res["reach_tight"] = every(reach_ok)
    res["ghosted_axes"] = int(comm.allreduce(ghosted_axes))


def check_particles(lay, bm, n, res):
    h = L / n
    blocks = comm.allgather((tuple(lay.phys_start), tuple(lay.phys_shape)))
    split = bm.split
    rng = np.random.default_rng(2024 + n)
    g_x = global_particles(n, blocks, rng, 900)
    ng = len(g_x)
    g_v = rng.standard_normal((ng, 3))
    g_u = rng.standard_normal((ng, 3))
    g_ids = rng.permutation(ng).astype(np.int64) + 1000  # not the row order
    g_flag = rng.integers(-5, 5, ng).astype(np.int32)
    owner = brute_owner(g_x, n, blocks)
    res["owner_matches"] = every(np.array_equal(bm.owner(g_x, h), owner))

    # migration from a start that ignores ownership: rank r holds rows r, r + P, ...
    held = np.arange(rank, ng, size)
    out = mig.migrate(lay, bm, h, {"ids": g_ids[held], "x": g_x[held], "v": g_v[held],
                                   "u_seen": g_u[held], "flag": g_flag[held]})
    expect = [held[owner[held] == rank]]
    for s in range(size):
        if s != rank:
            rows = np.arange(s, ng, size)
            expect.append(rows[owner[rows] == rank])
    expect = np.concatenate(expect)
    res["migrate_order"] = every(np.array_equal(out["ids"], g_ids[expect]))
    res["migrate_rows"] = every(all(np.array_equal(out[k], a[expect]) for k, a in
                                    (("x", g_x), ("v", g_v), ("u_seen", g_u), ("flag", g_flag)))
                                and out["flag"].dtype == np.int32)
    res["migrate_owner"] = every((brute_owner(out["x"], n, blocks) == rank).all())
    res["migrate_count"] = int(comm.allreduce(len(out["ids"]))) == ng
    all_ids = np.concatenate(comm.allgather(out["ids"]))
    res["migrate_ids"] = bool(np.array_equal(np.sort(all_ids), np.sort(g_ids)))
    res["moved"] = int(comm.allreduce(int((owner[held] != rank).sum())))

    # halos against a brute-force selection over the global particles
    for r_max in (0.5, 1.9):
        dist = brute_distance(g_x, n, blocks[rank], split)
        for sources in ("all", "higher"):
            got = mig.halo_arrays(lay, bm, L, r_max, {"x": out["x"], "ids": out["ids"]},
                                  sources=sources)
            other = owner != rank if sources == "all" else owner > rank
            want = set(g_ids[other & (dist < r_max * (1.0 + mig.HALO_PAD))].tolist())
            ok = set(got["ids"].tolist()) == want and len(got["ids"]) == len(want)
            ok &= bool(np.array_equal(got["x"], g_x[np.argsort(g_ids)][got["ids"] - 1000]))
            key = f"halo_{sources}_{r_max}"
            res[key] = every(ok)
            res[key + "_size"] = int(comm.allreduce(len(want)))
    pos_h, vel_h = mig.halo(lay, bm, L, 0.5, out["x"], out["v"])
    res["halo_pair_form"] = every(pos_h.shape == vel_h.shape and pos_h.shape[1] == 3)

    # gather / scatter round trip
    got = mig.gather_by_id(lay, out["ids"], {"x": out["x"], "v": out["v"], "flag": out["flag"]})
    order = np.argsort(g_ids)
    if rank == 0:
        res["gather_exact"] = bool(np.array_equal(got["ids"], g_ids[order])
                                   and np.array_equal(got["x"], g_x[order])
                                   and np.array_equal(got["v"], g_v[order])
                                   and np.array_equal(got["flag"], g_flag[order]))
    res["gather_none_elsewhere"] = every(rank == 0 or got is None)
    mine_sorted = order[owner[order] == rank]
    for root in (None, 0):
        src = got if root is None or rank == 0 else None
        if root is None:
            src = {"ids": g_ids[order], "x": g_x[order], "v": g_v[order], "flag": g_flag[order]}
        back = mig.scatter_by_owner(lay, bm, h, None if src is None else src["ids"],
                                    None if src is None else {k: src[k] for k in ("x", "v", "flag")},
                                    root=root)
        ok = (np.array_equal(back["ids"], g_ids[mine_sorted])
              and np.array_equal(back["x"], g_x[mine_sorted])
              and np.array_equal(back["v"], g_v[mine_sorted])
              and np.array_equal(back["flag"], g_flag[mine_sorted]) and back["flag"].dtype == np.int32)
        res[f"scatter_{'every' if root is None else 'root'}"] = every(ok)
    return out, g_x, g_v, g_ids


def compare(dist, ref):
    """Integers exactly, and the whole result bitwise the same on every rank; sums to 1e-12
    (sum_wr relative to sum |w_r|: it adds terms of both signs, so it may be near zero)."""
    mine = (dist.counts.tobytes(), dist.wr_hist.tobytes(), dist.sum_wr.tobytes(),
            dist.sum_trans.tobytes())
    same_everywhere = all(e == mine for e in comm.allgather(mine))
    ints = same_everywhere and all(np.array_equal(getattr(dist, k), getattr(ref, k)) for k in
                                   ("counts", "wr_hist", "wr_under", "wr_over", "subsampled"))
    meta = (dist.n_a, dist.n_b, dist.m_a, dist.m_b, dist.r_sub, dist.same_set) == \
        (ref.n_a, ref.n_b, ref.m_a, ref.m_b, ref.r_sub, ref.same_set)
    exp = (np.array_equal(dist.expected, ref.expected)
           and np.array_equal(dist.rdf, ref.rdf, equal_nan=True))
    err = 0.0
    for k in ("sum_wr2", "sum_abs", "sum_inward", "sum_trans"):
        a, b = getattr(dist, k), getattr(ref, k)
        err = max(err, float(np.max(np.abs(a - b) / np.maximum(np.abs(b), 1e-300))))
    err = max(err, float(np.max(np.abs(dist.sum_wr - ref.sum_wr) / np.maximum(ref.sum_abs, 1e-300))))
    return bool(ints), bool(meta and exp), err


def boundary(serial, own, sub):
    """Pairs whose particles sit on different ranks (all pairs minus the own-own ones)."""
    inside = int(comm.allreduce(int(own.counts.sum())))
    return None if sub else int(serial.counts.sum()) - inside


def check_pairs(lay, bm, out, g_x, g_v, g_ids, res):
    ids = out["ids"]
    order = np.argsort(g_ids)
    gx, gv = g_x[order], g_v[order]     # global particles by id: row i has id 1000 + i
    ng = len(gx)
    na = ng // 2                         # set a: ids below 1000 + na; set b: the rest
    in_a = ids < 1000 + na
    rms = velocity_rms_1comp(gv)
    rng = np.random.default_rng(99)
    sub_a = 1000 + np.sort(rng.choice(na, na * 2 // 5, replace=False))
    sub_b = 1000 + na + np.sort(rng.choice(ng - na, (ng - na) // 3, replace=False))
    results = {}
    edge_sets = (("log", np.geomspace(0.05, 1.9, 13)), ("lin", np.linspace(0.0, 1.2, 9)))
    for edges_name, r_edges in edge_sets:
        # log bins: one sinh row of w_r edges per separation bin (as a run); linear: one row
        wr_edges = (separation_wr_edges(0.5 * rms * bin_centres(r_edges), 8 * rms, 21)
                    if edges_name == "log" else wr_edges_from_rms(rms, 21))
        for sub in (False, True):
            r_sub = r_edges[len(r_edges) // 2] if sub else None
            # one set (a)
            d = mig.distributed_pair_statistics(
                lay, bm, L, r_edges, wr_edges, out["x"][in_a], out["v"][in_a],
                n_a_global=na, ids_a=ids[in_a], r_sub=r_sub, subsample_ids=sub_a if sub else None)
            s = pair_statistics(gx[:na], gv[:na], L, r_edges, wr_edges, r_sub=r_sub,
                                subsample=(sub_a - 1000) if sub else None)
            own = pair_statistics(out["x"][in_a], out["v"][in_a], L, r_edges, wr_edges)
            results[f"same_{edges_name}_{sub}"] = compare(d, s) + (boundary(s, own, sub),)
            # two sets (a, b)
            d = mig.distributed_pair_statistics(
                lay, bm, L, r_edges, wr_edges, out["x"][in_a], out["v"][in_a], out["x"][~in_a],
                out["v"][~in_a], ids_a=ids[in_a], ids_b=ids[~in_a], r_sub=r_sub,
                subsample_ids=(sub_a, sub_b) if sub else None)
            s = pair_statistics(gx[:na], gv[:na], L, r_edges, wr_edges, gx[na:], gv[na:],
                                r_sub=r_sub,
                                subsample=((sub_a - 1000), (sub_b - 1000 - na)) if sub else None)
            own = pair_statistics(out["x"][in_a], out["v"][in_a], L, r_edges, wr_edges,
                                  out["x"][~in_a], out["v"][~in_a])
            results[f"cross_{edges_name}_{sub}"] = compare(d, s) + (boundary(s, own, sub),)
    # every rank must hold the same reduced result
    res["pairs"] = {k: {"ints_exact": every(v[0]), "meta_exact": every(v[1]),
                        "sum_error": float(comm.allreduce(v[2], op=MPI.MAX)),
                        "boundary_pairs": v[3]} for k, v in results.items()}


def check_collisions(lay, bm, out, g_x, g_ids, res):
    """Contacts counted over the ranks against the serial kernel on every particle: the
    particles as owned now are the start positions, displacements drawn per id (some long
    enough to carry a particle into the next block, so pairs across blocks and periodic faces
    make contact)."""
    ids = out["ids"]
    order = np.argsort(g_ids)
    gx = g_x[order]
    ng = len(gx)
    na = ng // 2
    g_d = np.random.default_rng(4242).standard_normal((ng, 3)) * 0.15
    disp = g_d[ids - 1000]
    in_a = ids < 1000 + na
    found = {}
    for radius in (0.15, 0.4):
        d = mig.distributed_ghost_collisions(lay, bm, L, radius, out["x"][in_a], disp[in_a])
        s = ghost_collisions(gx[:na], g_d[:na], L, radius)
        own = ghost_collisions(out["x"][in_a], disp[in_a], L, radius)
        found[f"same_{radius}"] = (d == s and len(set(comm.allgather(d))) == 1, s,
                                   s - int(comm.allreduce(own)))
        d = mig.distributed_ghost_collisions(lay, bm, L, radius, out["x"][in_a], disp[in_a],
                                             out["x"][~in_a], disp[~in_a])
        s = ghost_collisions(gx[:na], g_d[:na], L, radius, gx[na:], g_d[na:])
        own = ghost_collisions(out["x"][in_a], disp[in_a], L, radius, out["x"][~in_a],
                               disp[~in_a])
        found[f"cross_{radius}"] = (d == s and len(set(comm.allgather(d))) == 1, s,
                                    s - int(comm.allreduce(own)))
    res["collisions"] = {k: {"exact": every(v[0]), "count": v[1], "across_ranks": v[2]}
                         for k, v in found.items()}


def check_case(case):
    kind, grid, n = parse(case)
    lay = make_distributed_layout(n, L, kind, grid, comm)
    bm = mig.BlockMap(lay)
    res = {"proc_grid": list(bm.proc_grid)}
    u = np.random.default_rng(1234 + n).standard_normal((3, n, n, n))
    check_ghosts(lay, bm, n, u, res)
    res["ghost_bytes_predicted"] = mig.ghost_field_bytes(n, 8, size, kind, grid)
    out, g_x, g_v, g_ids = check_particles(lay, bm, n, res)
    check_pairs(lay, bm, out, g_x, g_v, g_ids, res)
    check_collisions(lay, bm, out, g_x, g_ids, res)
    return res


def main():
    report = {"ranks": size, "cases": {}}
    for case in sys.argv[1:]:
        report["cases"][case] = check_case(case)
    if rank == 0:
        print("RESULT " + json.dumps(report), flush=True)


if __name__ == "__main__":
    main()
