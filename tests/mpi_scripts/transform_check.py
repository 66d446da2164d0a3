"""MPI worker for tests/test_mpi_layout.py: builds distributed layouts on COMM_WORLD, checks
them against numpy.fft on the global array (identical on every rank, from a fixed seed) and
prints one JSON line of measured errors and flags from rank 0. Each case also checks the
pruned transforms with truncated transposes (`band_limited`) for the 2/3-rule band
(K = (N-1)//3) and the spherical band (largest K with 9 K^2 < 2 N^2), against numpy.fft and
against the layout's full transforms.

    mpiexec -n P python transform_check.py CASE [CASE ...]

CASE is KIND:N (auto, slab, pencil with an automatic grid), pencil:P1xP2:N, or
numpy-KIND...: the same with the numpy.fft fallback instead of pyFFTW. Before the cases every
rank asks for the impossible layouts listed in ERROR_CASES and records the ConfigError it gets.
"""
import json
import sys
import tracemalloc

import numpy as np
from mpi4py import MPI

from eddybox.solver.errors import ConfigError
from eddybox.solver.fluid import fft
from eddybox.solver.fluid.mpi_layout import (
    Decomposition,
    make_distributed_layout,
    transpose_buffer_points,
)
from eddybox.solver.fluid.navier_stokes import DEALIASING

L = 2.0 * np.pi
comm = MPI.COMM_WORLD
rank, size = comm.Get_rank(), comm.Get_size()

# (n, kind, grid) that no layout can serve on this many ranks
ERROR_CASES = {
    2: [(16, "serial", None), (16, "pencil", [3, 1]), (16, "slab", [2, 1])],
    4: [(4, "pencil", [1, 4]), (16, "pencil", [3, 1]), (16, "serial", None)],
}


def parse(case):
    backend = "auto"
    if case.startswith("numpy-"):
        backend, case = "numpy", case[len("numpy-"):]
    parts = case.split(":")
    grid = [int(g) for g in parts[1].split("x")] if len(parts) == 3 else None
    return parts[0], grid, int(parts[-1]), backend


def block(start, shape):
    return tuple(slice(s, s + m) for s, m in zip(start, shape))


def rel(a, b, scale):
    return float(np.max(np.abs(a - b)) / scale) if a.size else 0.0


def check_case(case):
    kind, grid, n, backend = parse(case)
    lay = make_distributed_layout(n, L, kind, grid, comm, backend=backend)
    rng = np.random.default_rng(1234 + n)
    u = rng.standard_normal((n, n, n))
    ref = np.fft.rfftn(u)  # the reference: numpy.fft, unnormalised forward
    ps, ss = block(lay.phys_start, lay.phys_shape), block(lay.spec_start, lay.spec_shape)
    res = {"summary": lay.summary(), "kind": lay.kind, "proc_grid": list(lay.proc_grid)}
    u_scale, f_scale = float(np.abs(u).max()), float(np.abs(ref).max())

    # forward into the layout's scratch, into a component of a (3, ...) array and into a
    # strided view (the spare-copy path)
    phys = fft.empty_real(lay.phys_shape)
    phys[...] = u[ps]
    fwd = 0.0
    uh = np.zeros((3,) + lay.spec_shape, complex)
    wide = np.zeros(lay.spec_shape[:2] + (lay.spec_shape[2] + 3,), complex)
    for out in (lay.scratch, uh[1], wide[..., 1:-2]):
        lay.forward(phys, out)
        fwd = max(fwd, rel(out, ref[ss], f_scale))
        assert np.array_equal(phys, u[ps]), "forward changed its input"
    res["forward_error"] = lay.max(fwd)

    # inverse of the exact spectrum: unnormalised c2r gives N^3 u
    inv = 0.0
    tall = np.zeros((lay.phys_shape[0] + 1,) + lay.phys_shape[1:])
    for out in (phys, tall[1:]):
        lay.scratch[...] = ref[ss]
        lay.inverse(lay.scratch, out)
        inv = max(inv, rel(out, n**3 * u[ps], n**3 * u_scale))
    res["inverse_error"] = lay.max(inv)

    # round trip through the layout alone
    phys[...] = u[ps]
    lay.forward(phys, lay.scratch)
    lay.inverse(lay.scratch, phys)
    res["roundtrip_error"] = lay.max(rel(phys * lay.norm, u[ps], u_scale))

    # no allocation per transform once warmed up (the spare copies exist by now)
    tracemalloc.start()
    for _ in range(3):
        lay.forward(phys, lay.scratch)
        lay.inverse(lay.scratch, phys)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    res["transform_peak_alloc"] = lay.max(int(peak))
    res["spec_block_bytes"] = int(lay.scratch.nbytes)

    # gather / scatter round trips: exact equality with the global arrays
    g_spec = rng.standard_normal((3, n, n, n // 2 + 1)) + 1j * rng.standard_normal((3, n, n, n // 2 + 1))
    g_phys = rng.standard_normal((3, n, n, n))
    got_s = lay.gather_spectral(np.ascontiguousarray(g_spec[(Ellipsis,) + ss]))
    got_p = lay.gather_physical(np.ascontiguousarray(g_phys[(Ellipsis,) + ps]))
    if rank == 0:
        res["gather_spectral_exact"] = bool(np.array_equal(got_s, g_spec))
        res["gather_physical_exact"] = bool(np.array_equal(got_p, g_phys))
    else:
        assert got_s is None and got_p is None
    out = np.zeros((3,) + lay.spec_shape, complex)
    lay.scatter_spectral(g_spec if rank == 0 else None, out)
    res["scatter_exact"] = bool(comm.allreduce(np.array_equal(out, g_spec[(Ellipsis,) + ss]),
                                               op=MPI.LAND))

    # reductions, against closed forms: sum_{r<P} (r+1) = P(P+1)/2, max_r r = P-1
    s_f, s_i = lay.sum(float(rank + 1)), lay.sum(rank + 1)
    m_n = lay.max(np.float64(rank))
    s_a = lay.sum(np.arange(4.0) * (rank + 1))
    m_a = lay.max(np.array([rank, -rank, 7]))
    res["reductions_ok"] = bool(
        type(s_f) is float and s_f == size * (size + 1) / 2
        and type(s_i) is int and s_i == size * (size + 1) // 2
        and type(m_n) is np.float64 and m_n == size - 1
        and isinstance(s_a, np.ndarray) and np.array_equal(s_a, np.arange(4.0) * size * (size + 1) / 2)
        and np.array_equal(m_a, [size - 1, 0, 7]))
    res["bcast_ok"] = bool(lay.bcast("stop" if rank == 0 else None) == "stop")

    # buffers: what the layout holds equals what the inventory predicts
    res["buffer_bytes_match"] = bool(comm.allreduce(
        lay.buffer_bytes() == 16 * transpose_buffer_points(n, size, kind, grid, rank=rank),
        op=MPI.LAND))
    res["buffer_bytes_max_match"] = bool(
        lay.max(lay.buffer_bytes()) == 16 * transpose_buffer_points(n, size, kind, grid))
    res["bytes_forward"] = lay.sum(lay.bytes_moved_per_transform("forward"))
    res["bytes_inverse"] = lay.sum(lay.bytes_moved_per_transform("inverse"))

    # local wavenumber arrays, gathered for comparison with the serial ones on rank 0
    info = comm.gather({"phys": (lay.phys_start, lay.phys_shape), "spec": (lay.spec_start, lay.spec_shape),
                        "ikx": lay.ikx, "iky": lay.iky, "ikz": lay.ikz, "wz": lay.wz,
                        "kx": lay.kx, "ky": lay.ky, "kz": lay.kz, "k0": lay.k0, "norm": lay.norm}, root=0)
    if rank == 0:
        res.update(wavenumber_checks(info, n))
    res["bands"] = band_checks(lay, u, ref, ps, ss, n)
    return res


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


def band_checks(lay, u, ref, ps, ss, n):
    """Per band: errors of the pruned pair against numpy.fft and the full transforms, bytes
    moved against an independent count, allocations."""
    out = {}
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


def wavenumber_checks(info, n):
    """Blocks tile the global index space once; concatenated local arrays equal the serial
    ones (numpy.fft.fftfreq / rfftfreq scaled to integers; wz 1 on kz = 0, N/2, else 2)."""
    nh = n // 2 + 1
    cover_p = np.zeros((n, n, n), int)
    cover_s = np.zeros((n, n, nh), int)
    ky_blocks, kz_blocks = {}, {}
    k0 = 2.0 * np.pi / L
    ok_k = True
    for d in info:
        cover_p[block(*d["phys"])] += 1
        cover_s[block(*d["spec"])] += 1
        (sx, sy, sz), _ = d["spec"]
        ky_blocks[sy] = d["iky"]
        kz_blocks[sz] = (d["ikz"], d["wz"])
        ok_k &= bool(np.array_equal(d["ikx"], np.fft.fftfreq(n, 1.0 / n).astype(int))
                     and np.allclose(d["kx"], k0 * d["ikx"], rtol=0, atol=0)
                     and np.allclose(d["ky"], k0 * d["iky"], rtol=0, atol=0)
                     and np.allclose(d["kz"], k0 * d["ikz"], rtol=0, atol=0)
                     and d["k0"] == k0 and d["norm"] == 1.0 / n**3)
    iky = np.concatenate([ky_blocks[s] for s in sorted(ky_blocks)])
    ikz = np.concatenate([kz_blocks[s][0] for s in sorted(kz_blocks)])
    wz = np.concatenate([kz_blocks[s][1] for s in sorted(kz_blocks)])
    ref_ky = np.fft.fftfreq(n, 1.0 / n).astype(int)
    ref_kz = np.fft.rfftfreq(n, 1.0 / n).astype(int)
    ref_wz = np.where((ref_kz == 0) | (ref_kz == n // 2), 1.0, 2.0)
    return {"tiling_ok": bool((cover_p == 1).all() and (cover_s == 1).all()),
            "wavenumbers_ok": bool(ok_k and np.array_equal(iky, ref_ky) and np.array_equal(ikz, ref_kz)
                                   and np.array_equal(wz, ref_wz))}


def check_errors():
    seen = []
    for n, kind, grid in ERROR_CASES.get(size, []):
        try:
            make_distributed_layout(n, L, kind, grid, comm)
            seen.append(None)
        except ConfigError as exc:
            seen.append(str(exc))
    everyone = comm.gather(seen, root=0)
    if rank == 0:
        return [{"case": list(map(str, c)), "messages": [e[i] for e in everyone]}
                for i, c in enumerate(ERROR_CASES.get(size, []))]
    return None


def main():
    report = {"ranks": size, "errors": check_errors(), "cases": {}}
    comm.Barrier()  # every rank got here: no rank is stuck inside a failed constructor
    for case in sys.argv[1:]:
        report["cases"][case] = check_case(case)
    if rank == 0:
        print("RESULT " + json.dumps(report), flush=True)


if __name__ == "__main__":
    main()
