"""Particles across MPI ranks: who owns which particle, ghost layers of grid fields for the
interpolation stencil, migration of particles between ranks, halos of neighbouring particles
for pair statistics, and gather / scatter by particle id for output and restarts.

Ownership. A rank owns the particles whose cell ``floor(x/h) mod N`` (the rule of
`particles.interpolation.cell_index`) lies in its physical block: x cells [x0, x1) (split
over P1), y cells [y0, y1) (split over P2), all z cells. `BlockMap` holds these ranges for
every rank.

Ghost layers. `GhostField` extends the local block by ``w = ghost_width(order) = order/2 + 2``
planes on each side of every split axis (an axis held whole needs none: the kernel wraps with
mod N). order/2 planes cover the stencil of every owned particle (it reaches order/2 - 1 cells
below and order/2 above its cell); the 2 extra planes cover the predictor position x* of the
time step, which may have left the block by up to 2 cells before the particles are migrated.

Communication. Everything goes through contiguous numpy buffers with counts and
displacements (MPI Alltoallv / Gatherv / Scatterv per dtype), never pickled arrays. Ghost
planes are gathered from their owners with one Alltoallv per split axis, x then y (the y
stage sends the x-ghosted planes, so the corners are right); this also covers blocks thinner
than the ghost width, whose ghosts come from ranks two or more blocks away.

Method: spatial domain decomposition with ghost (halo) copies of everything within the
interaction range of a block, as for short-range molecular dynamics (Plimpton 1995,
J. Comput. Phys. 117, 1-19); applied to particles in pseudo-spectral turbulence with ghost
layers of the velocity field for the interpolation stencil by Ireland et al. (2013,
Comput. Fluids 76, 170-177).

Every function here also accepts the serial layout (one process, no communicator); there all
particles are rank 0's, nothing moves and halos are empty.
"""
from __future__ import annotations

import math

import numpy as np

from eddybox.particles import interpolation
from eddybox.particles import pairs as pairs_kernel

__all__ = [
    "GHOST_MARGIN",
    "ghost_width",
    "ghost_field_bytes",
    "ghost_block_bytes",
    "BlockMap",
    "GhostField",
    "migrate",
    "halo",
    "halo_arrays",
    "distributed_pair_statistics",
    "own_and_halo_parts",
    "distributed_ghost_collisions",
    "gather_by_id",
    "scatter_by_owner",
]

#: Cells a predicted position may lie outside the owner's block and still find its stencil.
GHOST_MARGIN = 2
#: Relative padding of the halo radius: a partner is sent when its distance to the block is
#: below r_max (1 + HALO_PAD), so round-off in the distance never drops a pair the pair
#: kernel (which computes r its own way) would count; extra partners are harmless.
HALO_PAD = 1e-10


def ghost_width(order: int) -> int:
    """Ghost planes per side for Lagrange interpolation of `order` points per direction."""
    return order // 2 + GHOST_MARGIN


# ---------------------------------------------------------------------------------------------
# Geometry of the ghost exchange (no MPI): the same functions size the buffers of a live
# GhostField and the memory estimate, so the two agree
# ---------------------------------------------------------------------------------------------
def _axis_extent(lo: int, hi: int, n: int, w: int, split: bool):
    """(start, size, interior offset) of the ghosted extent of block [lo, hi) along one axis.
    An unsplit axis, or a block whose ghosts would reach around the whole axis, is held whole
    (start 0, size N), so no global plane is ever stored twice."""
    if not split or (hi - lo) + 2 * w >= n:
        return 0, n, lo
    return lo - w, (hi - lo) + 2 * w, w


def _ghost_planes(ranges, n: int, w: int, part: int):
    """Local and global indices of the ghost (non-interior) planes of `part` along an axis."""
    lo, hi = ranges[part]
    start, size, off = _axis_extent(lo, hi, n, w, len(ranges) > 1)
    local = np.arange(size)
    glob = (start + local) % n
    ghost = (local < off) | (local >= off + (hi - lo))
    return local[ghost], glob[ghost]


def _owner_part(ranges, glob):
    los = np.array([lo for lo, _ in ranges])
    return np.searchsorted(los, glob, side="right") - 1


def _runs(dst, src):
    """Split paired index lists into runs where both advance by one: [(dst0, src0, len)]."""
    if len(dst) == 0:
        return []
    breaks = np.nonzero((np.diff(dst) != 1) | (np.diff(src) != 1))[0] + 1
    edges = np.concatenate([[0], breaks, [len(dst)]])
    return [(int(dst[a]), int(src[a]), int(b - a)) for a, b in zip(edges[:-1], edges[1:])]


def _axis_plan(ranges, n: int, w: int, part: int):
    """This part's ghost exchange along one axis: per other part d, the runs it sends
    (d's local plane, this part's local plane, length) and the runs it receives (this part's
    local plane, -, length), both in ascending order of the receiver's local index."""
    lo, hi = ranges[part]
    _, _, off = _axis_extent(lo, hi, n, w, len(ranges) > 1)
    sends, recvs = [], []
    my_local, my_glob = _ghost_planes(ranges, n, w, part)
    my_src = _owner_part(ranges, my_glob)
    for d in range(len(ranges)):
        their_local, their_glob = _ghost_planes(ranges, n, w, d)
        mine = _owner_part(ranges, their_glob) == part
        sends.append(_runs(their_local[mine], off + their_glob[mine] - lo))
        sel = my_src == d
        recvs.append(_runs(my_local[sel], my_local[sel]))
    return sends, recvs


def _axis_counts(ranges, n: int, w: int):
    """Per part along one axis: ghosted size, interior size, planes sent, planes received."""
    size = np.array([_axis_extent(lo, hi, n, w, len(ranges) > 1)[1] for lo, hi in ranges])
    inner = np.array([hi - lo for lo, hi in ranges])
    sent = np.zeros(len(ranges), dtype=np.int64)
    for d in range(len(ranges)):
        _, glob = _ghost_planes(ranges, n, w, d)
        sent += np.bincount(_owner_part(ranges, glob), minlength=len(ranges))
    return size, inner, sent, size - inner


def ghost_block_bytes(n: int, proc_grid, components: int, width: int) -> np.ndarray:
    """Bytes a `GhostField` allocates on every rank of a P1 x P2 grid (ghosted block plus its
    send and receive buffers), as an array indexed [p, q]."""
    from eddybox.solver.fluid.mpi_layout import (
        split_range,  # the layout's own block rule
    )

    parts = []
    for p in proc_grid:
        counts, starts = split_range(n, int(p))
        parts.append(_axis_counts([(s, s + c) for s, c in zip(starts, counts)], n, width))
    mx, nx, sx, rx = (a[:, None] for a in parts[0])
    my, ny, sy, ry = (a[None, :] for a in parts[1])
    points = mx * my + (sx + rx) * ny + (sy + ry) * mx  # x stage sends interior rows only
    return 8 * components * n * points


def _ghost_grid(n, max_order, ranks, layout, grid=None):
    """(process grid, ghost width) of the ghosted velocity block on an n^3 grid, or None without
    particles (max_order None) or on one rank. `layout` is 'slab' or 'pencil' (the process grid
    `grid` when it fits, else the automatic one)."""
    from eddybox.solver.errors import ConfigError
    from eddybox.solver.fluid.mpi_layout import resolve_grid

    if max_order is None or ranks <= 1:
        return None
    if layout != "pencil" or grid is None or math.prod(grid) != ranks:
        grid = None
    try:
        _, pg = resolve_grid(n, ranks, layout, grid)
    except ConfigError:  # an estimate beyond the layout limits: the same nearly square grid
        p1 = int(math.isqrt(ranks))
        while ranks % p1:
            p1 -= 1
        pg = (ranks, 1) if layout == "slab" else (p1, ranks // p1)
        pg = tuple(min(g, n) for g in pg)  # no empty blocks in the geometry
    return pg, ghost_width(max_order)


def ghost_field_bytes(n, max_order, ranks, layout, grid=None) -> int:
    """Bytes of the ghosted 3-component velocity block per rank (largest over the ranks),
    including its exchange buffers: what `GhostField(layout, blockmap, 3,
    ghost_width(max_order))` allocates on an n^3 grid; 0 without particles or on one rank."""
    geo = _ghost_grid(n, max_order, ranks, layout, grid)
    return 0 if geo is None else int(ghost_block_bytes(n, geo[0], 3, geo[1]).max())


def ghost_block_extents(n, max_order, ranks, layout, grid=None):
    """(x, y, z) extents of the largest ghosted block over the ranks (N on an axis held
    whole), or None on one rank."""
    from eddybox.solver.fluid.mpi_layout import split_range

    geo = _ghost_grid(n, max_order, ranks, layout, grid)
    if geo is None:
        return None
    pg, w = geo
    sizes = []
    for p in pg:
        counts, starts = split_range(n, int(p))
        sizes.append(_axis_counts([(a, a + c) for a, c in zip(starts, counts)], n, w)[0])
    return int(sizes[0].max()), int(sizes[1].max()), n


# ---------------------------------------------------------------------------------------------
# Who owns what
# ---------------------------------------------------------------------------------------------
class BlockMap:
    """Cell ranges of every rank's physical block, built collectively (allgather).

    ``x0[r], x1[r], y0[r], y1[r]``: rank r owns cells [x0, x1) x [y0, y1) x [0, N).
    ``part_x[r], part_y[r]``: its position p, q in the process grid (ordered by x0, y0);
    ``x_ranges[p]``, ``y_ranges[q]``: the ranges of each part; ``rank_of[p, q]``.
    Also the sub-communicators of the ghost exchange: ``x_comm`` joins the ranks that share
    a y range (ranked by p), ``y_comm`` those that share an x range (ranked by q); None on an
    unsplit axis.
    """

    def __init__(self, layout):
        self.n = int(layout.n)
        self.length = float(layout.length)
        self.comm = layout.comm
        self.rank, self.size = int(layout.rank), int(layout.size)
        mine = np.array([layout.phys_start[0], layout.phys_shape[0], layout.phys_start[1],
                         layout.phys_shape[1]], dtype=np.int64)
        if self.comm is None:
            table = mine[None, :]
        else:
            table = np.empty((self.size, 4), dtype=np.int64)
            self.comm.Allgather(mine, table)
        self.x0, self.x1 = table[:, 0], table[:, 0] + table[:, 1]
        self.y0, self.y1 = table[:, 2], table[:, 2] + table[:, 3]
        self.x_ranges = sorted(set(zip(self.x0.tolist(), self.x1.tolist())))
        self.y_ranges = sorted(set(zip(self.y0.tolist(), self.y1.tolist())))
        for ranges, axis in ((self.x_ranges, "x"), (self.y_ranges, "y")):
            bounds = [b for r in ranges for b in r]
            if bounds[0] != 0 or bounds[-1] != self.n or any(
                    bounds[2 * i + 1] != bounds[2 * i + 2] for i in range(len(ranges) - 1)):
                raise ValueError(f"the {axis} blocks of the layout do not tile the grid: {ranges}")
        self.proc_grid = (len(self.x_ranges), len(self.y_ranges))
        self.part_x = np.array([self.x_ranges.index(r) for r in zip(self.x0.tolist(), self.x1.tolist())])
        self.part_y = np.array([self.y_ranges.index(r) for r in zip(self.y0.tolist(), self.y1.tolist())])
        self.rank_of = np.full(self.proc_grid, -1, dtype=np.int64)
        self.rank_of[self.part_x, self.part_y] = np.arange(self.size)
        if self.rank_of.size != self.size or (self.rank_of < 0).any():
            raise ValueError("the blocks of the layout are not a P1 x P2 tensor product")
        # cell -> part along each axis
        self._x_part = np.repeat(np.arange(self.proc_grid[0]), [b - a for a, b in self.x_ranges])
        self._y_part = np.repeat(np.arange(self.proc_grid[1]), [b - a for a, b in self.y_ranges])
        self.x_comm = self.y_comm = None
        if self.comm is not None:
            p, q = int(self.part_x[self.rank]), int(self.part_y[self.rank])
            if self.proc_grid[0] > 1:
                self.x_comm = self.comm.Split(q, p)
            if self.proc_grid[1] > 1:
                self.y_comm = self.comm.Split(p, q)

    @property
    def split(self):
        """(x split, y split): whether each axis is divided between ranks."""
        return self.proc_grid[0] > 1, self.proc_grid[1] > 1

    def cells(self, positions, h) -> np.ndarray:
        """Cell index floor(x/h) mod N per axis, (n, 3) int64, by `interpolation.cell_index`
        (so x == L after round-off is cell 0, like the stencil's anchor)."""
        pos = np.ascontiguousarray(positions, dtype=np.float64).reshape(-1, 3)
        if not np.isfinite(pos).all():
            raise ValueError("particle positions must be finite to assign them to ranks")
        hh = np.broadcast_to(np.asarray(h, dtype=np.float64), (3,)).copy()
        return interpolation.cell_index(pos, hh, np.full(3, self.n, dtype=np.int64))

    def owner(self, positions, h) -> np.ndarray:
        """Rank owning each particle, int64 (n,), from the cell rule floor(x/h) mod N."""
        c = self.cells(positions, h)
        return self.rank_of[self._x_part[c[:, 0]], self._y_part[c[:, 1]]]

    def bounds(self, rank: int, h: float):
        """Coordinate box [x0 h, x1 h) x [y0 h, y1 h) of a rank's block (z whole)."""
        return (self.x0[rank] * h, self.x1[rank] * h), (self.y0[rank] * h, self.y1[rank] * h)

    def near_ranks(self, box_length: float, r_max: float, rank: int | None = None) -> np.ndarray:
        """Other ranks whose block comes closer than r_max to `rank`'s block (periodic)."""
        rank = self.rank if rank is None else rank
        h = box_length / self.n
        gaps = []
        for lo, hi, split in ((self.x0, self.x1, self.split[0]), (self.y0, self.y1, self.split[1])):
            if not split:
                gaps.append(np.zeros(self.size))
                continue
            up = (lo - hi[rank]) % self.n      # cells from the end of `rank`'s block to d's start
            down = (lo[rank] - hi) % self.n    # cells from the end of d's block to `rank`'s start
            g = np.minimum(up, down).astype(np.float64)
            g[(lo < hi[rank]) & (lo[rank] < hi)] = 0.0  # overlapping (the same) range
            gaps.append(g * h)
        r = r_max * (1.0 + HALO_PAD) + 1e-9 * h  # a loose filter; the particle test is exact
        near = gaps[0] ** 2 + gaps[1] ** 2 < r * r
        near[rank] = False
        return np.nonzero(near)[0]

    def distance2_to_block(self, positions, rank: int, box_length: float) -> np.ndarray:
        """Squared periodic distance of each position to `rank`'s block, measured in x and y
        (the block spans z): per split axis 0 inside [lo, hi), else the shorter way round to
        the nearer face, min((lo - x) mod L, (x - hi) mod L)."""
        pos = np.asarray(positions, dtype=np.float64).reshape(-1, 3)
        h = box_length / self.n
        d2 = np.zeros(pos.shape[0])
        for a, (lo_c, hi_c) in enumerate(((self.x0, self.x1), (self.y0, self.y1))):
            if not self.split[a]:
                continue
            lo, hi = lo_c[rank] * h, hi_c[rank] * h
            x = pos[:, a]
            d = np.minimum(np.mod(lo - x, box_length), np.mod(x - hi, box_length))
            d[(x >= lo) & (x < hi)] = 0.0
            d2 += d * d
        return d2


# ---------------------------------------------------------------------------------------------
# Ghost layers of a grid field
# ---------------------------------------------------------------------------------------------
class GhostField:
    """This rank's physical block of a C-component field, extended by ghost planes.

    ``array`` has shape (C, nx + 2w, ny + 2w, N) for a pencil, (C, nx + 2w, N, N) for a slab
    (ghosts only along split axes; an axis held whole by one rank, or one whose ghosts would
    wrap all the way round, is stored whole). ``start`` = (x0 - w, y0 - w, 0), 0 on a whole
    axis: the global index of ``array[:, 0, 0, 0]``, as `interpolation.interpolate` wants it.

    With ``w = ghost_width(order) = order/2 + 2`` every particle of cells x0 - 3 .. x1 + 1
    (and likewise in y) has its whole stencil in the block: the owned particles, and their
    predicted positions x* up to two cells outside the block.

    `fill(local)` copies the physical block (C, nx, ny, N) into the interior and gathers the
    ghost planes from their owners: one Alltoallv over the ranks sharing this y range (x
    planes), then one over the ranks sharing this x range (y planes of the x-extended block,
    which brings the corners). Ghost planes may come from any rank along the axis, so blocks
    thinner than w (many ranks on a small grid) work too. Buffers and message layouts are
    built once; `fill` allocates nothing but mpi4py's argument objects.
    """

    def __init__(self, layout, blockmap: BlockMap, components: int, width: int):
        bm = blockmap
        self.n = n = int(layout.n)
        self.h = float(layout.length) / n
        self.components = c = int(components)
        self.width = w = int(width)
        nx, ny, _ = (int(s) for s in layout.phys_shape)
        x0, y0, _ = (int(s) for s in layout.phys_start)
        p, q = int(bm.part_x[bm.rank]), int(bm.part_y[bm.rank])
        sx, mx, ox = _axis_extent(x0, x0 + nx, n, w, bm.split[0])
        sy, my, oy = _axis_extent(y0, y0 + ny, n, w, bm.split[1])
        self.start = (sx, sy, 0)
        self.array = np.zeros((c, mx, my, n))
        self.interior = self.array[:, ox:ox + nx, oy:oy + ny, :]
        self._stages = []
        if bm.x_comm is not None:
            # x planes, interior y rows only (the y stage then sends whole x-extended planes)
            self._stages.append(self._stage(
                bm.x_comm, _axis_plan(bm.x_ranges, n, w, p),
                lambda i, m: self.array[:, i:i + m, oy:oy + ny, :], lambda m: (c, m, ny, n)))
        if bm.y_comm is not None:
            self._stages.append(self._stage(
                bm.y_comm, _axis_plan(bm.y_ranges, n, w, q),
                lambda j, m: self.array[:, :, j:j + m, :], lambda m: (c, mx, m, n)))

    @staticmethod
    def _stage(comm, plan, view, seg_shape):
        from mpi4py import MPI

        sends, recvs = plan
        def elements(runs):
            return sum(math.prod(seg_shape(m)) for _, _, m in runs)

        scount = [elements(r) for r in sends]
        rcount = [elements(r) for r in recvs]
        sbuf, rbuf = np.empty(sum(scount)), np.empty(sum(rcount))
        pack, unpack = [], []
        off = 0
        for runs in sends:
            for _, src, m in runs:
                k = math.prod(seg_shape(m))
                pack.append((sbuf[off:off + k].reshape(seg_shape(m)), view(src, m)))
                off += k
        off = 0
        for runs in recvs:
            for dst, _, m in runs:
                k = math.prod(seg_shape(m))
                unpack.append((view(dst, m), rbuf[off:off + k].reshape(seg_shape(m))))
                off += k

        def spec(buf, counts):
            displs = [int(sum(counts[:i])) for i in range(len(counts))]
            return [buf, (counts, displs), MPI.DOUBLE]

        return comm, pack, unpack, spec(sbuf, scount), spec(rbuf, rcount), sbuf, rbuf

    @property
    def nbytes(self) -> int:
        """Bytes of the ghosted block and its exchange buffers."""
        return self.array.nbytes + sum(st[5].nbytes + st[6].nbytes for st in self._stages)

    def fill(self, local: np.ndarray) -> np.ndarray:
        """Copy the local physical block (C, nx, ny, N) in and exchange the ghost planes
        (collective over the layout's ranks). Returns the ghosted array."""
        np.copyto(self.interior, local)
        for comm, pack, unpack, send, recv, _, _ in self._stages:
            for seg, src in pack:
                np.copyto(seg, src)
            comm.Alltoallv(send, recv)
            for dst, seg in unpack:
                np.copyto(dst, seg)
        return self.array

    def interpolate(self, positions, order: int, out: np.ndarray, **kw) -> np.ndarray:
        """`interpolation.interpolate` of the ghosted block at `positions` (global
        coordinates in [0, L), within the reach described above)."""
        return interpolation.interpolate(self.array, self.start, (self.n,) * 3, self.h,
                                         positions, order, out, **kw)


# ---------------------------------------------------------------------------------------------
# Moving particle rows between ranks
# ---------------------------------------------------------------------------------------------
def _rows(arrays: dict) -> int:
    sizes = {k: np.shape(v)[0] for k, v in arrays.items()}
    if len(set(sizes.values())) > 1:
        raise ValueError(f"particle arrays must have the same number of rows, got {sizes}")
    return next(iter(sizes.values())) if sizes else 0


def _by_dtype(arrays: dict):
    """dtype -> [(name, elements per row, trailing shape)], in the order of `arrays` (the
    same on every rank: the names and dtypes must agree between ranks)."""
    groups = {}
    for name, a in arrays.items():
        a = np.asarray(a)
        tail = a.shape[1:]
        groups.setdefault(a.dtype, []).append((name, math.prod(tail), tail))
    return groups


def _mpi_type(dtype):
    from mpi4py.util.dtlib import from_numpy_dtype

    return from_numpy_dtype(dtype)


def _pack(arrays, members, rows, dtype):
    width = sum(k for _, k, _ in members)
    buf = np.empty((len(rows), width), dtype=dtype)
    col = 0
    for name, k, _ in members:
        a = np.asarray(arrays[name])
        buf[:, col:col + k] = a.reshape(a.shape[0], k)[rows]
        col += k
    return buf, width


def _unpack(buf, members, out):
    col = 0
    for name, k, tail in members:
        out[name] = np.ascontiguousarray(buf[:, col:col + k]).reshape((buf.shape[0],) + tail)
        col += k


def _vspec(buf, counts, width, dtype):
    counts = [int(c) * width for c in counts]
    displs = [int(sum(counts[:i])) for i in range(len(counts))]
    return [buf, (counts, displs), _mpi_type(dtype)]


def _exchange_rows(comm, arrays: dict, rows: np.ndarray, send_counts) -> dict:
    """Send rows[...] of every array, the first send_counts[0] to rank 0 and so on, with one
    Alltoallv per dtype. Returns the received rows, ordered by source rank (and by the order
    of `rows` there)."""
    size = comm.Get_size()
    send_counts = np.ascontiguousarray(send_counts, dtype=np.int64)
    recv_counts = np.empty(size, dtype=np.int64)
    comm.Alltoall(send_counts, recv_counts)
    nrecv = int(recv_counts.sum())
    out = {}
    for dtype, members in _by_dtype(arrays).items():
        send, width = _pack(arrays, members, rows, dtype)
        recv = np.empty((nrecv, width), dtype=dtype)
        comm.Alltoallv(_vspec(send, send_counts, width, dtype),
                       _vspec(recv, recv_counts, width, dtype))
        _unpack(recv, members, out)
    return {name: out[name] for name in arrays}


def migrate(layout, blockmap: BlockMap, h, arrays: dict) -> dict:
    """Send every particle to the rank owning it (by ``arrays["x"]`` and the cell rule).

    ``arrays``: name -> array with one row per particle (ids (n,), x (n, 3), v, u_seen, ...;
    the same names and dtypes on every rank). Returns new arrays: the particles this rank
    keeps, in their order, then those received, ordered by source rank and their order
    there. Collective; the global count is conserved. Serial layout: `arrays` unchanged.
    """
    if "x" not in arrays:
        raise ValueError('migrate needs the positions as arrays["x"]')
    _rows(arrays)
    if layout.comm is None or layout.size == 1:
        return dict(arrays)
    owner = blockmap.owner(arrays["x"], h)
    stay = owner == layout.rank
    leave = np.nonzero(~stay)[0]
    order = leave[np.argsort(owner[leave], kind="stable")]
    counts = np.bincount(owner[leave], minlength=layout.size)
    received = _exchange_rows(layout.comm, arrays, order, counts)
    keep = np.nonzero(stay)[0]
    return {k: np.concatenate([np.asarray(v)[keep], received[k]]) for k, v in arrays.items()}


# ---------------------------------------------------------------------------------------------
# Halos for pair statistics
# ---------------------------------------------------------------------------------------------
def halo_arrays(layout, blockmap: BlockMap, box_length: float, r_max: float, arrays: dict,
                sources: str = "all") -> dict:
    """Rows of the particles of other ranks that lie within r_max (periodic, in x and y; z is
    whole) of this rank's block [x0 h, x1 h) x [y0 h, y1 h) x [0, L), by ``arrays["x"]``.

    Each particle appears at most once per receiving rank (one selection per destination,
    even when the left and right neighbour are the same rank). ``sources="higher"``: only
    from ranks above this one (each rank then sends only to lower ranks). Ordered by source
    rank, then by the order there. Collective. Serial layout: empty arrays.
    """
    if sources not in ("all", "higher"):
        raise ValueError(f"sources must be 'all' or 'higher', got {sources!r}")
    _rows(arrays)
    if layout.comm is None or layout.size == 1:
        return {k: np.asarray(v)[:0] for k, v in arrays.items()}
    targets = blockmap.near_ranks(box_length, r_max)
    if sources == "higher":
        targets = targets[targets < layout.rank]
    r2 = (r_max * (1.0 + HALO_PAD)) ** 2
    rows, counts = [], np.zeros(layout.size, dtype=np.int64)
    for d in targets:  # ascending rank
        sel = np.nonzero(blockmap.distance2_to_block(arrays["x"], int(d), box_length) < r2)[0]
        rows.append(sel)
        counts[d] = sel.size
    rows = np.concatenate(rows) if rows else np.empty(0, dtype=np.int64)
    return _exchange_rows(layout.comm, arrays, rows, counts)


def halo(layout, blockmap: BlockMap, box_length: float, r_max: float, pos, vel,
         sources: str = "all"):
    """(positions, velocities) of the halo particles, see :func:`halo_arrays`."""
    got = halo_arrays(layout, blockmap, box_length, r_max,
                      {"x": np.asarray(pos, np.float64), "v": np.asarray(vel, np.float64)},
                      sources)
    return got["x"], got["v"]


def _rank_sum_floats(comm, x: np.ndarray) -> np.ndarray:
    """Sum over ranks in rank order, identical on every rank whatever MPI's reduction tree."""
    every = np.empty((comm.Get_size(),) + x.shape, dtype=np.float64)
    comm.Allgather(np.ascontiguousarray(x, dtype=np.float64), every)
    return every.sum(axis=0)


def _sum_ints(comm, x: np.ndarray) -> np.ndarray:
    from mpi4py import MPI

    x = np.ascontiguousarray(x, dtype=np.int64)
    out = np.empty_like(x)
    comm.Allreduce(x, out, op=MPI.SUM)
    return out


_SUM_FIELDS = ("sum_wr", "sum_wr2", "sum_abs", "sum_inward", "sum_trans")
_INT_FIELDS = ("counts", "wr_hist", "wr_under", "wr_over")


def own_and_halo_parts(layout, blockmap: BlockMap, box_length: float, r_max: float, own_a: dict,
                       own_b: dict | None, run) -> list:
    """The pair rule of the distributed pair kernels: every pair within r_max counted exactly
    once, on one rank.  ``own_a`` (and ``own_b`` for two sets) are this rank's particles as
    row arrays with the positions under "x"; ``run(rows_a, rows_b or None)`` computes one
    part.  Returns the parts of this rank:

    * one set: run(own, None), the pairs i < j on this rank, plus run(own, halo), where the
      halo holds the particles of HIGHER ranks within r_max of this block
      (``halo_arrays(..., sources="higher")``). A pair of particles on ranks A < B is counted
      on A only: B's particle lies within r_max of A's block, and A's particle is in no halo
      of B. (Counting on both ranks and halving would evaluate the pair twice, in two
      different roundings.)
    * two sets a, b: run(own_a, own_b + halo_b), the halo of b from ALL other ranks. A pair
      (a on A, b on B) is counted on A only, since only A owns a; if B != A, b is in A's halo
      of b. No halo of a is needed.
    Collective (the halo exchange); serial layout: the own parts alone."""
    serial = layout.comm is None or layout.size == 1
    if own_b is None:
        parts = [run(own_a, None)]
        if not serial:
            parts.append(run(own_a, halo_arrays(layout, blockmap, box_length, r_max, own_a,
                                                sources="higher")))
        return parts
    if not serial:
        got = halo_arrays(layout, blockmap, box_length, r_max, own_b, sources="all")
        own_b = {k: np.concatenate([np.asarray(v), got[k]]) for k, v in own_b.items()}
    return [run(own_a, own_b)]


def distributed_pair_statistics(layout, blockmap: BlockMap, box_length, r_edges, wr_edges,
                                pos_a, vel_a, pos_b=None, vel_b=None, *, n_a_global=None,
                                n_b_global=None, ids_a=None, ids_b=None, r_sub=None,
                                subsample_ids=None, ncell=None,
                                nchunks=None) -> pairs_kernel.PairSample:
    """Pair statistics of particles spread over the ranks, equal to
    `particles.pairs.pair_statistics` on all particles gathered (counts and histograms
    exactly, sums to round-off), on every rank.

    Each rank passes the particles it owns; every pair is counted exactly once, on one rank
    (:func:`own_and_halo_parts`).

    w_r is symmetric in the two particles, so the kernel's order within a pair does not
    matter. Integer results are summed over the ranks (Allreduce), float sums are gathered
    and added in rank order (identical on every rank); the results differ from the serial
    kernel's only by the order of float additions.

    Expected counts and g(r) use the GLOBAL set sizes ``n_a_global``, ``n_b_global`` (reduced
    from the local counts when None). Subsampling: ``subsample_ids`` are the global particle
    ids of the subset used for r >= r_sub (an id array for one set, a pair (ids of a, ids of
    b) for two sets) and ``ids_a``, ``ids_b`` the ids of the local particles; the halo
    carries the ids, and each rank selects its own and halo particles by id. The subset sizes
    m_a, m_b are counted over the ranks. r_sub is snapped to the nearest edge as in the
    serial kernel.
    """
    same = pos_b is None
    comm = layout.comm
    r_edges = np.ascontiguousarray(r_edges, dtype=np.float64)
    wr_edges = pairs_kernel.wr_edge_rows(wr_edges, r_edges.size - 1)
    pos_a = np.ascontiguousarray(pos_a, dtype=np.float64).reshape(-1, 3)
    vel_a = np.ascontiguousarray(vel_a, dtype=np.float64).reshape(-1, 3)
    if not same:
        if vel_b is None:
            raise ValueError("cross-set pair statistics need vel_b with pos_b")
        pos_b = np.ascontiguousarray(pos_b, dtype=np.float64).reshape(-1, 3)
        vel_b = np.ascontiguousarray(vel_b, dtype=np.float64).reshape(-1, 3)
    subsampling = r_sub is not None and subsample_ids is not None
    if subsampling:
        if ids_a is None or (not same and ids_b is None):
            raise ValueError("subsampling by id needs ids_a (and ids_b for two sets)")
        sub_a, sub_b = (subsample_ids, None) if same else subsample_ids
    serial = comm is None or layout.size == 1

    def total(k):
        return int(k) if serial else int(_sum_ints(comm, np.array([k]))[0])

    n_a = total(pos_a.shape[0]) if n_a_global is None else int(n_a_global)
    n_b = n_a if same else (total(pos_b.shape[0]) if n_b_global is None else int(n_b_global))
    nr = r_edges.size - 1
    k_sub, r_sub_used = nr, None
    in_a = in_b = None
    if subsampling:
        k_sub, r_sub_used = pairs_kernel.snap_to_edge(r_edges, float(r_sub))
        in_a = np.isin(np.asarray(ids_a), np.asarray(sub_a))
        m_a = total(in_a.sum())
        if not same:
            in_b = np.isin(np.asarray(ids_b), np.asarray(sub_b))
            m_b = total(in_b.sum())
        if m_a >= n_a and (same or m_b >= n_b):
            k_sub = nr  # the "subset" is everything, as in the serial kernel
    if k_sub == nr:
        m_a, m_b = n_a, n_b
    elif same:
        m_b = m_a
    local_r_sub = None if k_sub == nr else float(r_edges[k_sub])

    def run(own_a, own_b):
        pa, va, sa = own_a["x"], own_a["v"], own_a.get("in")
        pb = vb = sb = None
        if own_b is not None:
            pb, vb, sb = own_b["x"], own_b["v"], own_b.get("in")
        if pa.shape[0] == 0 or (pb is not None and pb.shape[0] == 0):
            return None
        sub = None
        if local_r_sub is not None:
            sub = np.nonzero(sa)[0] if pb is None else (np.nonzero(sa)[0], np.nonzero(sb)[0])
        return pairs_kernel.pair_statistics(pa, va, box_length, r_edges, wr_edges, pb, vb,
                                            r_sub=None if sub is None else local_r_sub,
                                            subsample=sub, ncell=ncell, nchunks=nchunks)

    own_a = {"x": pos_a, "v": vel_a}
    if in_a is not None:
        own_a["in"] = in_a
    own_b = None
    if not same:
        own_b = {"x": pos_b, "v": vel_b}
        if in_b is not None:
            own_b["in"] = in_b
    parts = own_and_halo_parts(layout, blockmap, box_length, float(r_edges[-1]), own_a, own_b, run)

    nw = wr_edges.shape[1] - 1
    acc = {"counts": np.zeros(nr, np.int64), "wr_hist": np.zeros((nr, nw), np.int64),
           "wr_under": np.zeros(nr, np.int64), "wr_over": np.zeros(nr, np.int64)}
    sums = np.zeros((len(_SUM_FIELDS), nr))
    for s in parts:
        if s is None:
            continue
        for k in _INT_FIELDS:
            acc[k] += getattr(s, k)
        sums += np.array([getattr(s, k) for k in _SUM_FIELDS])
    if not serial:
        flat = _sum_ints(comm, np.concatenate([acc[k].reshape(-1) for k in _INT_FIELDS]))
        off = 0
        for k in _INT_FIELDS:
            m = acc[k].size
            acc[k] = flat[off:off + m].reshape(acc[k].shape)
            off += m
        sums = _rank_sum_floats(comm, sums)

    subsampled = np.arange(nr) >= k_sub
    full = pairs_kernel.expected_pair_counts(r_edges, box_length, n_a, None if same else n_b)
    part = pairs_kernel.expected_pair_counts(r_edges, box_length, m_a, None if same else m_b)
    expected = np.where(subsampled, part, full)
    with np.errstate(invalid="ignore", divide="ignore"):
        rdf = np.where(expected > 0, acc["counts"] / expected, np.nan)
    return pairs_kernel.PairSample(
        r_edges=r_edges, wr_edges=wr_edges, box_length=float(box_length), same_set=same,
        counts=acc["counts"], expected=expected, rdf=rdf, wr_hist=acc["wr_hist"],
        wr_under=acc["wr_under"], wr_over=acc["wr_over"],
        **{k: sums[i] for i, k in enumerate(_SUM_FIELDS)},
        subsampled=subsampled, n_a=n_a, n_b=n_b, m_a=int(m_a), m_b=int(m_b),
        r_sub=r_sub_used)


def _max_float(comm, x: float) -> float:
    from mpi4py import MPI

    return float(comm.allreduce(float(x), op=MPI.MAX))


def distributed_ghost_collisions(layout, blockmap: BlockMap, box_length, radius, pos_a, disp_a,
                                 pos_b=None, disp_b=None, ncell=None, nchunks=None) -> int:
    """`particles.pairs.ghost_collisions` of particles spread over the ranks, the same number
    on every rank and equal to the serial count on all particles gathered.

    Each rank passes the particles it owns at the START of the step (positions there, and the
    displacements over it, before any migration). The kernel works on the midpoints of the
    paths with the candidate radius r_search = R + half the longest displacements of the step
    over all ranks (`pairs.contact_search_radius`); a midpoint lies within half its particle's
    displacement of the owner's block, so the halos (by midpoint) reach r_search + half the
    longest displacement of set a. Every pair is tested exactly once, on one rank
    (:func:`own_and_halo_parts`), in the same arithmetic as the serial kernel; the counts are
    summed over the ranks (Allreduce). Collective."""
    same = pos_b is None
    disp_a = np.ascontiguousarray(disp_a, dtype=np.float64).reshape(-1, 3)
    mid_a = pairs_kernel.contact_midpoints(np.reshape(pos_a, (-1, 3)), disp_a, box_length)
    reach_a = pairs_kernel.longest_step(disp_a)
    reach_b = reach_a
    own_b = None
    if not same:
        disp_b = np.ascontiguousarray(disp_b, dtype=np.float64).reshape(-1, 3)
        own_b = {"x": pairs_kernel.contact_midpoints(np.reshape(pos_b, (-1, 3)), disp_b,
                                                     box_length), "v": disp_b}
        reach_b = pairs_kernel.longest_step(disp_b)
    serial = layout.comm is None or layout.size == 1
    if not serial:
        reach_a = _max_float(layout.comm, reach_a)
        reach_b = reach_a if same else _max_float(layout.comm, reach_b)
    r_search = pairs_kernel.contact_search_radius(radius, reach_a, reach_b)

    def run(rows_a, rows_b):
        return pairs_kernel.contacts_at_midpoints(
            rows_a["x"], rows_a["v"], box_length, radius, None if rows_b is None else rows_b["x"],
            None if rows_b is None else rows_b["v"], r_search=r_search, ncell=ncell,
            nchunks=nchunks)

    parts = own_and_halo_parts(layout, blockmap, box_length,
                               r_search + 0.5 * reach_a * (1.0 + pairs_kernel.CONTACT_PAD),
                               {"x": mid_a, "v": disp_a}, own_b, run)
    count = sum(parts)
    return count if serial else int(_sum_ints(layout.comm, np.array([count]))[0])


# ---------------------------------------------------------------------------------------------
# Output and restart
# ---------------------------------------------------------------------------------------------
def gather_by_id(layout, ids, arrays: dict, root: int = 0):
    """All particles on `root`, sorted by id: {"ids": ..., name: ...}; None on other ranks.
    One Gatherv per dtype. Collective."""
    if "ids" in arrays:
        raise ValueError('pass the ids separately, not as arrays["ids"]')
    rows = {"ids": np.asarray(ids, dtype=np.int64), **{k: np.asarray(v) for k, v in arrays.items()}}
    n = _rows(rows)
    if layout.comm is None or layout.size == 1:
        got = rows
    else:
        comm = layout.comm
        counts = np.empty(layout.size, dtype=np.int64)
        comm.Allgather(np.array([n], dtype=np.int64), counts)
        total = int(counts.sum())
        got = {}
        everyone = np.arange(n)
        for dtype, members in _by_dtype(rows).items():
            send, width = _pack(rows, members, everyone, dtype)
            recv = np.empty((total, width), dtype=dtype) if layout.rank == root else None
            comm.Gatherv(send, None if recv is None else _vspec(recv, counts, width, dtype),
                         root=root)
            if recv is not None:
                _unpack(recv, members, got)
        if layout.rank != root:
            return None
    order = np.argsort(got["ids"], kind="stable")
    return {k: got[k][order] for k in rows}


def scatter_by_owner(layout, blockmap: BlockMap, h, ids, arrays: dict, root: int | None = None):
    """The inverse of `gather_by_id` for restarts: each rank gets {"ids": ..., name: ...} of
    the particles it owns (by ``arrays["x"]``), in the order of the global arrays.

    ``root=None``: every rank holds the global arrays (e.g. each read the checkpoint) and
    keeps its own rows, no communication. ``root=r``: only rank r holds them (the others pass
    None for ids and arrays); r sorts the rows by owner and sends them with one Scatterv per
    dtype (names, dtypes and row shapes are broadcast first). Collective when root is given.
    """
    if root is None or layout.comm is None or layout.size == 1:
        if "x" not in arrays:
            raise ValueError('scatter_by_owner needs the positions as arrays["x"]')
        rows = {"ids": np.asarray(ids, dtype=np.int64), **{k: np.asarray(v) for k, v in arrays.items()}}
        _rows(rows)
        if layout.comm is None or layout.size == 1:
            return rows
        mine = np.nonzero(blockmap.owner(rows["x"], h) == layout.rank)[0]
        return {k: v[mine] for k, v in rows.items()}
    comm = layout.comm
    meta = None
    if layout.rank == root:
        rows = {"ids": np.asarray(ids, dtype=np.int64), **{k: np.asarray(v) for k, v in arrays.items()}}
        _rows(rows)
        owner = blockmap.owner(rows["x"], h)
        order = np.argsort(owner, kind="stable")
        counts = np.bincount(owner, minlength=layout.size).astype(np.int64)
        meta = [(k, v.dtype.str, v.shape[1:]) for k, v in rows.items()]
    else:
        counts = None
    meta = comm.bcast(meta, root=root)  # names, dtypes and row shapes only
    mine = np.empty(1, dtype=np.int64)
    comm.Scatter(counts, mine, root=root)
    n = int(mine[0])
    if layout.rank != root:
        rows = {k: np.empty((0,) + tuple(tail), dtype=np.dtype(dt)) for k, dt, tail in meta}
        order = np.empty(0, dtype=np.int64)
    out = {}
    for dtype, members in _by_dtype(rows).items():
        width = sum(k for _, k, _ in members)
        send = None
        if layout.rank == root:
            buf, _ = _pack(rows, members, order, dtype)
            send = _vspec(buf, counts, width, dtype)
        recv = np.empty((n, width), dtype=dtype)
        comm.Scatterv(send, [recv, _mpi_type(dtype)], root=root)
        _unpack(recv, members, out)
    return {k: out[k] for k, _, _ in meta}
