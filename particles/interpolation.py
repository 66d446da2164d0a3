"""Tensor-product Lagrange interpolation of periodic grid fields at particle positions.

Conventions (shared with the rest of eddybox):

* Periodic box [0, L)^3 with ``n_global = (Nx, Ny, Nz)`` points, spacing ``h = L / N`` per
  axis; grid point ``i`` sits at ``x = i * h``.
* A field is a C-ordered float64 array of shape ``(C, mx, my, mz)`` with any number of
  components ``C >= 1``. It is either the whole periodic grid or a local block of a
  distributed grid extended by ghost layers; ``start`` is the global index of element
  ``[:, 0, 0, 0]`` (may be negative). The stencil point with global index ``gi`` along axis
  ``a`` is read from local index ``(gi - start[a]) mod n_global[a]``.
* The stencil of order ``p`` (points per direction) is centred on the cell
  ``j = floor(x / h)``: ``gi = j - p/2 + 1, ..., j + p/2``. A rank that owns the particles of
  cells ``[g0, g1)`` along an axis therefore needs ghost layers ``p/2 - 1`` below and ``p/2``
  above (``p/2`` on both sides is the simple symmetric choice), and it must decide ownership
  with the same cell rule, :func:`cell_index` (``floor(x / h) mod N``).
"""

import math
from dataclasses import dataclass

import numpy as np
from numba import njit, prange

__all__ = [
    "LagrangeStencil",
    "INTERPOLATION_ORDERS",
    "register_order",
    "lagrange_weights",
    "cell_index",
    "cell_order",
    "interpolate",
    "InterleavedField",
    "interpolate_interleaved",
    "fourier_series_at",
]


@dataclass(frozen=True)
class LagrangeStencil:
    """Centred 1-D Lagrange stencil: ``points`` nodes at offsets ``first_offset ...
    points/2`` from the cell index, and the reciprocal of each node's Lagrange denominator.

    ``inv_denominators`` is a tuple on purpose: its length is part of the numba type, so
    every order gets its own compiled kernel with fixed-length, unrollable loops.
    """

    points: int
    first_offset: int
    inv_denominators: tuple


#: Supported interpolation orders (points per direction) -> stencil description.
INTERPOLATION_ORDERS: dict[int, LagrangeStencil] = {}


def register_order(points):
    """Add the centred ``points``-point Lagrange stencil to :data:`INTERPOLATION_ORDERS`.

    Node offsets are ``o_m = m - points/2 + 1`` (m = 0 .. points-1) and the Lagrange
    denominator of node m is prod_{n != m} (o_m - o_n) = (-1)^(points-1-m) m! (points-1-m)!.
    """
    if points < 2 or points % 2:
        raise ValueError(f"a centred stencil needs an even number of points >= 2, got {points}")
    inv_den = tuple(
        (-1.0) ** (points - 1 - m) / (math.factorial(m) * math.factorial(points - 1 - m))
        for m in range(points)
    )
    INTERPOLATION_ORDERS[points] = LagrangeStencil(points, 1 - points // 2, inv_den)
    return INTERPOLATION_ORDERS[points]


for _points in (2, 4, 6, 8):
    register_order(_points)


def _stencil(order):
    try:
        return INTERPOLATION_ORDERS[order]
    except (KeyError, TypeError):
        allowed = ", ".join(str(p) for p in sorted(INTERPOLATION_ORDERS))
        raise ValueError(
            f"interpolation order must be one of {allowed} (points per direction), got {order!r}"
        ) from None


@njit(cache=True)
def _weights_into(t, first_offset, inv_den, w):
    """1-D Lagrange weights at fractional offset t of the nodes first_offset + m (m = 0..p-1),
    w_m = prod_{n != m} (t - o_n) / prod_{n != m} (o_m - o_n), built from prefix and suffix
    products of (t - o_n) so no division by (t - o_m) is needed."""
    p = len(inv_den)
    prefix = 1.0
    for m in range(p):
        w[m] = prefix
        prefix *= t - (first_offset + m)
    suffix = 1.0
    for m in range(p - 1, -1, -1):
        w[m] *= suffix * inv_den[m]
        suffix *= t - (first_offset + m)


def lagrange_weights(t, order):
    """1-D weights of the centred ``order``-point stencil at fractional offsets ``t`` in [0, 1).

    Lagrange interpolation formula: l_m(t) = prod_{n != m} (t - o_n) / (o_m - o_n) with nodes
    o_m = m - order/2 + 1. Returns an array of shape ``t.shape + (order,)``.
    """
    st = _stencil(order)
    t = np.asarray(t, dtype=np.float64)
    flat = t.reshape(-1)
    w = np.empty((flat.size, st.points))
    for i in range(flat.size):
        _weights_into(flat[i], st.first_offset, st.inv_denominators, w[i])
    return w.reshape(t.shape + (st.points,))


@njit(parallel=True, cache=True)
def cell_index(positions, h, n_global):
    """Cell index ``floor(x / h) mod N`` per axis, shape (n, 3) int64.

    This is the cell the interpolation stencil is anchored on; whoever assigns particles to
    field blocks must use the same rule so that the ghost layers cover the stencil.
    """
    n = positions.shape[0]
    cells = np.empty((n, 3), dtype=np.int64)
    for i in prange(n):
        for a in range(3):
            cells[i, a] = math.floor(positions[i, a] / h[a]) % n_global[a]
    return cells


def cell_order(positions, h, n_global):
    """Permutation that sorts particles by their linear cell index (x slowest, z fastest,
    the memory order of the field), so neighbouring particles reuse cached stencil rows."""
    h = _as_spacing(h)
    n_global = np.asarray(n_global, dtype=np.int64).reshape(3)
    cells = cell_index(np.asarray(positions, dtype=np.float64), h, n_global)
    key = (cells[:, 0] * n_global[1] + cells[:, 1]) * n_global[2] + cells[:, 2]
    return np.argsort(key, kind="stable")


# Particles per parallel task: scratch arrays are allocated once per task, not per particle.
_TASK = 64


@njit(parallel=True, cache=True)
def _interpolate_kernel(flat, shape, start, n_global, h, positions, first_offset, inv_den,
                        perm, use_perm, out):
    """Gather-and-sum over the p^3 stencil. ``flat`` is the field raveled, ``shape`` its
    (C, mx, my, mz). Returns the number of particles whose stencil left the block."""
    n = positions.shape[0]
    p = len(inv_den)
    ncomp = shape[0]
    stride_x = shape[2] * shape[3]
    stride_y = shape[3]
    stride_c = shape[1] * stride_x
    n_tasks = (n + _TASK - 1) // _TASK
    outside = 0
    for task in prange(n_tasks):
        w = np.empty((3, p))
        offs = np.empty((3, p), dtype=np.int64)   # local index times the axis stride
        for ii in range(task * _TASK, min(n, (task + 1) * _TASK)):
            i = perm[ii] if use_perm else ii
            inside = True
            for a in range(3):
                s = positions[i, a] / h[a]
                j = math.floor(s)
                _weights_into(s - j, first_offset, inv_den, w[a])
                # local index (gi - start) mod N, stepped with a wrap instead of p divisions
                local = (j + first_offset - start[a]) % n_global[a]
                for k in range(p):
                    if local >= shape[a + 1]:
                        inside = False
                    offs[a, k] = local
                    local += 1
                    if local == n_global[a]:
                        local = 0
            if not inside:
                # Never read outside the block; the wrapper reports these particles.
                for c in range(ncomp):
                    out[i, c] = np.nan
                outside += 1
                continue
            for k in range(p):
                offs[0, k] *= stride_x
                offs[1, k] *= stride_y
            # Contract z (contiguous rows) first, then y, then x.
            for c in range(ncomp):
                sx = 0.0
                for ia in range(p):
                    sy = 0.0
                    for ib in range(p):
                        row = c * stride_c + offs[0, ia] + offs[1, ib]
                        sz = 0.0
                        for ic in range(p):
                            sz += w[2, ic] * flat[row + offs[2, ic]]
                        sy += w[1, ib] * sz
                    sx += w[0, ia] * sy
                out[i, c] = sx
    return outside


def _as_spacing(h):
    h = np.broadcast_to(np.asarray(h, dtype=np.float64), (3,)).copy()
    if not np.all(h > 0):
        raise ValueError(f"grid spacing must be positive, got {h}")
    return h


# Auto cell-sort rule, measured with eddybox.solver.study.bench_interp on a 2-core machine with 8 MiB of
# L3: sorting costs ~0.15 us per particle and pays off once the field no longer fits in the
# cache (2.5x faster at 64^3, 3.5x at 128^3), but loses ~10% for a cache-resident field.
CELL_SORT_MIN_FIELD_BYTES = 4 * 2**20
CELL_SORT_MIN_PARTICLES = 1024


def interpolate(field, start, n_global, h, positions, order, out, *, cell_sort=None):
    """Interpolate all components of a periodic grid field at particle positions.

    Tensor-product Lagrange interpolation (Lagrange formula as in Press et al. 2007,
    Numerical Recipes 3rd ed., sec. 3.2; used for particle tracking in turbulence by
    Yeung & Pope 1988, J. Comput. Phys. 79, 373) with the centred ``order``-point stencil:

        u(x) = sum_{a,b,c} l_a(tx) l_b(ty) l_c(tz) u[jx + ox_a, jy + oy_b, jz + oz_c],

    with j = floor(x/h), t = x/h - j, offsets o = -order/2+1 ... order/2 and l the 1-D
    Lagrange weights (see :func:`lagrange_weights`). The error is O(h^order) for smooth fields.

    Parameters
    ----------
    field : float64 array (C, mx, my, mz), C-contiguous; whole grid or ghosted local block.
    start : 3 ints, global index of ``field[:, 0, 0, 0]`` (may be negative).
    n_global : 3 ints, global grid points per axis.
    h : grid spacing, scalar or 3 values.
    positions : float64 array (n, 3), values in [0, L).
    order : points per direction, one of :data:`INTERPOLATION_ORDERS` (2, 4, 6, 8).
    out : float64 array (n, C), overwritten and returned.
    cell_sort : visit particles in cell order (see :func:`cell_order`); the results are
        bit-for-bit the same, only the memory access pattern changes. ``None`` (default)
        sorts when the field is larger than ``CELL_SORT_MIN_FIELD_BYTES`` and there are at
        least ``CELL_SORT_MIN_PARTICLES`` particles. A particle set that keeps itself in cell
        order gets the cache benefit without the sort (see ``eddybox.solver.study.bench_interp``).

    Raises
    ------
    ValueError for an unsupported order or malformed arrays; IndexError if some particle's
    stencil falls outside the block (those rows of ``out`` are NaN).
    """
    st = _stencil(order)
    if not (isinstance(field, np.ndarray) and field.dtype == np.float64 and field.ndim == 4
            and field.flags.c_contiguous):
        raise ValueError("field must be a C-contiguous float64 array of shape (C, mx, my, mz)")
    positions = np.asarray(positions)
    if positions.dtype != np.float64 or positions.ndim != 2 or positions.shape[1] != 3:
        raise ValueError("positions must be a float64 array of shape (n, 3)")
    n = positions.shape[0]
    if not (isinstance(out, np.ndarray) and out.dtype == np.float64
            and out.shape == (n, field.shape[0])):
        raise ValueError(f"out must be a float64 array of shape {(n, field.shape[0])}")
    if not out.flags.writeable:
        raise ValueError("out must be writeable")
    start = np.asarray(start, dtype=np.int64).reshape(3)
    n_global = np.asarray(n_global, dtype=np.int64).reshape(3)
    if not np.all(n_global > 0):
        raise ValueError(f"n_global must be positive, got {n_global}")
    h = _as_spacing(h)
    if cell_sort is None:
        cell_sort = field.nbytes > CELL_SORT_MIN_FIELD_BYTES and n >= CELL_SORT_MIN_PARTICLES
    if cell_sort:
        perm = cell_order(positions, h, n_global)
    else:
        perm = np.empty(0, dtype=np.int64)
    shape = np.array(field.shape, dtype=np.int64)
    outside = _interpolate_kernel(field.reshape(-1), shape, start, n_global, h, positions,
                                  st.first_offset, st.inv_denominators, perm, bool(cell_sort),
                                  out)
    if outside:
        raise IndexError(
            f"{outside} particle(s) have order-{order} stencils outside the field block "
            f"(shape {field.shape[1:]}, start {tuple(start)}); assign particles to blocks "
            "with cell_index() and give the block ghost layers of width order/2"
        )
    return out


# ---------------------------------------------------------------------------------------------
# Interleaved copies: the components of a point side by side, periodic axes padded
# ---------------------------------------------------------------------------------------------
#: largest stencil and component count of the interleaved kernel (its partial sums are
#: written out for up to 8 points x 3 components, so they stay in registers)
_MAX_POINTS, _MAX_COMPONENTS = 8, 3


class InterleavedField:
    """A copy of a field (C, mx, my, mz) as (mx', my', mz', C) in `dtype`, the C values of a
    grid point side by side, and every axis that the field holds whole (mx = N) extended
    periodically by order/2 - 1 points below and order/2 + 1 above (one more than a stencil
    of cell N - 1 needs: a coordinate a rounding below L may fall in cell N), so no stencil of
    `order` or fewer points wraps.

    The stencil of a particle then reads order^2 contiguous rows of order*C values (96 bytes
    for order 8, three float32 components) instead of C order^2 rows of order values, and the
    kernel needs no index arithmetic modulo N. Axes held in part (a ghosted block of a
    distributed run) are copied as they are: their ghost layers already cover the stencils.

    Single precision (the default) rounds each value by at most 2^-24 relative (IEEE 754); the
    interpolated value, summed in double precision with weights whose absolute sum per axis is
    below 1.5 (order <= 8), is within 4 x 2^-24 ~ 2.4e-7 of max |u| of the double-precision
    result: far below the Lagrange interpolation error of a field resolved to k_max eta = 1.5
    (measured for a model spectrum at order 8: interpolation error 3e-4 of max |u| against the
    exact Fourier series, rounding 4e-8; tests/test_interpolation.py).
    `fill` copies in one pass and allocates nothing."""

    def __init__(self, shape, start, n_global, order, dtype=np.float32):
        st = _stencil(order)
        c, *ext = (int(s) for s in shape)
        if not 1 <= c <= _MAX_COMPONENTS:
            raise ValueError(f"interleaved copies hold 1 to {_MAX_COMPONENTS} components, got {c}")
        #: the largest stencil (points per direction) the padding serves
        self.order, self.components = st.points, c
        self.n_global = np.asarray(n_global, dtype=np.int64).reshape(3)
        self.field_start = np.asarray(start, dtype=np.int64).reshape(3)
        lo, hi = st.points // 2 - 1, st.points // 2 + 1
        whole = [e == n for e, n in zip(ext, self.n_global)]
        #: global index of element [0, 0, 0] and the extent of each axis
        self.start = np.array([-lo if w else s for w, s in zip(whole, self.field_start)], np.int64)
        size = [n + lo + hi if w else e for w, e, n in zip(whole, ext, self.n_global)]
        self.field_shape = (c, *ext)
        self.array = np.empty(tuple(size) + (c,), dtype=dtype)

    @property
    def nbytes(self) -> int:
        return self.array.nbytes

    def fill(self, field):
        """Copy `field` (C, mx, my, mz), the block given at construction, into the array."""
        if field.shape != self.field_shape:
            raise ValueError(f"field shape {field.shape} does not match the copy's block "
                             f"{self.field_shape}")
        _fill_interleaved(field, self.field_start, self.start, self.n_global, self.array)
        return self


@njit(parallel=True, cache=True)
def _fill_interleaved(field, field_start, start, n_global, out):
    """out[i, j, k, c] = field[c, local(i), local(j), local(k)], the local index of global index
    start + (i, j, k) in the field block, taken modulo N on the axes the block holds whole."""
    nc = field.shape[0]
    whole_x = field.shape[1] == n_global[0]
    whole_y = field.shape[2] == n_global[1]
    whole_z = field.shape[3] == n_global[2]
    for i in prange(out.shape[0]):
        li = start[0] + i - field_start[0]
        if whole_x:
            li %= n_global[0]
        for j in range(out.shape[1]):
            lj = start[1] + j - field_start[1]
            if whole_y:
                lj %= n_global[1]
            for k in range(out.shape[2]):
                lk = start[2] + k - field_start[2]
                if whole_z:
                    lk %= n_global[2]
                for c in range(nc):
                    out[i, j, k, c] = field[c, li, lj, lk]


def interpolate_interleaved(copy: InterleavedField, h, positions, order, out):
    """Interpolate every component of an `InterleavedField` at particle positions: the same
    tensor-product Lagrange interpolation as :func:`interpolate` with `order` points per
    direction (at most the copy's), the partial sums in double precision. ``out`` (n, C)
    float64 is overwritten and returned.

    Raises IndexError, with those rows of ``out`` NaN, when a stencil leaves the copy (a
    particle outside the block and its ghost layers)."""
    st = _stencil(order)
    if st.points > copy.order:
        raise ValueError(f"order {order} needs a copy padded for it; this one serves up to "
                         f"{copy.order}")
    positions = np.asarray(positions)
    if positions.dtype != np.float64 or positions.ndim != 2 or positions.shape[1] != 3:
        raise ValueError("positions must be a float64 array of shape (n, 3)")
    n = positions.shape[0]
    if not (isinstance(out, np.ndarray) and out.dtype == np.float64
            and out.shape == (n, copy.components)):
        raise ValueError(f"out must be a float64 array of shape {(n, copy.components)}")
    a = copy.array
    shape = np.array(a.shape, dtype=np.int64)
    from numba.core import config

    # the kernel's straight-line partial sums become vector instructions only with LLVM's SLP
    # vectorizer, which numba leaves off by default; it is switched on while (and only
    # matters when) this kernel is compiled, the result is cached like every kernel's
    slp, config.SLP_VECTORIZE = config.SLP_VECTORIZE, 1
    try:
        outside = _interleaved_kernel(a.reshape(-1), shape, copy.start, _as_spacing(h), positions,
                                      st.first_offset, st.inv_denominators,
                                      (0,) * copy.components, out)
    finally:
        config.SLP_VECTORIZE = slp
    if outside:
        raise IndexError(f"{outside} particle(s) have order-{order} stencils outside the "
                         f"interleaved block (shape {a.shape[:3]}, start {tuple(copy.start)})")
    return out


@njit(parallel=True, cache=True)
def _interleaved_kernel(flat, shape, start, h, positions, first_offset, inv_den, comps, out):
    """Gather-and-sum over the p^3 stencil of a padded interleaved copy (`InterleavedField`):

        u_c(x) = sum_{a,b} l_a(tx) l_b(ty) sum_m l_m(tz) F[jx + o_a, jy + o_b, jz + o_m, c],

    accumulated per particle in the p C partial sums t_mc (sum over a, b of l_a l_b F), then
    u_c = sum_m l_m t_mc. The partial sums are written out for p <= 8 and C <= 3 (branches on
    the compile-time p = len(inv_den) and C = len(comps) vanish), so they live in registers
    and each stencil row is one run of p C contiguous loads and multiply-adds that the
    compiler packs into vector instructions. Cost O(p^3 C) per particle; returns the number
    of particles whose stencil leaves the copy (their rows of out are NaN)."""
    n = positions.shape[0]
    p = len(inv_den)
    nc = len(comps)
    sy = shape[2] * nc
    sx = shape[1] * sy
    pc = p * nc
    n_tasks = (n + _TASK - 1) // _TASK
    outside = 0
    for task in prange(n_tasks):
        w = np.empty((3, p))
        zw = np.zeros(_MAX_POINTS)
        for i in range(task * _TASK, min(n, (task + 1) * _TASK)):
            r0 = 0
            inside = True
            for a in range(3):
                s = positions[i, a] / h[a]
                j = math.floor(s)
                _weights_into(s - j, first_offset, inv_den, w[a])
                b = j + first_offset - start[a]
                if b < 0 or b + p > shape[a]:
                    inside = False
                r0 += b * (sx if a == 0 else (sy if a == 1 else nc))
            if not inside:
                for c in range(nc):
                    out[i, c] = np.nan
                outside += 1
                continue
            for m in range(p):
                zw[m] = w[2, m]
            z0, z1, z2, z3, z4, z5, z6, z7 = zw[0], zw[1], zw[2], zw[3], zw[4], zw[5], zw[6], zw[7]
            t00 = t01 = t02 = t10 = t11 = t12 = t20 = t21 = t22 = t30 = t31 = t32 = 0.0
            t40 = t41 = t42 = t50 = t51 = t52 = t60 = t61 = t62 = t70 = t71 = t72 = 0.0
            for ia in range(p):
                wa = w[0, ia]
                for ib in range(p):
                    wab = wa * w[1, ib]
                    r = r0 + ia * sx + ib * sy
                    row = flat[r:r + pc]
                    m0, m1, m2, m3 = wab * z0, wab * z1, wab * z2, wab * z3
                    m4, m5, m6, m7 = wab * z4, wab * z5, wab * z6, wab * z7
                    t00 += m0 * row[0]
                    if nc > 1:
                        t01 += m0 * row[1]
                    if nc > 2:
                        t02 += m0 * row[2]
                    if p > 1:
                        t10 += m1 * row[nc]
                        if nc > 1:
                            t11 += m1 * row[nc + 1]
                        if nc > 2:
                            t12 += m1 * row[nc + 2]
                    if p > 2:
                        t20 += m2 * row[2 * nc]
                        t30 += m3 * row[3 * nc]
                        if nc > 1:
                            t21 += m2 * row[2 * nc + 1]
                            t31 += m3 * row[3 * nc + 1]
                        if nc > 2:
                            t22 += m2 * row[2 * nc + 2]
                            t32 += m3 * row[3 * nc + 2]
                    if p > 4:
                        t40 += m4 * row[4 * nc]
                        t50 += m5 * row[5 * nc]
                        if nc > 1:
                            t41 += m4 * row[4 * nc + 1]
                            t51 += m5 * row[5 * nc + 1]
                        if nc > 2:
                            t42 += m4 * row[4 * nc + 2]
                            t52 += m5 * row[5 * nc + 2]
                    if p > 6:
                        t60 += m6 * row[6 * nc]
                        t70 += m7 * row[7 * nc]
                        if nc > 1:
                            t61 += m6 * row[6 * nc + 1]
                            t71 += m7 * row[7 * nc + 1]
                        if nc > 2:
                            t62 += m6 * row[6 * nc + 2]
                            t72 += m7 * row[7 * nc + 2]
            out[i, 0] = ((t00 + t10) + (t20 + t30)) + ((t40 + t50) + (t60 + t70))
            if nc > 1:
                out[i, 1] = ((t01 + t11) + (t21 + t31)) + ((t41 + t51) + (t61 + t71))
            if nc > 2:
                out[i, 2] = ((t02 + t12) + (t22 + t32)) + ((t42 + t52) + (t62 + t72))
    return outside


def _axis_phases(coord, n, length, weighted_half):
    """exp(i k x) for the numpy FFT wavenumbers of one axis, shape (len(coord), modes).

    The Nyquist mode (even n) is taken as cos(k_N x), the real trigonometric interpolant that
    agrees with numpy's inverse transforms at grid points. On the halved (rfft) axis every
    mode other than k = 0 and Nyquist stands for itself and its conjugate and is counted twice.
    """
    if weighted_half:
        modes = np.arange(n // 2 + 1)
    else:
        modes = np.fft.fftfreq(n, d=1.0 / n)
    k = (2.0 * np.pi / length) * modes
    phase = np.exp(1j * coord[:, None] * k[None, :])
    if n % 2 == 0:
        nyq = n // 2
        phase[:, nyq] = np.cos(coord * (np.pi * n / length))
    if weighted_half:
        top = n // 2 if n % 2 == 0 else n // 2 + 1  # first index counted once again (Nyquist)
        phase[:, 1:top] *= 2.0
    return phase


def fourier_series_at(u_hat, L, positions, *, nz=None, memory_bytes=32 * 2**20):
    """Exact value of a real band-limited periodic field at arbitrary points.

    Direct evaluation of the Fourier series behind numpy's unnormalised real transform
    (u_hat = numpy.fft.rfftn(u, axes=(-3, -2, -1)), so u = irfftn(u_hat)):

        u(x) = 1/(Nx Ny Nz) * sum_{kx, ky} sum_{kz >= 0} w_kz Re[ u_hat(k) e_x e_y e_z ],

    with e = exp(i k x) per axis, k = 2 pi m / L, w_kz = 1 for kz = 0 and the Nyquist plane,
    2 otherwise (Hermitian symmetry u_hat(-k) = conj(u_hat(k)) of a real field), and every
    Nyquist mode taken as cos(k_N x) (numpy's irfftn keeps only the real, cosine part). At
    grid points this reproduces numpy.fft.irfftn.

    Parameters
    ----------
    u_hat : complex array (C, Nx, Ny, Nz//2 + 1).
    L : box length, scalar or 3 values.
    positions : array (n, 3).
    nz : physical points along the last axis; default 2 * (Nz//2 + 1 - 1) as in irfftn.
    memory_bytes : working-memory budget that sets the particle chunk size.

    Returns float64 array (n, C). Slow (O(n Nx Ny Nz)), meant as a reference.
    """
    u_hat = np.asarray(u_hat)
    if u_hat.ndim != 4:
        raise ValueError("u_hat must have shape (C, Nx, Ny, Nz//2 + 1)")
    ncomp, nx, ny, nzh = u_hat.shape
    nz = 2 * (nzh - 1) if nz is None else int(nz)
    if nz // 2 + 1 != nzh:
        raise ValueError(f"nz = {nz} does not match the last axis of u_hat ({nzh} modes)")
    lengths = np.broadcast_to(np.asarray(L, dtype=np.float64), (3,))
    positions = np.asarray(positions, dtype=np.float64).reshape(-1, 3)
    n = positions.shape[0]
    result = np.empty((n, ncomp))
    chunk = max(1, int(memory_bytes // (16 * ncomp * nx * ny)))
    flat = np.ascontiguousarray(u_hat, dtype=np.complex128).reshape(ncomp * nx * ny, nzh)
    for lo in range(0, n, chunk):
        pos = positions[lo:lo + chunk]
        ex = _axis_phases(pos[:, 0], nx, lengths[0], False)
        ey = _axis_phases(pos[:, 1], ny, lengths[1], False)
        ez = _axis_phases(pos[:, 2], nz, lengths[2], True)
        t = (flat @ ez.T).reshape(ncomp, nx, ny, -1)       # sum over kz
        t = np.einsum("cxyp,py->cxp", t, ey)              # sum over ky
        total = np.einsum("cxp,px->pc", t, ex)            # sum over kx
        result[lo:lo + chunk] = total.real / (nx * ny * nz)
    return result
