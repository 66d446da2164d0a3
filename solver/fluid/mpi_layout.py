"""Distributed layouts: the slab and pencil decompositions of the N^3 grid over MPI ranks,
with the same interface as `eddybox.solver.fluid.serial_layout.SerialLayout`.

Method: the transpose method for multidimensional FFTs on distributed memory (Foster &
Worley 1997, SIAM J. Sci. Comput. 18(3), 806-837): every 1-D transform runs on data that is
local to the rank, and global transposes (MPI_Alltoallv) between the stages move each axis in
turn into local memory. With a 2-D process grid (pencils; Eleftheriou et al. 2005, IBM J.
Res. Dev. 49(2/3), 457-464) each transpose involves only one row or one column of the grid.
The transform itself is the unnormalised 3-D DFT

    u_hat[kx, ky, kz] = sum_{x,y,z} u[x, y, z] exp(-2 pi i (kx x + ky y + kz z) / N),

kz = 0..N/2 (real-to-complex), computed axis by axis: z (r2c), then y, then x.

Process grid P1 x P2; rank r sits at row p = r // P2 and column q = r % P2.

    physical block  (x, y, z)    x split over P1 (index p), y split over P2 (index q), z whole
    Fourier block   (kx, ky, kz) kx whole, ky split over P1 (index p), kz split over P2 (index q)

Both blocks are tensor products of index ranges, so every spectral kernel works on them with
the local 1-D wavenumber arrays. A slab is the grid P x 1 (x split in physical space, ky in
Fourier space). Blocks may be uneven: a range of n points over m parts gives the first n % m
parts one point more (so rank 0 always holds the largest block). Limits: P1 <= N (x and ky)
and P2 <= N/2 + 1 (the half-complex kz planes); beyond them a rank would hold nothing.

Forward transform of one component (inverse: the same steps reversed):

    slab   (P2 = 1): r2c over (z, y) in one 2-D plan -> pack ky segments -> Alltoallv over
                     all ranks, received straight into the (kx, ky_p, kz) block -> c2c along x
    pencil (P2 > 1): r2c along z -> pack kz segments in (y, x, kz) order -> Alltoallv in the
                     row (ranks with the same p), received straight into a (y, x_p, kz_q)
                     block -> c2c along y in place -> Alltoallv in the column (ranks with the
                     same q), sent straight from ky segments of that block -> unpack to
                     (kx, ky_p, kz_q) -> c2c along x

Every buffer is allocated once; messages go through contiguous complex numpy buffers with
count and displacement tuples built once (never pickled objects).
"""
from __future__ import annotations

import math

import numpy as np

from eddybox.solver.errors import ConfigError
from eddybox.solver.fluid import fft
from eddybox.solver.fluid.serial_layout import SerialLayout, fft_index, rfft_index

COMPLEX_BYTES = 16
KINDS = ("auto", "serial", "slab", "pencil")
_SMALL_BLOCK = 48**3  # local points below which FFTW threads cost more than they save
_TAG_GATHER, _TAG_SCATTER = 7301, 7302


# ---------------------------------------------------------------------------------------------
# Geometry (no MPI): which ranges each rank holds, buffer sizes and message sizes
# ---------------------------------------------------------------------------------------------
def split_range(n: int, parts: int):
    """Counts and starts of n points over `parts` blocks, the first n % parts one larger."""
    base, extra = divmod(int(n), int(parts))
    counts = [base + (1 if i < extra else 0) for i in range(parts)]
    starts = [i * base + min(i, extra) for i in range(parts)]  # the running sum, in O(parts)
    return counts, starts


def _allowed(n: int) -> str:
    nh = n // 2 + 1
    return (f"slab allows at most N = {n} ranks; pencil allows a grid [P1, P2] with P1 <= N = {n} "
            f"and P2 <= N/2+1 = {nh} (at most {n * nh} ranks)")


def _grid_ok(n: int, p1: int, p2: int) -> bool:
    return 1 <= p1 <= n and 1 <= p2 <= n // 2 + 1


def auto_pencil_grid(n: int, ranks: int):
    """The most nearly square grid P1 x P2 = ranks that fits N (P1 <= P2 on a tie), or None."""
    best = None
    for p1 in range(1, ranks + 1):
        if ranks % p1:
            continue
        p2 = ranks // p1
        if not _grid_ok(n, p1, p2):
            continue
        key = (max(p1, p2) / min(p1, p2), p1 > p2)
        if best is None or key < best[0]:
            best = (key, (p1, p2))
    return None if best is None else best[1]


def resolve_grid(n: int, ranks: int, kind: str = "auto", grid=None):
    """(kind, (P1, P2)) for a request, kind one of 'serial', 'slab', 'pencil'; ConfigError
    naming parallel.layout / parallel.grid when the request cannot be met."""
    n, ranks = int(n), int(ranks)
    if kind not in KINDS:
        raise ConfigError(f"parallel.layout: {kind!r} is not allowed; expected one of "
                          f"{', '.join(KINDS)}")
    if grid is not None:
        if kind not in ("auto", "pencil"):
            raise ConfigError(f"parallel.grid: only used with parallel.layout: pencil (or auto), "
                              f"not with {kind}")
        try:
            p1, p2 = (int(g) for g in grid)
            if [p1, p2] != [g for g in grid] or p1 < 1 or p2 < 1:
                raise ValueError
        except (TypeError, ValueError):
            raise ConfigError(f"parallel.grid: expected two positive integers [P1, P2], got "
                              f"{grid!r}") from None
        if p1 * p2 != ranks:
            raise ConfigError(f"parallel.grid: [{p1}, {p2}] holds {p1 * p2} ranks but this run has "
                              f"{ranks}; give [P1, P2] with P1 * P2 = {ranks}")
        if p1 > n:
            raise ConfigError(f"parallel.grid: P1 = {p1} splits the {n} x-planes (and ky planes) and "
                              f"may be at most N = {n}; {_allowed(n)}")
        if p2 > n // 2 + 1:
            raise ConfigError(f"parallel.grid: P2 = {p2} splits the N/2+1 = {n // 2 + 1} half-complex "
                              f"kz planes and may be at most {n // 2 + 1}; {_allowed(n)}")
        return "pencil", (p1, p2)
    if kind == "serial" or (ranks == 1 and kind == "auto"):
        if ranks > 1:
            raise ConfigError(f"parallel.layout: serial runs on one rank, but this run has {ranks}; "
                              "use auto, slab or pencil, or start without mpiexec")
        return "serial", (1, 1)
    if kind == "slab" or (kind == "auto" and ranks <= n):
        if ranks > n:
            raise ConfigError(f"parallel.layout: slab splits the {n} x-planes over the ranks, so it "
                              f"allows at most {n} ranks, but this run has {ranks}; use "
                              f"parallel.layout: pencil or auto ({_allowed(n)})")
        return "slab", (ranks, 1)
    pg = auto_pencil_grid(n, ranks)
    if pg is None:
        raise ConfigError(f"parallel.layout: {kind}: no process grid fits {ranks} ranks on a {n}^3 "
                          f"grid ({_allowed(n)} with P1 * P2 = {ranks}); use another number of "
                          "ranks or more grid.points")
    return "pencil", pg


class Decomposition:
    """The index ranges, transpose buffers and messages of one rank of a P1 x P2 grid."""

    def __init__(self, n: int, grid, rank: int):
        self.n, self.nh = int(n), int(n) // 2 + 1
        self.p1, self.p2 = (int(g) for g in grid)
        self.rank = int(rank)
        self.row, self.col = divmod(self.rank, self.p2)  # (p, q)
        self.x = split_range(self.n, self.p1)    # physical x and Fourier ky, over p
        self.y = split_range(self.n, self.p2)    # physical y, over q
        self.z = split_range(self.nh, self.p2)   # Fourier kz, over q
        p, q = self.row, self.col
        self.nx, self.x0 = self.x[0][p], self.x[1][p]
        self.ny, self.y0 = self.y[0][q], self.y[1][q]
        self.nz, self.z0 = self.z[0][q], self.z[1][q]
        self.nky, self.ky0 = self.nx, self.x0
        self.phys_shape = (self.nx, self.ny, self.n)
        self.phys_start = (self.x0, self.y0, 0)
        self.spec_shape = (self.n, self.nky, self.nz)
        self.spec_start = (0, self.ky0, self.z0)

    @property
    def slab(self) -> bool:
        return self.p2 == 1

    def buffer_shapes(self) -> dict:
        """name -> shape of every transpose buffer this rank allocates."""
        n, nh, nx, ny, nz, nky = self.n, self.nh, self.nx, self.ny, self.nz, self.nky
        if self.slab:
            return {"half": (nx, n, nh), "send": (nx * n * nh,), "kx_line": (n, nky, nh)}
        shapes = {"half": (nx, ny, nh), "row_send": (ny * nx * nh,), "y_line": (n, nx, nz)}
        if self.p1 > 1:
            shapes["col_recv"] = (nky * n * nz,)
        shapes["kx_line"] = (n, nky, nz)
        return shapes

    def buffer_points(self) -> int:
        return sum(math.prod(s) for s in self.buffer_shapes().values())

    def row_counts(self):
        """Elements sent to / received from each rank of the row in the forward transpose."""
        send = [self.ny * self.nx * c for c in self.z[0]]
        recv = [c * self.nx * self.nz for c in self.y[0]]
        return send, recv

    def col_counts(self):
        """Elements sent to / received from each rank of the column (slab: of all ranks)."""
        if self.slab:
            send = [self.nx * c * self.nh for c in self.x[0]]
            recv = [c * self.nky * self.nh for c in self.x[0]]
        else:
            send = [c * self.nx * self.nz for c in self.x[0]]
            recv = [self.nky * c * self.nz for c in self.x[0]]
        return send, recv

    def bytes_sent(self, direction: str = "forward", keep: int | None = None) -> int:
        """Bytes this rank sends to other ranks in one transform (its own segment stays);
        with `keep`, in the truncated transposes of `band_limited(keep)`."""
        i = 0 if direction == "forward" else 1  # the inverse sends what the forward receives
        band = None if keep is None else self.band(keep)
        total = 0
        if not self.slab:
            c = (self.row_counts() if band is None else band.row_counts())[i]
            total += sum(c) - c[self.col]
        if self.p1 > 1:
            c = (self.col_counts() if band is None else band.col_counts())[i]
            total += sum(c) - c[self.row]
        return total * COMPLEX_BYTES

    def band(self, keep: int) -> "BandGeometry":
        return BandGeometry(self, keep)


def kept_runs(start: int, count: int, n: int, keep: int):
    """The runs (first global index, length) of the FFT-ordered index range [start,
    start + count) whose wavenumber satisfies |k| <= keep (indices 0..keep, n-keep..n-1)."""
    runs = []
    for lo, hi in ((0, keep + 1), (n - keep, n)):
        a, b = max(start, lo), min(start + count, hi)
        if b > a:
            runs.append((a, b - a))
    return runs


class BandGeometry:
    """Which rows and planes the truncated transposes of band-limited fields (|k_y|, |k_z|
    <= keep) move, and how many values: only kept k_z planes leave the row stage, only kept
    k_y rows of those the column stage (slab: both at once).

    The pencil's column stage sends each k_y block's rows straight from the y-transformed
    buffer, so it moves one contiguous run per block: from its first to its last kept row
    (the same as the kept rows, except for a middle block that straddles the discarded rows
    between k_y = keep and N - keep, possible with spherical truncation and P1 >= 3)."""

    def __init__(self, geo: Decomposition, keep: int):
        self.geo, self.keep = geo, int(keep)
        n, m = geo.n, int(keep) + 1
        self.m = m  # kept k_z planes 0..keep
        #: kept k_z planes in each column's k_z block, kept k_y rows in each row's k_y block
        self.zk = [max(0, min(s + c, m) - s) for c, s in zip(*geo.z)]
        self.yruns = [kept_runs(s, c, n, self.keep) for c, s in zip(*geo.x)]
        if not geo.slab and geo.p1 > 1:
            self.yruns = [[(r[0][0], r[-1][0] + r[-1][1] - r[0][0])] if r else []
                          for r in self.yruns]
        self.yk = [sum(r[1] for r in runs) for runs in self.yruns]
        self.mz = self.zk[geo.col] if not geo.slab else m   # kept k_z here
        self.ky = self.yk[geo.row]                          # kept k_y rows here
        #: local offsets (in this rank's k_y block) and lengths of the kept rows
        self.local_runs = [(a - geo.ky0, c) for a, c in self.yruns[geo.row]]

    def row_counts(self):
        g = self.geo
        return [g.ny * g.nx * c for c in self.zk], [c * g.nx * self.mz for c in g.y[0]]

    def col_counts(self):
        g = self.geo
        if g.slab:
            return [g.nx * k * self.m for k in self.yk], [c * self.ky * self.m for c in g.x[0]]
        return [k * g.nx * self.mz for k in self.yk], [self.ky * c * self.mz for c in g.x[0]]


def transpose_buffer_points(n: int, ranks: int, layout: str = "auto", grid=None,
                            rank: int | None = None) -> int:
    """Complex elements of the transpose buffers a rank allocates (rank None: the largest
    over the ranks, which is rank 0's). Equals `DistributedLayout.buffer_bytes() / 16`."""
    kind, pg = resolve_grid(n, ranks, layout, grid)
    if kind == "serial":
        return 0
    # every buffer grows with the block sizes, and rank 0 holds the largest ones
    return Decomposition(n, pg, 0 if rank is None else rank).buffer_points()


def transpose_bytes_sent(n: int, ranks: int, layout: str = "auto", grid=None,
                         rank: int | None = None, direction: str = "forward",
                         keep: int | None = None) -> int:
    """Bytes a rank sends per transform (rank None: the largest over the ranks); with `keep`,
    per truncated transform of a field band-limited to |k_y|, |k_z| <= keep."""
    kind, pg = resolve_grid(n, ranks, layout, grid)
    if kind == "serial":
        return 0
    if keep is not None and 2 * keep + 1 >= n:
        keep = None  # nothing to prune (band_limited returns the full transforms)
    if rank is not None:
        return Decomposition(n, pg, rank).bytes_sent(direction, keep)
    return int(bytes_sent_per_rank(n, pg, direction, keep).max())


def bytes_sent_per_rank(n: int, grid, direction: str = "forward", keep: int | None = None):
    """Bytes every rank [p, q] of a P1 x P2 grid sends in one transform (truncated with
    `keep`): `Decomposition.bytes_sent` for all ranks at once, in O(P1 + P2) rather than
    O(P1 P2 (P1 + P2)) (a run on thousands of ranks). Each rank sends all its values but the
    ones it keeps: forward, rows of its x block to the other k_y blocks (and first the other
    k_z planes, pencil); the inverse sends back what the forward received."""
    p1, p2 = (int(g) for g in grid)
    nh = n // 2 + 1
    xs = np.array(split_range(n, p1)[0])
    ys = np.array(split_range(n, p2)[0])
    if keep is None:
        yk = xs                                       # k_y rows moved per k_y block
        zk = np.array(split_range(nh, p2)[0]) if p2 > 1 else np.array([nh])
    else:
        band = Decomposition(n, (p1, p2), 0).band(keep)
        yk = np.array(band.yk)
        zk = np.array(band.zk) if p2 > 1 else np.array([band.m])
    nx, ny, nz, ky = xs[:, None], ys[None, :], zk[None, :], yk[:, None]
    total = np.zeros((p1, p2), dtype=np.int64)
    forward = direction == "forward"
    if p2 > 1:  # row stage: k_z planes between the ranks of a row
        total += ny * nx * (zk.sum() - nz) if forward else nx * nz * (n - ny)
    if p1 > 1:  # column stage (slab: the only one)
        total += nx * nz * (yk.sum() - ky) if forward else ky * nz * (n - nx)
    return total * COMPLEX_BYTES


# ---------------------------------------------------------------------------------------------
# The layout
# ---------------------------------------------------------------------------------------------
def _segments(flat: np.ndarray, counts, shapes):
    """Views of consecutive pieces of a flat buffer, reshaped."""
    out, off = [], 0
    for c, s in zip(counts, shapes):
        out.append(flat[off:off + c].reshape(s))
        off += c
    return out


def _vspec(buf, counts, datatype):
    """An Alltoallv buffer argument: buffer, (counts, displacements), datatype."""
    displs = tuple(int(sum(counts[:i])) for i in range(len(counts)))
    return [buf, (tuple(int(c) for c in counts), displs), datatype]


class DistributedLayout:
    """Slab (grid P x 1) or pencil (grid P1 x P2) layout on an MPI communicator.

    Output goes through rank 0: h5py as installed is serial (no parallel HDF5), so
    `gather_spectral` / `gather_physical` collect the global field on rank 0, which writes
    files in global index order whatever the layout (a run can restart on another layout or
    rank count); the cost is one global field of memory on rank 0 while writing, plus one
    block as a receive buffer. `scatter_spectral` is the reverse for restarts.
    """

    def __init__(self, n: int, length: float, kind: str, grid, comm, threads: int | None = None,
                 backend: str = "auto"):
        from mpi4py import MPI

        self._mpi = MPI
        self.kind = kind
        self.comm = comm
        self.rank, self.size = comm.Get_rank(), comm.Get_size()
        self.n = int(n)
        self.length = float(length)
        self.proc_grid = tuple(int(g) for g in grid)
        geo = self.geometry = Decomposition(self.n, self.proc_grid, self.rank)
        self.phys_shape, self.phys_start = geo.phys_shape, geo.phys_start
        self.spec_shape, self.spec_start = geo.spec_shape, geo.spec_start

        self.k0 = 2.0 * np.pi / self.length
        self.ikx = fft_index(self.n)
        self.iky = fft_index(self.n)[geo.ky0:geo.ky0 + geo.nky]
        self.ikz = rfft_index(self.n)[geo.z0:geo.z0 + geo.nz]
        self.kx, self.ky, self.kz = self.k0 * self.ikx, self.k0 * self.iky, self.k0 * self.ikz
        # Hermitian weight: planes kz = 0 and kz = N/2 stand for themselves only
        self.wz = np.where((self.ikz == 0) | (self.ikz == self.n // 2), 1.0, 2.0)
        self.norm = 1.0 / float(self.n) ** 3

        node = comm.Split_type(MPI.COMM_TYPE_SHARED)
        self.ranks_on_node = node.Get_size()
        node.Free()
        self.threads = threads or fft.thread_count(self.ranks_on_node)
        fft_threads = self.threads if math.prod(self.phys_shape) >= _SMALL_BLOCK else 1

        if geo.slab:
            self.row_comm, self.col_comm = None, comm
        else:
            self.row_comm = comm.Split(geo.row, geo.col)  # same p, ordered by q
            self.col_comm = comm.Split(geo.col, geo.row)  # same q, ordered by p
        self.scratch = fft.empty_complex(self.spec_shape)
        self._buffers = {name: fft.empty_complex(shape)
                         for name, shape in geo.buffer_shapes().items()}
        self._spares = {}

        def plan(kind, a_in, a_out, axes):
            return fft.Plan(kind, a_in, a_out, axes=axes, threads=fft_threads, backend=backend)

        b = self._buffers
        real = fft.empty_real(self.phys_shape)  # planning target only; callers' arrays are used
        self._real, self._plan = real, plan
        self._band = {}
        cdt = MPI.C_DOUBLE_COMPLEX
        if geo.slab:
            self._r2c = plan("r2c", real, b["half"], (1, 2))
            self._c2r = plan("c2r", b["half"], real, (1, 2))
            send, recv = geo.col_counts()
            kx = geo.x[0]
            # pack: ky segment p' of the half-transformed slab -> piece p' of the send buffer
            segs = _segments(b["send"], send, [(geo.nx, c, geo.nh) for c in kx])
            self._col_pack = [(seg, b["half"][:, s:s + c, :])
                              for seg, s, c in zip(segs, geo.x[1], kx)]
            self._col_fwd = (_vspec(b["send"], send, cdt), _vspec(b["kx_line"], recv, cdt))
            self._col_inv = (_vspec(b["kx_line"], recv, cdt), _vspec(b["send"], send, cdt))
        else:
            self._r2c = plan("r2c", real, b["half"], (2,))
            self._c2r = plan("c2r", b["half"], real, (2,))
            send, recv = geo.row_counts()
            # pack: kz segment q' of the z-transformed pencil, stored in (y, x, kz) order
            segs = _segments(b["row_send"], send, [(geo.ny, geo.nx, c) for c in geo.z[0]])
            self._row_pack = [(seg, b["half"][:, :, s:s + c].transpose(1, 0, 2))
                              for seg, s, c in zip(segs, geo.z[1], geo.z[0])]
            self._row_fwd = (_vspec(b["row_send"], send, cdt), _vspec(b["y_line"], recv, cdt))
            self._row_inv = (_vspec(b["y_line"], recv, cdt), _vspec(b["row_send"], send, cdt))
            self._y_f = plan("c2c_f", b["y_line"], b["y_line"], (0,))
            self._y_b = plan("c2c_b", b["y_line"], b["y_line"], (0,))
            send, recv = geo.col_counts()
            col_recv = b.get("col_recv", b["y_line"].reshape(-1))  # P1 = 1: nothing to move
            # unpack: piece p' (ky_p, x_p', kz_q) -> rows x_p' of the (kx, ky_p, kz_q) block
            segs = _segments(col_recv, recv, [(geo.nky, c, geo.nz) for c in geo.x[0]])
            self._col_unpack = [(b["kx_line"][s:s + c], seg.transpose(1, 0, 2))
                                for seg, s, c in zip(segs, geo.x[1], geo.x[0])]
            self._col_fwd = (_vspec(b["y_line"], send, cdt), _vspec(col_recv, recv, cdt))
            self._col_inv = (_vspec(col_recv, recv, cdt), _vspec(b["y_line"], send, cdt))
        self._x_f = plan("c2c_f", b["kx_line"], self.scratch, (0,))
        self._x_b = plan("c2c_b", self.scratch, b["kx_line"], (0,))

    # --- transforms (unnormalised; the inverse may destroy its input) ----------------------
    def forward(self, phys: np.ndarray, spec: np.ndarray) -> np.ndarray:
        """Real local physical block -> local Fourier block (kx, ky, kz-half order)."""
        b, geo = self._buffers, self.geometry
        self._run_from(self._r2c, phys, b["half"])
        if geo.slab:
            for seg, src in self._col_pack:
                np.copyto(seg, src)
            self.comm.Alltoallv(*self._col_fwd)
        else:
            for seg, src in self._row_pack:
                np.copyto(seg, src)
            self.row_comm.Alltoallv(*self._row_fwd)
            self._y_f()
            if geo.p1 > 1:
                self.col_comm.Alltoallv(*self._col_fwd)
            for dst, seg in self._col_unpack:
                np.copyto(dst, seg)
        self._run_into(self._x_f, b["kx_line"], spec)
        return spec

    def inverse(self, spec: np.ndarray, phys: np.ndarray) -> np.ndarray:
        """Local Fourier block -> real local physical block (c2r; `spec` may be destroyed)."""
        b, geo = self._buffers, self.geometry
        self._run_from(self._x_b, spec, b["kx_line"])
        if geo.slab:
            self.comm.Alltoallv(*self._col_inv)
            for seg, dst in self._col_pack:
                np.copyto(dst, seg)
        else:
            for dst, seg in self._col_unpack:
                np.copyto(seg, dst)
            if geo.p1 > 1:
                self.col_comm.Alltoallv(*self._col_inv)
            self._y_b()
            self.row_comm.Alltoallv(*self._row_inv)
            for seg, dst in self._row_pack:
                np.copyto(dst, seg)
        self._run_into(self._c2r, b["half"], phys)
        return phys

    def band_limited(self, keep: int):
        """Transforms of fields zero outside |k_y|, |k_z| <= keep, with truncated transposes
        (`DistributedBandTransforms`); the layout itself when nothing can be skipped."""
        if 2 * keep + 1 >= self.n:
            return self
        if keep not in self._band:
            self._band[keep] = DistributedBandTransforms(self, keep)
        return self._band[keep]

    # pyFFTW executes only on arrays with the planned strides and alignment; a caller's array
    # that differs (a strided view, an odd offset) goes through a spare copy made on first need
    def _spare(self, like: np.ndarray) -> np.ndarray:
        key = (like.shape, like.dtype.str)
        if key not in self._spares:
            make = fft.empty_complex if like.dtype.kind == "c" else fft.empty_real
            self._spares[key] = make(like.shape)
        return self._spares[key]

    def _run_from(self, plan, src, dst):
        try:
            plan(src, dst)
        except ValueError:
            tmp = self._spare(src)
            np.copyto(tmp, src)
            plan(tmp, dst)

    def _run_into(self, plan, src, dst):
        try:
            plan(src, dst)
        except ValueError:
            tmp = self._spare(dst)
            plan(src, tmp)
            np.copyto(dst, tmp)

    # --- costs ----------------------------------------------------------------------------
    def buffer_bytes(self) -> int:
        """Bytes of the transpose buffers this rank allocated (not the FFT scratch)."""
        return sum(a.nbytes for a in self._buffers.values())

    def bytes_moved_per_transform(self, direction: str = "forward") -> int:
        """Bytes this rank sends to other ranks in one forward (or inverse) transform of one
        component; summed over the ranks the two directions move the same amount."""
        return self.geometry.bytes_sent(direction)

    # --- reductions -------------------------------------------------------------------------
    def _allreduce(self, x, op):
        if isinstance(x, np.ndarray):
            send = np.ascontiguousarray(x)
            out = np.empty_like(send)
            self.comm.Allreduce(send, out, op=op)
            return out
        if isinstance(x, (int, float, np.number)) and not isinstance(x, (bool, np.bool_)):
            send = np.asarray(x).reshape(1)
            out = np.empty_like(send)
            self.comm.Allreduce(send, out, op=op)
            return type(x)(out[0])
        return self.comm.allreduce(x, op=op)

    def sum(self, x):
        """Sum over the ranks (Python or numpy scalar, or array), same type back."""
        return self._allreduce(x, self._mpi.SUM)

    def max(self, x):
        """Maximum over the ranks (Python or numpy scalar, or array), same type back."""
        return self._allreduce(x, self._mpi.MAX)

    def barrier(self) -> None:
        self.comm.Barrier()

    def bcast(self, obj):
        """rank 0's `obj` on every rank (small Python objects, e.g. a stop flag)."""
        return self.comm.bcast(obj, root=0)

    # --- global views for output and restart ----------------------------------------------
    def _blocks(self, space: str):
        """Per rank: the tuple of slices of its block in the global array."""
        out = []
        for r in range(self.size):
            g = Decomposition(self.n, self.proc_grid, r)
            start, shape = (g.spec_start, g.spec_shape) if space == "spec" else (g.phys_start,
                                                                               g.phys_shape)
            out.append(tuple(slice(s, s + m) for s, m in zip(start, shape)))
        return out

    def _gather(self, local, space, global_shape):
        lead = local.shape[:-3]
        blocks = self._blocks(space)
        if self.rank != 0:
            self.comm.Send(np.ascontiguousarray(local), dest=0, tag=_TAG_GATHER)
            return None
        out = np.empty(lead + global_shape, dtype=local.dtype)
        out[(Ellipsis,) + blocks[0]] = local
        for r in range(1, self.size):
            shape = lead + tuple(s.stop - s.start for s in blocks[r])
            buf = np.empty(shape, dtype=local.dtype)
            self.comm.Recv(buf, source=r, tag=_TAG_GATHER)
            out[(Ellipsis,) + blocks[r]] = buf
        return out

    def gather_spectral(self, local: np.ndarray):
        """Global (..., N, N, N/2+1) array on rank 0 in global index order; None elsewhere."""
        return self._gather(local, "spec", (self.n, self.n, self.n // 2 + 1))

    def gather_physical(self, local: np.ndarray):
        """Global (..., N, N, N) array on rank 0 in global index order; None elsewhere."""
        return self._gather(local, "phys", (self.n, self.n, self.n))

    def scatter_spectral(self, full, out: np.ndarray) -> np.ndarray:
        """Rank 0's global (..., N, N, N/2+1) array (others may pass None) -> `out`, this
        rank's block (..., *spec_shape)."""
        blocks = self._blocks("spec")
        if self.rank == 0:
            for r in range(1, self.size):
                self.comm.Send(np.ascontiguousarray(full[(Ellipsis,) + blocks[r]]), dest=r,
                               tag=_TAG_SCATTER)
            out[...] = full[(Ellipsis,) + blocks[0]]
        elif out.flags.c_contiguous:
            self.comm.Recv(out, source=0, tag=_TAG_SCATTER)
        else:
            buf = np.empty(out.shape, out.dtype)
            self.comm.Recv(buf, source=0, tag=_TAG_SCATTER)
            out[...] = buf
        return out

    def summary(self) -> str:
        uneven = any(c != self.geometry.x[0][0] for c in self.geometry.x[0]) or \
            any(c != self.geometry.z[0][0] for c in self.geometry.z[0]) or \
            any(c != self.geometry.y[0][0] for c in self.geometry.y[0])
        g0 = Decomposition(self.n, self.proc_grid, 0)  # rank 0 holds the largest block
        block = "x".join(str(s) for s in g0.spec_shape)
        name = "slab layout" if self.kind == "slab" else \
            f"pencil layout {self.proc_grid[0]}x{self.proc_grid[1]}"
        return (f"{name}, {self.n}^3 points on {self.size} ranks, local Fourier block "
                f"{'up to ' if uneven else ''}{block}")


def _vspec_at(buf, counts, displs, datatype):
    """An Alltoallv buffer argument with explicit displacements."""
    return [buf, (tuple(int(c) for c in counts), tuple(int(d) for d in displs)), datatype]


def _leading(buf, shape):
    """The leading part of a contiguous buffer, as an array of `shape`."""
    return buf.reshape(-1)[:math.prod(shape)].reshape(shape)


class DistributedBandTransforms:
    """Pruned transforms with truncated transposes for fields band-limited to |k_y|, |k_z| <=
    K (the dealiased fields; see `serial_layout.BandTransforms` for the contract: `forward`
    defines only the kept modes, `inverse` needs zeros outside them).

    Only kept k_z planes enter the y transforms and the row transpose, only kept k_y rows of
    those the column transpose and the x transforms (slab: one transpose of the kept (k_y,
    k_z) lines). For the 2/3 rule that moves 2/3 (pencil row stage) and 4/9 (column stage,
    slab) of the values of the full transposes. The layout's buffers are reused (leading
    parts of them): no memory is added. Discarded rows and planes are zeroed before each
    inverse y and z transform, since the full transforms share the buffers."""

    def __init__(self, layout, keep: int):
        from mpi4py import MPI

        geo = layout.geometry
        band = self.band = geo.band(keep)
        self.layout, self.keep = layout, int(keep)
        n, m, nx = geo.n, band.m, geo.nx
        b, plan, cdt = layout._buffers, layout._plan, MPI.C_DOUBLE_COMPLEX
        half = b["half"]

        def plan_if(kind, a, axes):
            return plan(kind, a, a, axes) if a.size else None

        self._z_f = plan("r2c", layout._real, half, (2,))
        self._z_b = plan("c2r", half, layout._real, (2,))
        kept = kept_runs(0, n, n, self.keep)  # global k_y rows 0..K and N-K..N-1
        if geo.slab:
            mz = m
            planes = half[:, :, :m]
            self._y_f, self._y_b = plan_if("c2c_f", planes, (1,)), plan_if("c2c_b", planes, (1,))
            send, recv = band.col_counts()
            flat = b["send"].reshape(-1)[:sum(send)]
            self._B = _leading(b["kx_line"], (n, band.ky, m))
            self._pack, off = [], 0
            for p_, runs in enumerate(band.yruns):
                piece = flat[off:off + send[p_]].reshape(nx, band.yk[p_], m)
                r0 = 0
                for a, c in runs:
                    self._pack.append((piece[:, r0:r0 + c], half[:, a:a + c, :m]))
                    r0 += c
                off += send[p_]
            self._col_fwd = (_vspec(flat, send, cdt), _vspec(self._B, recv, cdt))
            self._col_inv = (_vspec(self._B, recv, cdt), _vspec(flat, send, cdt))
            # before the inverse y transform: the discarded k_y rows of the kept planes
            self._zero = [half[:, kept[0][1]:kept[1][0], :m], half[:, :, m:]]
        else:
            mz = band.mz
            rsend, rrecv = band.row_counts()
            rflat = b["row_send"].reshape(-1)[:sum(rsend)]
            self._Y = _leading(b["y_line"], (n, nx, mz))
            self._row_pack = []
            off = 0
            for c, s0, zk in zip(geo.z[0], geo.z[1], band.zk):
                if zk:
                    piece = rflat[off:off + geo.ny * nx * zk].reshape(geo.ny, nx, zk)
                    self._row_pack.append((piece, half[:, :, s0:s0 + zk].transpose(1, 0, 2)))
                off += geo.ny * nx * zk
            self._row_fwd = (_vspec(rflat, rsend, cdt), _vspec(self._Y, rrecv, cdt))
            self._row_inv = (_vspec(self._Y, rrecv, cdt), _vspec(rflat, rsend, cdt))
            self._y_f = plan_if("c2c_f", self._Y, (0,))
            self._y_b = plan_if("c2c_b", self._Y, (0,))
            self._B = _leading(b["kx_line"], (n, band.ky, mz))
            csend, crecv = band.col_counts()
            moved = [(a, c) for runs in band.yruns for a, c in runs]
            if geo.p1 > 1:
                cflat = b["col_recv"].reshape(-1)[:sum(crecv)]
                displs = [runs[0][0] * nx * mz if runs else 0 for runs in band.yruns]
                pieces = _segments(cflat, crecv, [(band.ky, c, mz) for c in geo.x[0]])
                self._col_unpack = [(self._B[s0:s0 + c], seg.transpose(1, 0, 2))
                                    for seg, s0, c in zip(pieces, geo.x[1], geo.x[0])]
                self._col_fwd = (_vspec_at(self._Y, csend, displs, cdt), _vspec(cflat, crecv, cdt))
                self._col_inv = (_vspec(cflat, crecv, cdt), _vspec_at(self._Y, csend, displs, cdt))
            else:  # the k_y block is the whole axis: nothing to move, the kept runs are copied
                self._col_unpack, r0 = [], 0
                for a, c in moved:
                    self._col_unpack.append((self._B[:, r0:r0 + c], self._Y[a:a + c].transpose(1, 0, 2)))
                    r0 += c
            # rows of the y buffer that no run covers are zeroed before the inverse y transform
            covered = np.zeros(n + 1, bool)  # with a covered sentinel at the end
            covered[n] = True
            for a, c in moved:
                covered[a:a + c] = True
            gaps, first = [], None
            for i in range(n + 1):
                if not covered[i] and first is None:
                    first = i
                elif covered[i] and first is not None:
                    gaps.append(self._Y[first:i])
                    first = None
            self._zero = gaps + [half[:, :, m:]]
        self._x_f = plan_if("c2c_f", self._B, (0,))
        self._x_b = plan_if("c2c_b", self._B, (0,))
        # this rank's kept k_y rows: (offset in the spectral block, offset in B, count)
        self._spec_runs, r0 = [], 0
        for lo, c in band.local_runs:
            self._spec_runs.append((lo, r0, c))
            r0 += c
        self._mz = mz

    def bytes_moved_per_transform(self, direction: str = "forward") -> int:
        return self.layout.geometry.bytes_sent(direction, self.keep)

    def forward(self, phys: np.ndarray, spec: np.ndarray) -> np.ndarray:
        lay, geo, mz = self.layout, self.layout.geometry, self._mz
        half = lay._buffers["half"]
        lay._run_from(self._z_f, phys, half)
        if geo.slab:
            if self._y_f is not None:
                self._y_f()
            for dst, src in self._pack:
                np.copyto(dst, src)
            lay.comm.Alltoallv(*self._col_fwd)
        else:
            for dst, src in self._row_pack:
                np.copyto(dst, src)
            lay.row_comm.Alltoallv(*self._row_fwd)
            if self._y_f is not None:
                self._y_f()
            if geo.p1 > 1:
                lay.col_comm.Alltoallv(*self._col_fwd)
            for dst, src in self._col_unpack:
                np.copyto(dst, src)
        if self._x_f is not None:
            self._x_f()
        for lo, r0, c in self._spec_runs:
            np.copyto(spec[:, lo:lo + c, :mz], self._B[:, r0:r0 + c])
        return spec

    def inverse(self, spec: np.ndarray, phys: np.ndarray) -> np.ndarray:
        lay, geo, mz = self.layout, self.layout.geometry, self._mz
        half = lay._buffers["half"]
        for lo, r0, c in self._spec_runs:
            np.copyto(self._B[:, r0:r0 + c], spec[:, lo:lo + c, :mz])
        if self._x_b is not None:
            self._x_b()
        for z in self._zero:
            z[...] = 0.0
        if geo.slab:
            lay.comm.Alltoallv(*self._col_inv)
            for src, dst in self._pack:
                np.copyto(dst, src)
            if self._y_b is not None:
                self._y_b()
        else:
            if geo.p1 > 1:
                for dst, src in self._col_unpack:
                    np.copyto(src, dst)
                lay.col_comm.Alltoallv(*self._col_inv)
            else:
                for dst, src in self._col_unpack:
                    np.copyto(src, dst)
            if self._y_b is not None:
                self._y_b()
            lay.row_comm.Alltoallv(*self._row_inv)
            for src, dst in self._row_pack:
                np.copyto(dst, src)
        lay._run_into(self._z_b, half, phys)
        return phys


def make_distributed_layout(n: int, length: float, kind: str = "auto", grid=None, comm=None,
                            threads: int | None = None, backend: str = "auto"):
    """The layout for this rank of `comm` (kind auto | slab | pencil | serial, grid None or
    [P1, P2]). auto: slab when P <= N, else the most nearly square pencil grid that fits.
    Impossible requests raise ConfigError on every rank, before any communication."""
    size = 1 if comm is None else comm.Get_size()
    kind, pg = resolve_grid(n, size, kind, grid)
    if kind == "serial" or comm is None:
        return SerialLayout(n, length, threads=threads, backend=backend)
    return DistributedLayout(n, length, kind, pg, comm, threads=threads, backend=backend)
