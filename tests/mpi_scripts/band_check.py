"""MPI worker for tests/test_pruned_transforms.py: the pruned transforms with truncated
transposes (`band_limited`) of slab and pencil layouts against numpy.fft on the global array
and against the layout's own full transforms; prints one JSON line from rank 0.

    mpiexec -n P python band_check.py CASE [CASE ...]

CASE is KIND:N or pencil:P1xP2:N (as in transform_check.py). Each case is checked for the
2/3-rule band (K = (N-1)//3) and the spherical band (largest K with 9 K^2 < 2 N^2).
"""
import json
import sys
import tracemalloc

import numpy as np
from mpi4py import MPI

from eddybox.solver.fluid import fft
from eddybox.solver.fluid.mpi_layout import Decomposition, make_distributed_layout
from eddybox.solver.fluid.navier_stokes import DEALIASING

L = 2.0 * np.pi
comm = MPI.COMM_WORLD
rank, size = comm.Get_rank(), comm.Get_size()


def parse(case):
    parts = case.split(":")
    grid = [int(g) for g in parts[1].split("x")] if len(parts) == 3 else None
    return parts[0], grid, int(parts[-1])


def block(start, shape):
    return tuple(slice(s, s + m) for s, m in zip(start, shape))


def box_mask(n, keep):
    """Global (N, N, N/2+1) mask of |k_y| <= keep and k_z <= keep (any k_x)."""
    ik = np.abs(np.fft.fftfreq(n, 1.0 / n))
    ikz = np.arange(n // 2 + 1)
    return np.broadcast_to((ik[None, :, None] <= keep) & (ikz[None, None, :] <= keep),
                           (n, n, n // 2 + 1))


def independent_moved(n, p1, p2, keep):
    """Values that change owner in one truncated transform, counted from the definition
    (not from the layout's arithmetic): slab, every kept (k_y, k_z) line of an x plane that
    goes to another rank's k_y block; pencil, the kept k_z planes that leave a (x, y) block
    (row stage) and the kept-k_y rows (from the first to the last kept row of each block)
    that leave a (y -> k_y) block (column stage)."""
    from eddybox.solver.fluid.mpi_layout import split_range

    xs, xst = split_range(n, p1)
    ys = split_range(n, p2)[0]
    zs, zst = split_range(n // 2 + 1, p2)
    m = keep + 1
    kept_y = [bool(abs(int(round(k))) <= keep) for k in np.fft.fftfreq(n, 1.0 / n)]
    if p2 == 1:
        return sum(nx * sum(kept_y[s:s + c]) * m
                   for p, nx in enumerate(xs) for q, (c, s) in enumerate(zip(xs, xst)) if q != p)
    zk = [max(0, min(s + c, m) - s) for c, s in zip(zs, zst)]
    row = sum(ny * nx * zk[q2] for nx in xs for q, ny in enumerate(ys) for q2 in range(p2) if q2 != q)
    if p1 == 1:
        return row
    span = []
    for c, s in zip(xs, xst):
        rows = [j for j in range(s, s + c) if kept_y[j]]
        span.append(rows[-1] - rows[0] + 1 if rows else 0)
    col = sum(span[p2_] * nx * zk[q] for q in range(p2) for p, nx in enumerate(xs)
              for p2_ in range(p1) if p2_ != p)
    return row + col


def check(case):
    kind, grid, n = parse(case)
    lay = make_distributed_layout(n, L, kind, grid, comm)
    out = {"summary": lay.summary()}
    rng = np.random.default_rng(99 + n)
    u = rng.standard_normal((n, n, n))
    ref = np.fft.rfftn(u)  # reference: numpy.fft on the global array
    ps, ss = block(lay.phys_start, lay.phys_shape), block(lay.spec_start, lay.spec_shape)
    for name in ("two-thirds", "stage-shift"):
        keep = DEALIASING[name].axis_index(n)
        bt = lay.band_limited(keep)
        box = box_mask(n, keep)
        res = {"keep": keep, "pruned": bt is not lay}
        phys = fft.empty_real(lay.phys_shape)
        spec = fft.empty_complex(lay.spec_shape)
        full = fft.empty_complex(lay.spec_shape)
        scale = float(np.abs(ref).max())
        # forward: kept modes equal numpy's and the layout's full forward; interleaved with
        # full transforms, which share (and dirty) the transpose buffers
        phys[...] = u[ps]
        lay.forward(phys, full)
        bt.forward(phys, spec)
        lbox = box[ss]
        got = spec[lbox]  # the modes outside the box are left undefined by design
        res["forward_vs_numpy"] = lay.max(float(np.abs(got - ref[ss][lbox]).max(initial=0.0)) / scale)
        res["forward_vs_full"] = lay.max(float(np.abs(got - full[lbox]).max(initial=0.0)) / scale)
        # inverse of a band-limited spectrum, after a full transform dirtied the buffers
        band = np.where(box, ref, 0.0)
        want = np.fft.irfftn(band, s=(n, n, n), axes=(0, 1, 2)) * n**3
        wscale = float(np.abs(want).max())
        inv = 0.0
        for _ in range(2):
            lay.forward(phys, full)
            lay.scratch[...] = band[ss]
            bt.inverse(lay.scratch, phys)
            inv = max(inv, float(np.abs(phys - want[ps]).max()) / wscale)
            lay.scratch[...] = band[ss]
            full_phys = np.empty_like(phys)
            lay.inverse(lay.scratch, full_phys)
            res["inverse_vs_full"] = lay.max(float(np.abs(phys - full_phys).max()) / wscale)
        res["inverse_vs_numpy"] = lay.max(inv)
        # round trip through the pruned pair on a band-limited field
        phys[...] = want[ps] / n**3
        bt.forward(phys, spec)
        spec[~lbox] = 0.0
        bt.inverse(spec, phys)
        res["roundtrip"] = lay.max(float(np.abs(phys * lay.norm - want[ps] / n**3).max())
                                   / (wscale / n**3))
        # no allocation per transform once warmed up
        tracemalloc.start()
        for _ in range(3):
            bt.forward(phys, spec)
            spec[...] = band[ss]
            bt.inverse(spec, phys)
        res["peak_alloc"] = lay.max(int(tracemalloc.get_traced_memory()[1]))
        tracemalloc.stop()
        res["spec_block_bytes"] = int(spec.nbytes)
        # bytes moved, the layout's arithmetic against an independent count, and against
        # the full transposes
        moved = lay.sum(bt.bytes_moved_per_transform("forward")) if bt is not lay else None
        moved_inv = lay.sum(bt.bytes_moved_per_transform("inverse")) if bt is not lay else None
        g = Decomposition(n, lay.proc_grid, 0)
        res["bytes_forward"] = moved
        res["bytes_inverse"] = moved_inv
        res["bytes_independent"] = 16 * independent_moved(n, g.p1, g.p2, keep)
        res["bytes_full"] = lay.sum(lay.bytes_moved_per_transform("forward"))
        res["buffers_unchanged"] = bool(comm.allreduce(
            lay.buffer_bytes() == 16 * Decomposition(n, lay.proc_grid, rank).buffer_points(),
            op=MPI.LAND))
        out[name] = res
    return out


def main():
    report = {"ranks": size, "cases": {}}
    for case in sys.argv[1:]:
        report["cases"][case] = check(case)
    if rank == 0:
        print("RESULT " + json.dumps(report), flush=True)


if __name__ == "__main__":
    main()
