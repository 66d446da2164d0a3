"""Pair statistics of particle sets in a periodic cube: pair counts, g(r), radial relative velocity.

Everything here is a plain function on arrays. The caller (the run-loop hook) passes positions in
[0, L)^3 and velocities as float64 arrays of shape (n, 3); the result is a :class:`PairSample`.

Definitions, per separation bin k (``r_edges[k] <= r < r_edges[k+1]``; pairs closer than
``r_edges[0]`` or at ``r >= r_edges[-1] = r_max`` are not counted):

* Δx = x_j − x_i reduced to the minimum image, r = |Δx|, r̂ = Δx / r, Δv = v_j − v_i.
* Radial relative velocity w_r = Δv·r̂ (positive when the pair separates; symmetric in i, j).
  A coincident pair (r = 0, only possible when ``r_edges[0] == 0``) gets w_r = 0.
* Sums accumulated in float64 over the pairs of the bin:
  ``sum_wr`` = Σ w_r, ``sum_wr2`` = Σ w_r², ``sum_abs`` = Σ |w_r|,
  ``sum_inward`` = Σ w_r⁻ with w_r⁻ = −min(w_r, 0) ≥ 0 (approach speed of closing pairs, zero for
  separating pairs), ``sum_trans`` = Σ (|Δv|² − w_r²)/2 (squared transverse relative velocity per
  transverse component).  Means are sums / counts.
* ``wr_hist[k, m]`` counts pairs with ``wr_edges[k, m] <= w_r < wr_edges[k, m+1]``: every
  separation bin has its own row of w_r edges (a 1-D ``wr_edges`` is used for every bin), so
  small separations, where w_r is small, get fine bins (see :func:`separation_wr_edges`).
  Values below ``wr_edges[k, 0]`` go to the first bin and are also counted in ``wr_under``;
  values at or above ``wr_edges[k, -1]`` go to the last bin and are also counted in
  ``wr_over``.  Hence ``wr_hist.sum(axis=1) == counts`` always.

Algorithm: cell lists with ``ncell = floor(L / r_max)`` cells per axis (cell side >= r_max; capped
at about 8 cells per particle, as more cells would only be empty), so a pair closer than r_max
lies in the same or an adjacent cell.  With ncell >= 3 the same-set kernel
visits each cell's own pairs (i < j) plus 13 "half-shell" neighbour cells, and the cross-set kernel
the 27 neighbour cells; with ncell < 3 adjacent cells alias under the periodic wrap, so the kernel
falls back to all pairs (i < j, or every a–b pair) with the minimum image, which never
double-counts.  Histograms are accumulated inside numba kernels, parallel over cells with one
histogram copy per work chunk, merged at the end.  Pairs are never stored: memory is O(n) for the
cell lists plus the fixed histogram size times the number of chunks.  All buffers are allocated
here in numpy, the compiled kernels allocate nothing.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, replace
from typing import Sequence

import numba
import numpy as np
from numba import njit, prange, types
from numba.extending import intrinsic

__all__ = [
    "PairSample",
    "pair_statistics",
    "combine_samples",
    "expected_pair_counts",
    "shell_volumes",
    "bin_centres",
    "collision_kernel",
    "bin_means",
    "pairs_record",
    "wr_edges_from_rms",
    "sinh_wr_edges",
    "wr_edge_rows",
    "tracer_wr_rms",
    "separation_wr_edges",
    "velocity_rms_1comp",
    "cell_count",
    "snap_to_edge",
    "subset_indices",
    "ghost_collisions",
    "contacts_at_midpoints",
    "contact_midpoints",
    "contact_search_radius",
    "longest_step",
]

# Order of the five accumulated sums (last axis of the per-chunk sum buffer).
_SUM_WR, _SUM_WR2, _SUM_ABS, _SUM_INWARD, _SUM_TRANS = range(5)
_N_SUMS = 5


def _shell_offsets(half: bool) -> np.ndarray:
    """Neighbour-cell offsets: all 27, or the 13 lexicographically positive ones (half shell)."""
    offs = [(i, j, k) for i in (-1, 0, 1) for j in (-1, 0, 1) for k in (-1, 0, 1)]
    if half:
        offs = [o for o in offs if o > (0, 0, 0)]
    return np.array(offs, dtype=np.int64)


_HALF_SHELL = _shell_offsets(half=True)
_FULL_SHELL = _shell_offsets(half=False)


# ----------------------------------------------------------------------------- compiled kernels


@njit(cache=True)
def _cell_sort(pos, vel, box, ncell, cell_of, start, fill, soa):
    """Counting sort of particles by cell; writes cell-ordered x,y,z,vx,vy,vz rows into ``soa``."""
    n = pos.shape[0]
    inv_h = ncell / box
    for c in range(start.shape[0]):
        start[c] = 0
    for p in range(n):
        cx = min(max(int(pos[p, 0] * inv_h), 0), ncell - 1)
        cy = min(max(int(pos[p, 1] * inv_h), 0), ncell - 1)
        cz = min(max(int(pos[p, 2] * inv_h), 0), ncell - 1)
        c = (cx * ncell + cy) * ncell + cz
        cell_of[p] = c
        start[c + 1] += 1
    for c in range(ncell * ncell * ncell):
        start[c + 1] += start[c]
        fill[c] = start[c]
    for p in range(n):
        c = cell_of[p]
        k = fill[c]
        fill[c] = k + 1
        for d in range(3):
            soa[d, k] = pos[p, d]
            soa[3 + d, k] = vel[p, d]


@intrinsic
def _float_bits(typingctx, x):
    """The IEEE-754 bit pattern of a float64 as an int64 (a register move).  For x >= 0 it
    grows with x, and its top bits are a piecewise-linear log2(x): exponent, then mantissa."""
    if not (isinstance(x, types.Float) and x.bitwidth == 64):
        return None

    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], context.get_value_type(types.int64))

    return types.int64(types.float64), codegen


_R_TABLE_SIZE = 2048  # cells of the r -> bin lookup table
_W_TABLE_MAX = 4096  # cells per separation bin of the w_r guess table, beyond: binary search
# Histogram copies.  A fixed count makes the work split, hence the float sums, identical for
# any thread count up to it (bitwise reproducible results).
_DEFAULT_CHUNKS = 32
_MAX_CELLS_PER_PARTICLE = 8
_TILE = 256  # partners handled per distance pass; bounds the scratch buffers per chunk


@njit(cache=True, inline="always")
def _min_image(d, box, half):
    """The periodic image of a separation component closest to zero (|d| < box assumed)."""
    d = d - box if d > half else d
    return d + box if d < -half else d


@njit(cache=True, inline="always")
def _tile_distances(xb, yb, zb, jt, je, xi, yi, zi, min_image, box, half, r2buf):
    """Squared distances from (xi, yi, zi) to the partners [jt, je) into r2buf[0:je - jt]: a
    branch-free loop the compiler vectorises (the minimum image per component when asked)."""
    if min_image:
        for j in range(jt, je):
            dx = _min_image(xb[j] - xi, box, half)
            dy = _min_image(yb[j] - yi, box, half)
            dz = _min_image(zb[j] - zi, box, half)
            r2buf[j - jt] = dx * dx + dy * dy + dz * dz
    else:
        for j in range(jt, je):
            dx = xb[j] - xi
            dy = yb[j] - yi
            dz = zb[j] - zi
            r2buf[j - jt] = dx * dx + dy * dy + dz * dz


@njit(cache=True)
def _settle_row(x, edges, e0, nb, m):
    """The bin m of x (edges[e0 + m] <= x < edges[e0 + m + 1], clamped to the first and last of
    the nb bins of the row that starts at edges[e0]), walked to from the guess m. Kept out of
    line: called only when the guess is off, so the common path is one predictable comparison
    (the walking loops inline cost a quarter of the pair kernel's time, measured)."""
    while m > 0 and x < edges[e0 + m]:
        m -= 1
    while m < nb - 1 and x >= edges[e0 + m + 1]:
        m += 1
    return m


@njit(cache=True)
def _settle_bin(x, edges, k):
    """`_settle_row` on a 1-D array of edges."""
    return _settle_row(x, edges, 0, edges.shape[0] - 1, k)


@njit(cache=True)
def _block(sa, i0, i1, sb, j0, j1, triangular, min_image, sx, sy, sz, lo, hi, prune, box,
           r2_edges, rtable, inv_dr, wr_edges, w_mode, wpar, wtable, w_shift, hist, under, over,
           sums, r2buf, jbuf, kbuf, hbuf, wbuf, vbuf, rbuf):
    """Accumulate the pairs i in [i0, i1) of ``sa`` with j in [j0, j1) of ``sb`` (triangular:
    same range of the same set, only j > i) into one chunk's buffers.

    Partner j is seen at x_j + (sx, sy, sz), the periodic image selected by the neighbour-cell
    offset (then the minimum image, since r_max < L/2), or, with ``min_image``, at the minimum
    image of x_j − x_i computed per pair.  With ``prune``, particle i skips the block when its
    distance to the partner cell's box [lo, hi] (unshifted coordinates) is at least r_max.
    Each tile of partners is handled in passes, each a short loop with one job (measured: the
    split lets the compiler vectorise the arithmetic and keeps the branchy lookups short):
    squared distances into ``r2buf`` (branch-free, vectorised); indices of those inside the
    shell compacted into ``jbuf`` without branches; r, w_r and |Δv|² of the accepted pairs into
    ``rbuf``, ``wbuf``, ``vbuf``; the separation bin k into ``kbuf``; the w_r bin into ``hbuf``;
    then the scattered adds into the histograms and sums.

    The w_r bin comes from row k of the flat ``wr_edges`` (one row of nw + 1 edges per
    separation bin).  A first guess (``w_mode`` 0, uniform rows: (w − w0)/dw from ``wpar[k]``;
    1: ``wtable``, indexed by the top bits of |w_r| above ``w_shift``, a piecewise-linear log2
    with cells finer than the bins, offset by ``wpar[k, 0]``, positive w_r in column 0, negative
    in column 1; 2: binary search) is settled on the exact stored edges, so the bin always agrees
    with ``searchsorted`` on the row.  ``hbuf`` then holds the flat histogram index times 4 plus
    0 (inside the row's range), 1 (below it) or 2 (above it).
    """
    half = 0.5 * box
    nr = r2_edges.shape[0] - 1
    nw = wr_edges.shape[0] // nr - 1  # hist is flat: index k * nw + m
    nq = wtable.shape[1]
    nt = rtable.shape[0]
    r2min = r2_edges[0]
    r2max = r2_edges[nr]
    xa, ya, za, ua, va, wa = sa[0], sa[1], sa[2], sa[3], sa[4], sa[5]
    xb, yb, zb, ub, vb, wb = sb[0], sb[1], sb[2], sb[3], sb[4], sb[5]
    for i in range(i0, i1):
        xi = xa[i] - sx
        yi = ya[i] - sy
        zi = za[i] - sz
        ui = ua[i]
        vi = va[i]
        wi = wa[i]
        if prune:
            gx = max(lo[0] - xi, 0.0, xi - hi[0])
            gy = max(lo[1] - yi, 0.0, yi - hi[1])
            gz = max(lo[2] - zi, 0.0, zi - hi[2])
            if gx * gx + gy * gy + gz * gz >= r2max:
                continue
        js = i + 1 if triangular else j0
        for jt in range(js, j1, _TILE):
            je = min(jt + _TILE, j1)
            _tile_distances(xb, yb, zb, jt, je, xi, yi, zi, min_image, box, half, r2buf)
            nacc = 0
            for q in range(je - jt):
                r2 = r2buf[q]
                jbuf[nacc] = q
                nacc += (r2 < r2max) & (r2 >= r2min)
            # pair values into the scratch rows, no scattered stores (a store whose address
            # waits on sqrt/div would serialise the loop)
            for a in range(nacc):
                q = jbuf[a]
                j = jt + q
                dx = xb[j] - xi
                dy = yb[j] - yi
                dz = zb[j] - zi
                if min_image:
                    dx = _min_image(dx, box, half)
                    dy = _min_image(dy, box, half)
                    dz = _min_image(dz, box, half)
                du = ub[j] - ui
                dv = vb[j] - vi
                dw = wb[j] - wi
                r = math.sqrt(r2buf[q])
                rbuf[a] = r
                wbuf[a] = (du * dx + dv * dy + dw * dz) / r if r > 0.0 else 0.0
                vbuf[a] = du * du + dv * dv + dw * dw
            # r-bin: table guess, settled on the exact r² edges (rarely more than one step)
            for a in range(nacc):
                r2 = r2buf[jbuf[a]]
                k = rtable[min(int(rbuf[a] * inv_dr), nt - 1)]
                if r2 < r2_edges[k] or r2 >= r2_edges[k + 1]:
                    k = _settle_bin(r2, r2_edges, k)
                kbuf[a] = k
            # w_r bin: a guess (one loop per mode), then settled on the exact edges of row k
            if w_mode == 0:
                for a in range(nacc):
                    k = kbuf[a]
                    hbuf[a] = min(max(int((wbuf[a] - wpar[k, 0]) * wpar[k, 1]), 0), nw - 1)
            elif w_mode == 1:
                for a in range(nacc):
                    w = wbuf[a]
                    q = (_float_bits(abs(w)) >> w_shift) - np.int64(wpar[kbuf[a], 0])
                    hbuf[a] = wtable[kbuf[a], min(max(q, 0), nq - 1), 0 if w >= 0.0 else 1]
            else:
                for a in range(nacc):
                    e0 = kbuf[a] * (nw + 1)
                    w = wbuf[a]
                    m = 0
                    hi_w = nw
                    while hi_w - m > 1:
                        mid = (m + hi_w) >> 1
                        if w >= wr_edges[e0 + mid]:
                            m = mid
                        else:
                            hi_w = mid
                    hbuf[a] = m
            for a in range(nacc):
                k = kbuf[a]
                w = wbuf[a]
                e0 = k * (nw + 1)
                m = hbuf[a]
                if w < wr_edges[e0 + m] or w >= wr_edges[e0 + m + 1]:
                    m = _settle_row(w, wr_edges, e0, nw, m)
                flag = (w < wr_edges[e0]) + 2 * (w >= wr_edges[e0 + nw])
                hbuf[a] = 4 * (k * nw + m) + flag
            # accumulation pass
            for a in range(nacc):
                k = kbuf[a]
                w = wbuf[a]
                h = hbuf[a]
                hist[h >> 2] += 1
                flag = h & 3
                under[k] += flag == 1
                over[k] += flag == 2
                w2 = w * w
                sums[k, 0] += w
                sums[k, 1] += w2
                sums[k, 2] += abs(w)
                sums[k, 3] += max(-w, 0.0)
                sums[k, 4] += 0.5 * (vbuf[a] - w2)


@njit(cache=True, inline="always")
def _work_item(item, use_cells, ncell, same, start_a, noffsets):
    """(i0, i1, tasks, cx, cy, cz) of one work item of a cell-list driver: the particles
    [i0, i1) of cell ``item`` of set a and its number of tasks (its own pairs when ``same``,
    then one per neighbour-cell offset), or particle ``item`` alone (fallback, all pairs)."""
    if use_cells:
        return (start_a[item], start_a[item + 1], noffsets + (1 if same else 0),
                item // (ncell * ncell), (item // ncell) % ncell, item % ncell)
    return item, item + 1, 1, 0, 0, 0


@njit(cache=True, inline="always")
def _task_partners(item, task, use_cells, same, ncell, cx, cy, cz, box, h, pad, offsets,
                   start_b, nb, lo_t, hi_t):
    """(j0, j1, sx, sy, sz, triangular, prune) of one task of a work item: the partners
    [j0, j1) of set b, the periodic shift of their image, whether the range is the item's own
    cell (pairs j > i only) and whether the partner cell's box [lo_t, hi_t] (filled here) may
    prune particle i.  Fallback (no cells): every later particle (same set) or all of b."""
    if not use_cells:
        return item + 1 if same else 0, nb, 0.0, 0.0, 0.0, False, False
    if same and task == 0:
        return start_b[item], start_b[item + 1], 0.0, 0.0, 0.0, True, False
    o = task - 1 if same else task
    # neighbour cell, and the periodic image of its particles seen from here
    nx = cx + offsets[o, 0]
    ny = cy + offsets[o, 1]
    nz = cz + offsets[o, 2]
    sx = -box if nx < 0 else (box if nx >= ncell else 0.0)
    sy = -box if ny < 0 else (box if ny >= ncell else 0.0)
    sz = -box if nz < 0 else (box if nz >= ncell else 0.0)
    nx %= ncell
    ny %= ncell
    nz %= ncell
    d = (nx * ncell + ny) * ncell + nz
    lo_t[0] = nx * h - pad
    lo_t[1] = ny * h - pad
    lo_t[2] = nz * h - pad
    hi_t[0] = (nx + 1) * h + pad
    hi_t[1] = (ny + 1) * h + pad
    hi_t[2] = (nz + 1) * h + pad
    return start_b[d], start_b[d + 1], sx, sy, sz, False, True


@njit(cache=True, parallel=True)
def _pair_kernel(sa, start_a, sb, start_b, same, ncell, box, offsets, r2_edges, rtable, inv_dr,
                 wr_edges, w_mode, wpar, wtable, w_shift, hist, under, over, sums, scratch,
                 iscratch, cellbox):
    """Parallel driver.  Work items are cells of set a (ncell >= 3: the cell's own pairs when
    ``same``, then one block per neighbour-cell offset) or single particles i (fallback: all
    pairs, minimum image per pair).

    Work item w goes to chunk w % nchunks (strided, which balances clustered particles better than
    contiguous blocks); chunk t writes only row t of the output and scratch buffers.
    """
    nchunks = hist.shape[0]
    na = sa.shape[1]
    nb = sb.shape[1]
    use_cells = ncell >= 3
    nwork = ncell * ncell * ncell if use_cells else na
    h = box / ncell
    pad = 1e-9 * h  # cell boxes padded so rounding at cell faces never prunes a true pair
    for t in prange(nchunks):
        hist_t = hist[t]
        under_t = under[t]
        over_t = over[t]
        sums_t = sums[t]
        r2buf_t = scratch[t, 0]
        wbuf_t = scratch[t, 1]
        vbuf_t = scratch[t, 2]
        rbuf_t = scratch[t, 3]
        jbuf_t = iscratch[t, 0]
        kbuf_t = iscratch[t, 1]
        hbuf_t = iscratch[t, 2]
        lo_t = cellbox[t, 0]
        hi_t = cellbox[t, 1]
        for item in range(t, nwork, nchunks):
            i0, i1, ntask, cx, cy, cz = _work_item(item, use_cells, ncell, same, start_a,
                                                   offsets.shape[0])
            if i0 == i1:
                continue
            for task in range(ntask):
                j0, j1, sx, sy, sz, triangular, prune = _task_partners(
                    item, task, use_cells, same, ncell, cx, cy, cz, box, h, pad, offsets,
                    start_b, nb, lo_t, hi_t)
                if j0 == j1:
                    continue
                _block(sa, i0, i1, sb, j0, j1, triangular, not use_cells, sx, sy, sz, lo_t,
                       hi_t, prune, box, r2_edges, rtable, inv_dr, wr_edges, w_mode, wpar,
                       wtable, w_shift, hist_t, under_t, over_t, sums_t, r2buf_t, jbuf_t, kbuf_t,
                       hbuf_t, wbuf_t, vbuf_t, rbuf_t)


@njit(cache=True)
def _contact_block(sa, i0, i1, sb, j0, j1, triangular, min_image, sx, sy, sz, lo, hi, prune, box,
                   r2_search, r2_contact, r2buf, jbuf):
    """Contacts among the pairs i in [i0, i1) of ``sa`` and j in [j0, j1) of ``sb`` (rows x, y,
    z of the midpoints x + d/2 of the particles' straight paths over the step, then the
    displacements d), partners seen as in `_block`.  With the separation at mid-step d_m and
    Δd = d_j − d_i, the separation is d(s) = d0 + s Δd on s in [0, 1], d0 = d_m − Δd/2, and
    with f(s) = |d(s)|² − R² = a s² + 2 b s + c (a = |Δd|², b = d0·Δd, c = |d0|² − R²) a pair
    makes contact when it starts outside (c > 0) and the convex f reaches 0 on [0, 1]: it
    approaches (b < 0), and f(1) = a + 2b + c <= 0 when its minimum s = −b/a lies beyond the
    step, else f(−b/a) = c − b²/a <= 0.  A contact needs |d_m| <= R + |Δd|/2, hence the
    candidates |d_m| < r_search; as in `_block`, each tile of partners first gets its squared
    distances (a branch-free pass), then only those candidates are tested."""
    half = 0.5 * box
    xa, ya, za, ua, va, wa = sa[0], sa[1], sa[2], sa[3], sa[4], sa[5]
    xb, yb, zb, ub, vb, wb = sb[0], sb[1], sb[2], sb[3], sb[4], sb[5]
    n = 0
    for i in range(i0, i1):
        xi = xa[i] - sx
        yi = ya[i] - sy
        zi = za[i] - sz
        if prune:
            gx = max(lo[0] - xi, 0.0, xi - hi[0])
            gy = max(lo[1] - yi, 0.0, yi - hi[1])
            gz = max(lo[2] - zi, 0.0, zi - hi[2])
            if gx * gx + gy * gy + gz * gz >= r2_search:
                continue
        ui = ua[i]
        vi = va[i]
        wi = wa[i]
        for jt in range(i + 1 if triangular else j0, j1, _TILE):
            je = min(jt + _TILE, j1)
            _tile_distances(xb, yb, zb, jt, je, xi, yi, zi, min_image, box, half, r2buf)
            nacc = 0
            for q in range(je - jt):
                jbuf[nacc] = q
                nacc += r2buf[q] < r2_search
            for k in range(nacc):
                j = jt + jbuf[k]
                ex = ub[j] - ui
                ey = vb[j] - vi
                ez = wb[j] - wi
                dx = xb[j] - xi
                dy = yb[j] - yi
                dz = zb[j] - zi
                if min_image:
                    dx = _min_image(dx, box, half)
                    dy = _min_image(dy, box, half)
                    dz = _min_image(dz, box, half)
                dx -= 0.5 * ex  # the separation at the start of the step
                dy -= 0.5 * ey
                dz -= 0.5 * ez
                c = dx * dx + dy * dy + dz * dz - r2_contact
                if c <= 0.0:
                    continue
                b = dx * ex + dy * ey + dz * ez
                if b >= 0.0:
                    continue
                a = ex * ex + ey * ey + ez * ez
                if -b >= a:
                    n += a + 2.0 * b + c <= 0.0
                else:
                    n += a * c <= b * b
    return n


@njit(cache=True, parallel=True)
def _contact_kernel(sa, start_a, sb, start_b, same, ncell, box, offsets, r2_search, r2_contact,
                    counts, cellbox, scratch, iscratch):
    """Parallel driver of `_contact_block` on the work items and tasks of `_pair_kernel`;
    chunk t adds its contacts to counts[t]."""
    nchunks = counts.shape[0]
    nb = sb.shape[1]
    use_cells = ncell >= 3
    nwork = ncell * ncell * ncell if use_cells else sa.shape[1]
    h = box / ncell
    pad = 1e-9 * h
    for t in prange(nchunks):
        lo_t = cellbox[t, 0]
        hi_t = cellbox[t, 1]
        r2buf_t = scratch[t]
        jbuf_t = iscratch[t]
        n = 0
        for item in range(t, nwork, nchunks):
            i0, i1, ntask, cx, cy, cz = _work_item(item, use_cells, ncell, same, start_a,
                                                   offsets.shape[0])
            if i0 == i1:
                continue
            for task in range(ntask):
                j0, j1, sx, sy, sz, triangular, prune = _task_partners(
                    item, task, use_cells, same, ncell, cx, cy, cz, box, h, pad, offsets,
                    start_b, nb, lo_t, hi_t)
                if j0 < j1:
                    n += _contact_block(sa, i0, i1, sb, j0, j1, triangular, not use_cells, sx,
                                        sy, sz, lo_t, hi_t, prune, box, r2_search, r2_contact,
                                        r2buf_t, jbuf_t)
        counts[t] = n


# ----------------------------------------------------------------------------- helpers on arrays


def cell_count(box_length: float, r_max: float) -> int:
    """Cells per axis: floor(L / r_max), at least 1, lowered when L/ncell would fall below r_max
    by less than a rounding margin (1e-12 relative), so that the cell side is safely >= r_max."""
    ncell = max(1, int(math.floor(box_length / r_max)))
    while ncell > 1 and box_length / ncell < r_max * (1.0 + 1e-12):
        ncell -= 1
    return ncell


def shell_volumes(r_edges: np.ndarray) -> np.ndarray:
    """Volumes of the spherical shells, V_k = 4π/3 (r_{k+1}³ − r_k³)."""
    r = np.asarray(r_edges, dtype=np.float64)
    return 4.0 * np.pi / 3.0 * (r[1:] ** 3 - r[:-1] ** 3)


def expected_pair_counts(r_edges: np.ndarray, box_length: float, n_a: int,
                         n_b: int | None = None) -> np.ndarray:
    """Pair counts per bin of an ideal gas (uniform, independent positions).

    Same set: N(N−1)/2 · V_k / L³; cross set (n_b given): N_a N_b · V_k / L³.  Exact for
    r_max < L/2, where every shell around a particle fits in the periodic box without overlapping
    its own images.
    """
    pairs = n_a * (n_a - 1) / 2.0 if n_b is None else float(n_a) * float(n_b)
    return pairs * shell_volumes(r_edges) / float(box_length) ** 3


def _is_log_spaced(r_edges: np.ndarray) -> bool:
    r = np.asarray(r_edges, dtype=np.float64)
    if r.size < 3 or r[0] <= 0.0:
        return False
    ratio = r[1:] / r[:-1]
    return bool(np.allclose(ratio, ratio[0], rtol=1e-9, atol=0.0))


def bin_centres(r_edges: np.ndarray, kind: str = "auto") -> np.ndarray:
    """Bin centres: ``"geometric"`` √(r_k r_{k+1}) (the centre of log-spaced bins),
    ``"arithmetic"`` (r_k + r_{k+1})/2, or ``"auto"``: geometric when the edges are log-spaced
    (positive with a constant ratio), arithmetic otherwise."""
    r = np.asarray(r_edges, dtype=np.float64)
    if kind == "auto":
        kind = "geometric" if _is_log_spaced(r) else "arithmetic"
    if kind == "geometric":
        return np.sqrt(r[1:] * r[:-1])
    if kind == "arithmetic":
        return 0.5 * (r[1:] + r[:-1])
    raise ValueError(f"bin centre kind must be auto, geometric or arithmetic, got {kind!r}")


def collision_kernel(r_edges: np.ndarray, rdf: np.ndarray, mean_abs_wr: np.ndarray,
                     kind: str = "auto") -> np.ndarray:
    """Kinematic collision kernel in the spherical formulation,

        K(r) = 2π r² g(r) ⟨|w_r|⟩(r),

    Wang, Wexler & Zhou (2000) J. Fluid Mech. 415, 117–153 (spherical formulation of the
    collision kernel; ⟨|w_r|⟩ = 2⟨w_r⁻⟩ when ⟨w_r⟩ = 0).  r is the bin centre chosen by
    :func:`bin_centres` (geometric for log-spaced edges), g and ⟨|w_r|⟩ are the bin averages.  The
    collision rate per unit volume is n_a n_b K (cross sets) or n² K / 2 (one set), evaluated at
    the collision radius.  Bins without pairs give NaN.
    """
    rc = bin_centres(r_edges, kind)
    return 2.0 * np.pi * rc**2 * np.asarray(rdf) * np.asarray(mean_abs_wr)


def wr_edges_from_rms(rms_1comp: float, wr_bins: int = 101, span: float = 8.0) -> np.ndarray:
    """Symmetric, uniform w_r bin edges spanning ±span·√2·rms_1comp with ``wr_bins`` bins.

    √2·rms_1comp is the rms of the difference of one velocity component between two uncorrelated
    particles, the largest scale w_r reaches (large separations).  ``wr_bins`` must be odd so one
    bin is centred on w_r = 0.
    """
    if wr_bins < 1 or wr_bins % 2 == 0:
        raise ValueError(f"wr_bins must be a positive odd integer, got {wr_bins}")
    if not (np.isfinite(rms_1comp) and rms_1comp > 0.0):
        raise ValueError(f"rms_1comp must be positive and finite, got {rms_1comp}")
    half = span * math.sqrt(2.0) * float(rms_1comp)
    return np.linspace(-half, half, wr_bins + 1)


def sinh_wr_edges(core: float, w_max: float, wr_bins: int = 101) -> np.ndarray:
    """w_r bin edges uniform in asinh(w_r / a): w_m = a sinh((m − n/2) du), m = 0..n, with
    a = ``core``, n = ``wr_bins`` (odd: one bin centred on 0) and du = 2 asinh(w_max/a)/n, so the
    edges span ±w_max.

    Near zero (|w| < a) the bins are uniform, a·du wide; beyond a they grow geometrically, each
    about du·|w| wide, a fixed relative resolution out to the far tails.  With a at the
    narrowest distribution expected in a bin, one row resolves every wider one too.  (The same
    map as the asinh magnitudes of Lupton, Gunn & Szalay 1999, Astron. J. 118, 1406, from
    memory: linear near zero, logarithmic for large values of either sign.)"""
    if wr_bins < 3 or wr_bins % 2 == 0:
        raise ValueError(f"wr_bins must be an odd integer >= 3, got {wr_bins}")
    if not (math.isfinite(core) and math.isfinite(w_max) and 0.0 < core and core < w_max):
        raise ValueError(f"sinh w_r edges need 0 < core < w_max, got core={core}, w_max={w_max}")
    du = 2.0 * math.asinh(w_max / core) / wr_bins
    w = core * np.sinh((np.arange(wr_bins + 1) - 0.5 * wr_bins) * du)
    w[0], w[-1] = -w_max, w_max
    return w


#: Kolmogorov's second-order constant C2 in D_LL = C2 (eps r)^(2/3) (Pope 2000, §6.2; from memory)
C2_KOLMOGOROV = 2.0


def tracer_wr_rms(r, dissipation: float, viscosity: float, u_rms: float) -> np.ndarray:
    """Predicted rms of w_r for fluid tracers at separations ``r``: √D_LL(r), with the
    longitudinal structure function from Batchelor's interpolation between the dissipation
    and inertial ranges (Batchelor 1951, Proc. Camb. Phil. Soc. 47, 359; from memory),

        D_LL(r) = (ε r² / 15ν) / (1 + (r / (c η))²)^(2/3),   c = (15 C2)^(3/4),

    which tends to ε r²/(15ν) as r → 0 (⟨(∂u/∂x)²⟩ = ε/(15ν), Pope 2000 eq. 6.73) and to
    C2 (ε r)^(2/3) in the inertial range, and is then capped smoothly at 2u′², the value for
    uncorrelated velocities: σ² = 1/(1/D_LL + 1/(2u′²))."""
    r = np.asarray(r, dtype=np.float64)
    eta = (viscosity**3 / dissipation) ** 0.25
    c = (15.0 * C2_KOLMOGOROV) ** 0.75
    d_ll = dissipation * r * r / (15.0 * viscosity) / (1.0 + (r / (c * eta)) ** 2) ** (2.0 / 3.0)
    return np.sqrt(1.0 / (1.0 / d_ll + 1.0 / (2.0 * u_rms * u_rms)))


def separation_wr_edges(core, w_max: float, wr_bins: int = 101) -> np.ndarray:
    """One sinh row (:func:`sinh_wr_edges`) per separation bin, row k with core ``core[k]`` and
    the common far end ``w_max``: the (r-bins × (wr_bins + 1)) edges a run keeps fixed."""
    core = np.asarray(core, dtype=np.float64)
    return np.stack([sinh_wr_edges(float(min(a, w_max / 2.0)), w_max, wr_bins) for a in core])


def velocity_rms_1comp(vel: np.ndarray, max_samples: int | None = None,
                       rng: np.random.Generator | None = None) -> float:
    """rms of one velocity component, √(⟨|v − ⟨v⟩|²⟩ / 3), optionally from a random subset of
    ``max_samples`` particles drawn with ``rng`` (the mean drift, e.g. settling, is removed since
    it does not enter relative velocities)."""
    v = np.asarray(vel, dtype=np.float64)
    if max_samples is not None and v.shape[0] > max_samples:
        if rng is None:
            raise ValueError("velocity_rms_1comp needs rng to draw max_samples particles")
        v = v[rng.choice(v.shape[0], size=max_samples, replace=False)]
    dv = v - v.mean(axis=0)
    return float(np.sqrt(np.mean(np.sum(dv * dv, axis=1)) / 3.0))


def snap_to_edge(r_edges: np.ndarray, r_sub: float) -> tuple[int, float]:
    """Index and value of the bin edge nearest to r_sub; warns when this moves r_sub by more
    than rounding (relative 1e-12)."""
    r = np.asarray(r_edges, dtype=np.float64)
    k = int(np.argmin(np.abs(r - r_sub)))
    if not np.isclose(r[k], r_sub, rtol=1e-12, atol=0.0):
        warnings.warn(f"pair statistics: r_sub = {float(r_sub)!r} is not a bin edge; snapped to "
                      f"the nearest edge r_edges[{k}] = {float(r[k])!r}", stacklevel=3)
    return k, float(r[k])


def subset_indices(n: int, m: int, rng: np.random.Generator) -> np.ndarray:
    """Sorted indices of a uniform random subset of size min(m, n), drawn without replacement."""
    if not isinstance(rng, np.random.Generator):
        raise TypeError("subsampling needs a numpy.random.Generator (rng=...)")
    if m >= n:
        return np.arange(n)
    return np.sort(rng.choice(n, size=m, replace=False))


# ----------------------------------------------------------------------------- result container


@dataclass
class PairSample:
    """Pair statistics of one sample (or of several combined by :func:`combine_samples`).

    Per r-bin arrays have shape (nbins_r,), ``wr_hist`` (nbins_r, nbins_w).  ``expected`` is the
    ideal-gas count for the particles actually used in each bin (all of them, or the random
    subsets of sizes ``m_a``, ``m_b`` in bins flagged ``subsampled``); ``rdf = counts/expected``.
    """

    r_edges: np.ndarray
    wr_edges: np.ndarray
    box_length: float
    same_set: bool
    counts: np.ndarray
    expected: np.ndarray
    rdf: np.ndarray
    wr_hist: np.ndarray
    wr_under: np.ndarray
    wr_over: np.ndarray
    sum_wr: np.ndarray
    sum_wr2: np.ndarray
    sum_abs: np.ndarray
    sum_inward: np.ndarray
    sum_trans: np.ndarray
    subsampled: np.ndarray
    n_a: int
    n_b: int
    m_a: int
    m_b: int
    r_sub: float | None = None
    n_samples: int = 1


def bin_means(sample: PairSample) -> dict[str, np.ndarray]:
    """Per-bin means ⟨w_r⟩, ⟨w_r²⟩, ⟨|w_r|⟩, ⟨w_r⁻⟩, transverse variance (NaN where no pairs)."""
    c = sample.counts.astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        return {
            "wr_mean": np.where(c > 0, sample.sum_wr / c, np.nan),
            "wr_sq": np.where(c > 0, sample.sum_wr2 / c, np.nan),
            "wr_abs": np.where(c > 0, sample.sum_abs / c, np.nan),
            "wr_inward": np.where(c > 0, sample.sum_inward / c, np.nan),
            "wr_trans": np.where(c > 0, sample.sum_trans / c, np.nan),
        }


def pairs_record(sample: PairSample) -> dict[str, np.ndarray]:
    """Arrays of one sample under the dataset names of ``pairs.h5`` (design contract):
    counts, rdf, wr_hist, wr_mean, wr_sq, wr_abs, wr_inward, kernel, plus expected, wr_under,
    wr_over, wr_trans and subsampled for completeness."""
    means = bin_means(sample)
    return {
        "counts": sample.counts,
        "expected": sample.expected,
        "rdf": sample.rdf,
        "wr_hist": sample.wr_hist,
        "wr_under": sample.wr_under,
        "wr_over": sample.wr_over,
        **means,
        "kernel": collision_kernel(sample.r_edges, sample.rdf, means["wr_abs"]),
        "subsampled": sample.subsampled,
    }


def _rdf(counts: np.ndarray, expected: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(expected > 0, counts / expected, np.nan)


def combine_samples(samples: Sequence[PairSample]) -> PairSample:
    """Pool samples taken with the same edges, box, set sizes and subsampling layout: counts,
    expected counts, histograms and sums add, g = Σcounts / Σexpected."""
    if not samples:
        raise ValueError("combine_samples needs at least one sample")
    s0 = samples[0]
    for s in samples[1:]:
        if not (np.array_equal(s.r_edges, s0.r_edges) and np.array_equal(s.wr_edges, s0.wr_edges)
                and s.box_length == s0.box_length and s.same_set == s0.same_set
                and np.array_equal(s.subsampled, s0.subsampled)
                and (s.n_a, s.n_b, s.m_a, s.m_b) == (s0.n_a, s0.n_b, s0.m_a, s0.m_b)):
            raise ValueError("combine_samples: samples differ in edges, box, set sizes or "
                             "subsampling layout")
    add = lambda name: np.sum([getattr(s, name) for s in samples], axis=0)  # noqa: E731
    counts, expected = add("counts"), add("expected")
    return replace(
        s0, counts=counts, expected=expected, rdf=_rdf(counts, expected),
        wr_hist=add("wr_hist"), wr_under=add("wr_under"), wr_over=add("wr_over"),
        sum_wr=add("sum_wr"), sum_wr2=add("sum_wr2"), sum_abs=add("sum_abs"),
        sum_inward=add("sum_inward"), sum_trans=add("sum_trans"),
        n_samples=int(sum(s.n_samples for s in samples)))


# ----------------------------------------------------------------------------- entry points


def _as_particles(pos, vel, box_length, name):
    pos = np.ascontiguousarray(pos, dtype=np.float64)
    vel = np.ascontiguousarray(vel, dtype=np.float64)
    if pos.ndim != 2 or pos.shape[1] != 3 or vel.shape != pos.shape:
        raise ValueError(f"{name}: positions and velocities must both have shape (n, 3)")
    if not (np.all(np.isfinite(pos)) and np.all(np.isfinite(vel))):
        raise ValueError(f"{name}: positions and velocities must be finite")
    if pos.size and (pos.min() < 0.0 or pos.max() >= box_length):
        pos = np.mod(pos, box_length)  # the kernel tolerates x == L (rounding of the wrap)
    return pos, vel


def _sorted_by_cell(pos, vel, box_length, ncell):
    n = pos.shape[0]
    ncells = ncell**3
    start = np.zeros(ncells + 1, dtype=np.int64)
    soa = np.empty((6, n), dtype=np.float64)
    _cell_sort(pos, vel, float(box_length), ncell, np.empty(n, dtype=np.int64), start,
               np.empty(ncells, dtype=np.int64), soa)
    return soa, start


def _histograms(pos_a, vel_a, pos_b, vel_b, box_length, r_edges, wr_edges, ncell, nchunks):
    """Counts, w_r histogram, under/overflow and the five sums for one range of bins."""
    same = pos_b is None
    ncell = _cells_for(box_length, float(r_edges[-1]),
                       pos_a.shape[0] + (0 if same else pos_b.shape[0]), ncell)
    if nchunks is None:
        nchunks = max(_DEFAULT_CHUNKS, numba.get_num_threads())
    nr, nw = r_edges.size - 1, wr_edges.shape[1] - 1
    hist = np.zeros((nchunks, nr * nw), dtype=np.int64)
    under = np.zeros((nchunks, nr), dtype=np.int64)
    over = np.zeros((nchunks, nr), dtype=np.int64)
    sums = np.zeros((nchunks, nr, _N_SUMS), dtype=np.float64)
    scratch = np.empty((nchunks, 4, _TILE), dtype=np.float64)
    iscratch = np.empty((nchunks, 3, _TILE), dtype=np.int64)
    rtable, inv_dr = _r_bin_table(r_edges)

    sa, start_a = _sorted_by_cell(pos_a, vel_a, box_length, ncell)
    if same:
        sb, start_b = sa, start_a
    else:
        sb, start_b = _sorted_by_cell(pos_b, vel_b, box_length, ncell)
    w_mode, wpar, wtable, w_shift = _wr_guess(wr_edges)
    _pair_kernel(sa, start_a, sb, start_b, same, ncell, float(box_length),
                 _HALF_SHELL if same else _FULL_SHELL, r_edges * r_edges, rtable, inv_dr,
                 wr_edges.reshape(-1), w_mode, wpar, wtable, w_shift, hist, under, over, sums,
                 scratch, iscratch, np.empty((nchunks, 2, 3)))
    hist = hist.sum(axis=0).reshape(nr, nw)
    return hist.sum(axis=1), hist, under.sum(axis=0), over.sum(axis=0), sums.sum(axis=0).T


def _cells_for(box_length, r_max, n_total, ncell=None,
               cells_per_particle=_MAX_CELLS_PER_PARTICLE):
    """Cells per axis for a cell list whose cells are at least r_max wide: ``ncell`` checked,
    or the most that fit but no more than about ``cells_per_particle`` per particle (a smaller
    r_max only adds empty cells: memory and loop time)."""
    max_cells = cell_count(box_length, r_max)
    if ncell is None:
        return min(max_cells, max(3, int(np.cbrt(cells_per_particle * n_total))))
    if not 1 <= ncell <= max_cells:
        raise ValueError(f"ncell = {ncell} gives cells smaller than r_max = {r_max}; "
                         f"allowed 1..{max_cells}")
    return ncell


def _r_bin_table(r_edges, size=_R_TABLE_SIZE):
    """Lookup table on a uniform grid in r over [0, r_max): entry q is the bin holding the centre
    of grid cell q, a first guess that the kernel corrects against the exact r² edges."""
    dr = r_edges[-1] / size
    centre = (np.arange(size) + 0.5) * dr
    table = np.searchsorted(r_edges, centre, side="right") - 1
    return np.clip(table, 0, r_edges.size - 2).astype(np.int64), float(1.0 / dr)


def _wr_guess(wr_edges):
    """How the kernel guesses a w_r bin before settling it on the exact edges of its row.

    Returns (mode, wpar, wtable, shift).  Mode 0 when every row is uniform: wpar[k] = (w0, 1/dw).
    Otherwise mode 1, a lookup table on the bits of |w_r|: the top bits of a positive float64
    (exponent, then the leading ``s`` mantissa bits) index cells 2^−s wide in log2 |w_r|, with s
    chosen so that a cell is narrower than the narrowest bin in relative terms; wtable[k, q]
    holds the bin of the cell's smallest |w_r| (column 0: w_r > 0; column 1: w_r < 0, the bin
    of the most negative end), so the kernel's correction moves at most about one bin; wpar[k, 0]
    is the bit index of the row's first cell.  Mode 2 (binary search) when a table would need
    more than ``_W_TABLE_MAX`` cells per row."""
    nr, nw = wr_edges.shape[0], wr_edges.shape[1] - 1
    # row by row: temporaries of one row at a time
    uniform, rel, smallest, largest = True, np.inf, np.empty(nr), np.empty(nr)
    for k, row in enumerate(wr_edges):
        dw = np.diff(row)
        uniform = uniform and bool(np.allclose(dw, dw[0], rtol=1e-12, atol=0.0))
        rel = min(rel, float(np.min(dw / np.maximum(np.abs(row[1:]), np.abs(row[:-1])))))
        mag = np.abs(row)
        smallest[k] = mag[mag > 0].min() if np.any(mag > 0) else 1.0
        largest[k] = mag.max()
    if uniform:
        lo, hi = wr_edges[:, 0], wr_edges[:, -1]
        return 0, np.ascontiguousarray(np.stack([lo, nw / (hi - lo)], axis=1)), \
            np.zeros((nr, 1, 2), np.int32), 0
    sub = int(min(10, max(1, math.ceil(math.log2(1.0 / rel)) + 1)))
    shift = 52 - sub
    q0 = np.maximum(0.5 * smallest, 1e-300).view(np.int64) >> shift
    nq = int(np.max((largest.view(np.int64) >> shift) + 1 - q0)) + 1
    if nq > _W_TABLE_MAX:
        return 2, np.zeros((nr, 2)), np.zeros((nr, 1, 2), np.int32), 0
    table = np.empty((nr, nq, 2), np.int32)
    for k in range(nr):
        x = ((q0[k] + np.arange(nq + 1)) << shift).view(np.float64)  # cell q: [x_q, x_q+1)
        table[k, :, 0] = np.searchsorted(wr_edges[k], x[:-1], side="right") - 1
        table[k, :, 1] = np.searchsorted(wr_edges[k], -x[1:], side="right") - 1
    np.clip(table, 0, nw - 1, out=table)
    wpar = np.stack([q0.astype(np.float64), np.zeros(nr)], axis=1)
    return 1, wpar, table, shift


def _check_edges(r_edges, wr_edges, box_length):
    """Validated float64 edges; ``wr_edges`` as one row per separation bin (a 1-D array is the
    same row for every bin)."""
    r = np.ascontiguousarray(r_edges, dtype=np.float64)
    w = np.asarray(wr_edges, dtype=np.float64)
    if not (box_length > 0 and np.isfinite(box_length)):
        raise ValueError(f"box length must be positive, got {box_length}")
    if r.ndim != 1 or r.size < 2 or not np.all(np.isfinite(r)) or np.any(np.diff(r) <= 0):
        raise ValueError("r_edges must be a finite, strictly increasing 1-D array (>= 2 edges)")
    if r[0] < 0.0 or r[-1] >= 0.5 * box_length:
        raise ValueError(f"r_edges must satisfy 0 <= r_edges[0] and r_edges[-1] < L/2 = "
                         f"{0.5 * box_length}")
    return r, wr_edge_rows(w, r.size - 1)


def wr_edge_rows(wr_edges, n_rbins: int) -> np.ndarray:
    """``wr_edges`` as a C-contiguous float64 array with one row per separation bin (a 1-D
    array is repeated for every bin); ValueError unless finite and strictly increasing."""
    w = np.asarray(wr_edges, dtype=np.float64)
    if w.ndim == 1:
        w = np.broadcast_to(w, (max(n_rbins, 1), w.size))
    if (w.ndim != 2 or w.shape[0] != n_rbins or w.shape[1] < 2 or not np.all(np.isfinite(w))
            or np.any(np.diff(w, axis=1) <= 0)):
        raise ValueError("wr_edges must be finite and strictly increasing: one row of >= 2 edges, "
                         f"or one row per separation bin ({n_rbins} rows)")
    return np.ascontiguousarray(w)


def _resolve_subsets(subsample, n_a, n_b, same, rng):
    """Index arrays of the particles used in subsampled bins (None for set b when same set)."""
    if isinstance(subsample, (int, np.integer)):
        idx_a = subset_indices(n_a, int(subsample), rng)
        # distinct sets get independent draws: every a–b pair is then kept with probability
        # (M_a/N_a)(M_b/N_b) exactly; reusing one index list across two different sets would
        # over-weight the pairs (a_i, b_i) with equal index.
        idx_b = None if same else subset_indices(n_b, int(subsample), rng)
        return idx_a, idx_b
    if same:
        return _checked_subset(subsample, n_a), None
    idx_a, idx_b = subsample
    return _checked_subset(idx_a, n_a), _checked_subset(idx_b, n_b)


def _checked_subset(idx, n):
    """Explicit subset: distinct indices in [0, n) (a repeated particle would count pairs twice)."""
    given = np.asarray(idx)
    if given.ndim != 1 or not np.issubdtype(given.dtype, np.integer):
        raise ValueError("a subsample given as indices must be a 1-D integer array")
    idx = np.unique(given)  # sorted: the subset keeps the particles' original order
    if idx.size != given.size:
        raise ValueError("subsample indices must be distinct")
    if idx.size and (idx[0] < 0 or idx[-1] >= n):
        raise ValueError(f"subsample indices must lie in [0, {n})")
    return idx.astype(np.int64)


#: relative padding of the candidate radius of `ghost_collisions` (rounding never hides a contact)
CONTACT_PAD = 1e-9
#: cells per particle of the contact search at most: about 12 particles per cell, where the
#: cost per cell and the cost per candidate balance (measured at 4·10^4 particles, R + half
#: the longest step a few cells wide: 10 ms per count against 15 ms with one per particle)
_CONTACT_CELLS_PER_PARTICLE = 1.0 / 12.0


def contact_search_radius(radius: float, reach_a: float, reach_b: float) -> float:
    """Largest separation at mid-step of a pair that can make contact within the step: R plus
    half the longest displacements of the two sets (|Δd|/2 <= (|d_i| + |d_j|)/2), padded by
    CONTACT_PAD."""
    return (float(radius) + 0.5 * (float(reach_a) + float(reach_b))) * (1.0 + CONTACT_PAD)


def longest_step(disp) -> float:
    """The largest |d| of the rows of a displacement array (0 without rows)."""
    d = np.asarray(disp, dtype=np.float64).reshape(-1, 3)
    return float(np.sqrt(np.max(np.einsum("ij,ij->i", d, d)))) if d.shape[0] else 0.0


def contact_midpoints(pos, disp, box_length) -> np.ndarray:
    """x + d/2 wrapped into [0, L): where the cell lists of :func:`ghost_collisions` place each
    particle (the middle of its straight path over the step)."""
    mid = np.asarray(pos, dtype=np.float64) + 0.5 * np.asarray(disp, dtype=np.float64)
    return np.mod(mid, float(box_length))


def ghost_collisions(pos_a, disp_a, box_length, radius, pos_b=None, disp_b=None,
                     r_search=None, ncell=None, nchunks=None) -> int:
    """Contacts within one time step of non-interacting ("ghost") particles: the pairs whose
    separation crosses the collision radius R from above during the step, every particle
    taken on a straight line from its start position x (``pos``) to x + d (``disp``).

    With d0 the minimum-image separation at the start and Δd = d_j − d_i, the separation is
    d(s) = d0 + s Δd for s in [0, 1], and a pair makes contact when

        |d0| > R  and  min over s in [0, 1] of |d0 + s Δd|² <= R²,

    the earliest root of |d0 + s Δd|² = R² lying in the step (Sundaram & Collins 1996,
    J. Comput. Phys. 124, 337: contacts of particles moving on straight lines over a step, from
    the quadratic in the contact time; from memory).  A pair that starts overlapping is not a
    new contact: ghost particles pass through each other, and a pair counts again only after it
    has separated beyond R.  Counting contacts of ghost particles gives the collision kernel of
    point particles, Γ = N_c / (n_a n_b V Δt) (Wang, Wexler & Zhou 1998, Phys. Fluids 10, 266;
    from memory): in steady state the inward flux 4πR² g(R) ⟨w_r⁻⟩(R).

    One set (``pos_b is None``): each unordered pair once; two sets: every a–b pair once.
    Candidates come from the cell lists of :func:`pair_statistics` built on the midpoints of
    the paths (:func:`contact_midpoints`; a contact needs a separation at mid-step within
    R + |Δd|/2, half the reach of the start positions), with cells at least ``r_search`` wide
    (default :func:`contact_search_radius` from the longest displacements here), so R <= the
    cell side; cost O(pairs within r_search), memory O(n).  Returns the number of contacts.
    """
    mid_b = None if pos_b is None else contact_midpoints(pos_b, disp_b, box_length)
    return contacts_at_midpoints(contact_midpoints(pos_a, disp_a, box_length), disp_a,
                                 box_length, radius, mid_b, disp_b, r_search, ncell, nchunks)


def contacts_at_midpoints(mid_a, disp_a, box_length, radius, mid_b=None, disp_b=None,
                          r_search=None, ncell=None, nchunks=None) -> int:
    """:func:`ghost_collisions` of particles given by the midpoints of their paths
    (:func:`contact_midpoints`) and their displacements (what the distributed count sends
    between ranks)."""
    same = mid_b is None
    box_length = float(box_length)
    if not (box_length > 0 and np.isfinite(box_length)):
        raise ValueError(f"box length must be positive, got {box_length}")
    radius = float(radius)
    if not (radius > 0 and np.isfinite(radius)):
        raise ValueError(f"collision radius must be positive and finite, got {radius}")
    mid_a, disp_a = _as_particles(mid_a, disp_a, box_length, "set a")
    if not same:
        if disp_b is None:
            raise ValueError("contacts across two sets need disp_b with pos_b")
        mid_b, disp_b = _as_particles(mid_b, disp_b, box_length, "set b")
    if mid_a.shape[0] == 0 or (not same and mid_b.shape[0] == 0):
        return 0
    if r_search is None:
        reach = longest_step(disp_a)
        r_search = contact_search_radius(radius, reach, reach if same else longest_step(disp_b))
    r_search = float(r_search)
    if not radius <= r_search < 0.5 * box_length:
        raise ValueError(f"the collision radius {radius:.6g} plus half the longest displacements "
                         f"of the step ({r_search:.6g} in all) must stay below L/2 = "
                         f"{0.5 * box_length:.6g}")
    ncell = _cells_for(box_length, r_search, mid_a.shape[0] + (0 if same else mid_b.shape[0]),
                       ncell, _CONTACT_CELLS_PER_PARTICLE)
    if nchunks is None:
        nchunks = max(_DEFAULT_CHUNKS, numba.get_num_threads())
    sa, start_a = _sorted_by_cell(mid_a, disp_a, box_length, ncell)
    sb, start_b = (sa, start_a) if same else _sorted_by_cell(mid_b, disp_b, box_length, ncell)
    counts = np.zeros(nchunks, dtype=np.int64)
    _contact_kernel(sa, start_a, sb, start_b, same, ncell, box_length,
                    _HALF_SHELL if same else _FULL_SHELL, r_search * r_search, radius * radius,
                    counts, np.empty((nchunks, 2, 3)), np.empty((nchunks, _TILE)),
                    np.empty((nchunks, _TILE), dtype=np.int64))
    return int(counts.sum())


def pair_statistics(pos_a, vel_a, box_length, r_edges, wr_edges, pos_b=None, vel_b=None,
                    r_sub=None, subsample=None, rng=None, ncell=None,
                    nchunks=None) -> PairSample:
    """Pair statistics of one set (``pos_b is None``: each unordered pair i < j once) or of two
    sets (every a–b pair once) in the periodic cube [0, L)³.

    Parameters
    ----------
    pos_a, vel_a, pos_b, vel_b : (n, 3) float arrays; positions outside [0, L) are wrapped.
    box_length : L.
    r_edges : increasing separation edges, r_edges[0] >= 0, r_max = r_edges[-1] < L/2.
    wr_edges : increasing w_r edges, one row per separation bin (nbins_r × (nbins_w + 1), see
        :func:`separation_wr_edges`) or one 1-D row for all bins (:func:`wr_edges_from_rms`).
    r_sub, subsample, rng : unbiased subsampling of large separations.  Pairs with r < r_sub use
        all particles; pairs with r >= r_sub only a uniform random subset of each set, so their
        expected counts use M(M−1)/2 (same set) or M_a M_b (cross) instead of N(N−1)/2, N_a N_b.
        Every pair is kept with the same probability, so g and the conditional means stay
        unbiased.  r_sub is snapped to the nearest bin edge (with a warning when it moves).
        ``subsample`` is M (drawn with the numpy Generator ``rng``, independently for each of two
        distinct sets) or explicit indices (an index array; for cross sets a pair of them), so a
        caller can reuse one subset of a set across all groups it belongs to.
    ncell : cells per axis, 1..:func:`cell_count` (default: that maximum, but no more than about
        8 cells per particle); values below 3 use the all-pairs path.
    nchunks : number of histogram copies, i.e. independent work chunks (default
        max(32, numba threads)).  The split does not depend on the thread count, so results are
        bitwise identical for any number of threads up to nchunks.
    """
    same = pos_b is None
    r_edges, wr_edges = _check_edges(r_edges, wr_edges, box_length)
    box_length = float(box_length)
    pos_a, vel_a = _as_particles(pos_a, vel_a, box_length, "set a")
    if same:
        n_a = n_b = pos_a.shape[0]
    else:
        if vel_b is None:
            raise ValueError("cross-set pair statistics need vel_b with pos_b")
        pos_b, vel_b = _as_particles(pos_b, vel_b, box_length, "set b")
        n_a, n_b = pos_a.shape[0], pos_b.shape[0]
    nr = r_edges.size - 1

    k_sub = nr  # first subsampled bin; nr means none
    r_sub_used = None
    idx_a = idx_b = None
    if r_sub is not None and subsample is not None:
        k_sub, r_sub_used = snap_to_edge(r_edges, float(r_sub))
        idx_a, idx_b = _resolve_subsets(subsample, n_a, n_b, same, rng)
        if idx_a.size >= n_a and (same or idx_b.size >= n_b):
            k_sub = nr  # the "subset" is everything
    m_a = n_a if k_sub == nr else int(idx_a.size)
    m_b = n_b if k_sub == nr else (m_a if same else int(idx_b.size))

    counts = np.zeros(nr, dtype=np.int64)
    wr_hist = np.zeros((nr, wr_edges.shape[1] - 1), dtype=np.int64)
    under = np.zeros(nr, dtype=np.int64)
    over = np.zeros(nr, dtype=np.int64)
    sums = np.zeros((_N_SUMS, nr), dtype=np.float64)

    def fill(sl, parts):
        counts[sl], wr_hist[sl], under[sl], over[sl], sums[:, sl] = parts

    if k_sub > 0:
        fill(slice(0, k_sub), _histograms(pos_a, vel_a, pos_b, vel_b, box_length,
                                          r_edges[:k_sub + 1], wr_edges[:k_sub], ncell, nchunks))
    if k_sub < nr:
        pb = vb = None
        if not same:
            pb, vb = pos_b[idx_b], vel_b[idx_b]
        far_ncell = None if ncell is None else min(ncell, cell_count(box_length, r_edges[-1]))
        fill(slice(k_sub, nr), _histograms(pos_a[idx_a], vel_a[idx_a], pb, vb, box_length,
                                           r_edges[k_sub:], wr_edges[k_sub:], far_ncell,
                                           nchunks))

    subsampled = np.arange(nr) >= k_sub
    full = expected_pair_counts(r_edges, box_length, n_a, None if same else n_b)
    sub = expected_pair_counts(r_edges, box_length, m_a, None if same else m_b)
    expected = np.where(subsampled, sub, full)
    return PairSample(
        r_edges=r_edges, wr_edges=wr_edges, box_length=box_length, same_set=same,
        counts=counts, expected=expected, rdf=_rdf(counts, expected), wr_hist=wr_hist,
        wr_under=under, wr_over=over, sum_wr=sums[_SUM_WR], sum_wr2=sums[_SUM_WR2],
        sum_abs=sums[_SUM_ABS], sum_inward=sums[_SUM_INWARD], sum_trans=sums[_SUM_TRANS],
        subsampled=subsampled, n_a=int(n_a), n_b=int(n_b), m_a=int(m_a), m_b=int(m_b),
        r_sub=r_sub_used)
