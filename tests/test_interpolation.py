"""Tests of particles.interpolation: Lagrange interpolation of periodic grid fields."""

import math

import numpy as np
import pytest

from eddybox.particles.interpolation import (
    INTERPOLATION_ORDERS,
    cell_index,
    fourier_series_at,
    interpolate,
    lagrange_weights,
)

L = 2.0 * np.pi
ORDERS = (2, 4, 6, 8)


def grid_coords(n_global, length=L):
    return [np.arange(n) * (length / n) for n in n_global]


def sample(fun, n_global):
    """Field of shape (C, Nx, Ny, Nz) from fun(x, y, z) -> (C, ...) at the grid points."""
    x, y, z = np.meshgrid(*grid_coords(n_global), indexing="ij")
    return np.ascontiguousarray(fun(x, y, z), dtype=np.float64)


def smooth_field(x, y, z):
    # products of sines and cosines with wavenumbers 1..3 and phase shifts
    return np.stack([
        np.sin(x + 0.3) * np.cos(2 * y) * np.sin(3 * z + 1.0),
        np.cos(2 * x - 0.5) * np.sin(y + 0.2) * np.cos(z),
        np.sin(3 * x) * np.cos(y - 0.7) * np.sin(2 * z + 0.4),
    ])


def run_interp(field, positions, order, start=(0, 0, 0), n_global=None, **kw):
    n_global = field.shape[1:] if n_global is None else n_global
    h = [L / n for n in n_global]
    out = np.empty((len(positions), field.shape[0]))
    return interpolate(field, start, n_global, h, positions, order, out, **kw)


def random_real_field(rng, ncomp, n_global):
    return rng.standard_normal((ncomp,) + tuple(n_global))


def band_limited_field(rng, ncomp, n_global, kmax):
    """Random real field keeping only modes with |k_i| <= kmax on every axis."""
    u_hat = np.fft.rfftn(random_real_field(rng, ncomp, n_global), axes=(-3, -2, -1))
    kx = np.fft.fftfreq(n_global[0], 1.0 / n_global[0])
    ky = np.fft.fftfreq(n_global[1], 1.0 / n_global[1])
    kz = np.arange(n_global[2] // 2 + 1)
    keep = ((np.abs(kx)[:, None, None] <= kmax) & (np.abs(ky)[None, :, None] <= kmax)
            & (kz[None, None, :] <= kmax))
    u_hat = u_hat * keep
    u = np.fft.irfftn(u_hat, s=n_global, axes=(-3, -2, -1))
    return np.ascontiguousarray(u), np.fft.rfftn(u, axes=(-3, -2, -1))


def test_weights_reproduce_polynomials_and_nodes():
    # Lagrange interpolation with p nodes is exact for polynomials of degree < p
    # (Lagrange interpolation theory, e.g. Press et al. 2007 Numerical Recipes sec. 3.2).
    t = np.linspace(0.0, 0.999, 37)
    for p in ORDERS:
        w = lagrange_weights(t, p)
        nodes = np.arange(p) - p // 2 + 1
        for degree in range(p):
            np.testing.assert_allclose(w @ nodes.astype(float) ** degree, t ** degree,
                                       atol=1e-12)
        # at t = 0 the weight sits entirely on node 0
        np.testing.assert_array_equal(lagrange_weights(np.array([0.0]), p)[0],
                                      (nodes == 0).astype(float))


@pytest.mark.parametrize("order", ORDERS)
def test_error_falls_as_h_to_the_order(order):
    # Lagrange remainder theorem: error = f^(p)(xi)/p! * prod(x - x_m) = O(h^p) for smooth f
    # (Lagrange interpolation error theory, common practice).
    rng = np.random.default_rng(1)
    positions = rng.uniform(0.0, L, (3000, 3))
    exact = smooth_field(*positions.T).T
    sizes = np.array([16, 24, 32, 48, 64])
    errors = []
    for n in sizes:
        out = run_interp(sample(smooth_field, (n, n, n)), positions, order)
        errors.append(np.abs(out - exact).max())
    observed = np.polyfit(np.log(L / sizes), np.log(errors), 1)[0]
    assert abs(observed - order) < 0.5, (order, observed, errors)
    assert errors[-1] > 1e-13  # still above round-off, so the fit measures truncation error


def test_fourier_series_matches_irfftn_at_grid_points():
    # Exactness at grid points against numpy.fft.irfftn (reference library), for even
    # (Nyquist planes present) and odd sizes; white noise excites every mode incl. Nyquist.
    rng = np.random.default_rng(2)
    for n_global in [(8, 10, 12), (9, 7, 11), (6, 5, 8)]:
        u = random_real_field(rng, 2, n_global)
        u_hat = np.fft.rfftn(u, axes=(-3, -2, -1))
        x, y, z = np.meshgrid(*grid_coords(n_global), indexing="ij")
        points = np.stack([x.ravel(), y.ravel(), z.ravel()], axis=1)
        values = fourier_series_at(u_hat, L, points, nz=n_global[2])
        reference = np.fft.irfftn(u_hat, s=n_global, axes=(-3, -2, -1))
        # O(number of modes * eps) summation round-off, far below the O(1) values
        np.testing.assert_allclose(values, reference.reshape(2, -1).T, rtol=0, atol=1e-12)


def test_fourier_series_matches_analytic_field_off_grid():
    # A trigonometric polynomial sampled on the grid is reproduced exactly between grid
    # points, including a cosine at the Nyquist wavenumber (the real part numpy keeps).
    def fun(x, y, z):
        return np.stack([np.sin(3 * x + 0.1) * np.cos(2 * y) + 0.5 * np.cos(8 * z),
                         np.cos(8 * x) * np.sin(y - 0.4) * np.cos(5 * z + 0.3)])
    n_global = (16, 12, 16)
    u_hat = np.fft.rfftn(sample(fun, n_global), axes=(-3, -2, -1))
    points = np.random.default_rng(3).uniform(0.0, L, (200, 3))
    np.testing.assert_allclose(fourier_series_at(u_hat, L, points), fun(*points.T).T,
                               rtol=0, atol=1e-12)


def lebesgue_constant(order):
    t = np.linspace(0.0, 1.0, 2001)
    return np.abs(lagrange_weights(t[:-1], order)).sum(axis=1).max()


def remainder_factor(order):
    """max over t in [0, 1] of |prod_m (t - o_m)| / p!, the Lagrange remainder constant."""
    t = np.linspace(0.0, 1.0, 2001)
    nodes = np.arange(order) - order // 2 + 1
    return np.abs(np.prod(t[:, None] - nodes[None, :], axis=1)).max() / math.factorial(order)


def test_order8_matches_fourier_series_of_band_limited_field():
    # Tolerance: rigorous bound from the Lagrange remainder theorem. For one Fourier mode
    # A e^{i k.x}, the 1-D error is <= sqrt(2) R (|k_a| h_a)^p (real and imaginary parts,
    # R = remainder_factor), and the tensor-product error (1-Ix) + Ix(1-Iy) + IxIy(1-Iz) is
    # bounded using the Lebesgue constant Lam of the stencil; summed over all modes.
    order = 8
    rng = np.random.default_rng(4)
    n_global = (48, 40, 36)
    kmax = 4
    u, u_hat = band_limited_field(rng, 3, n_global, kmax)
    points = rng.uniform(0.0, L, (400, 3))
    exact = fourier_series_at(u_hat, L, points)
    approx = run_interp(u, points, order)

    h = np.array([L / n for n in n_global])
    k = [np.abs(np.fft.fftfreq(n_global[0], 1.0 / n_global[0])),
         np.abs(np.fft.fftfreq(n_global[1], 1.0 / n_global[1])),
         np.arange(n_global[2] // 2 + 1.0)]
    e = [math.sqrt(2.0) * remainder_factor(order) * (ka * ha) ** order for ka, ha in zip(k, h)]
    lam = lebesgue_constant(order)
    mode_error = (e[0][:, None, None] + lam * e[1][None, :, None]
                  + lam ** 2 * e[2][None, None, :])
    weight = np.full(n_global[2] // 2 + 1, 2.0)
    weight[0] = 1.0
    weight[-1] = 1.0  # even Nz: Nyquist plane counted once
    scale = 1.0 / np.prod(n_global)
    bound = scale * (np.abs(u_hat) * weight * mode_error).sum(axis=(1, 2, 3))

    error = np.abs(approx - exact).max(axis=0)
    assert np.all(error <= bound + 1e-12), (error, bound)
    # the bound is tight enough to mean something: well below the field's size
    assert np.all(bound < 1e-3 * np.abs(u).max(axis=(1, 2, 3))), bound


def extract_block(field, n_global, lo, hi, ghost, full_axes):
    """Local block of the periodic field owning cells [lo, hi) per axis, with ghost layers;
    an axis in full_axes is kept whole (start 0, no ghosts), as in a slab decomposition."""
    start, index = [], []
    for a in range(3):
        if a in full_axes:
            start.append(0)
            index.append(np.arange(n_global[a]))
        else:
            s = lo[a] - ghost
            start.append(s)
            index.append(np.mod(s + np.arange(hi[a] - lo[a] + 2 * ghost), n_global[a]))
    block = field[:, index[0]][:, :, index[1]][:, :, :, index[2]]
    return np.ascontiguousarray(block), np.array(start, dtype=np.int64)


def block_particles(rng, n_global, lo, hi, count):
    """Random particles plus edge cases (x = 0, nextafter(L, 0), block faces), keeping those
    whose anchor cell (the ownership rule) lies in [lo, hi) on every axis."""
    h = np.array([L / n for n in n_global])
    special = []
    for a in range(3):
        vals = [0.0, np.nextafter(L, 0.0), L - 1e-13, lo[a] * h[a], hi[a] * h[a],
                np.nextafter(hi[a] * h[a], 0.0), np.nextafter(lo[a] * h[a], 0.0),
                (lo[a] + 0.5) * h[a], (hi[a] - 0.5) * h[a]]
        special.append(np.array(vals) % L)
    grid = np.stack(np.meshgrid(*special, indexing="ij"), axis=-1).reshape(-1, 3)
    lo_pos = np.array(lo) * h
    span = (np.array(hi) - np.array(lo)) * h
    randoms = (lo_pos + rng.uniform(0.0, 1.0, (count, 3)) * span) % L
    candidates = np.concatenate([grid, randoms])
    cells = cell_index(candidates, h, np.array(n_global, dtype=np.int64))
    mine = np.all((cells >= np.array(lo)) & (cells < np.array(hi)), axis=1)
    return np.ascontiguousarray(candidates[mine])


BLOCKS = [
    # (lo, hi, full_axes): start negative on x, whole y axis, wrapped upper ghosts on z
    ((0, 0, 14), (6, 12, 20), {1}),
    # interior block on every axis
    ((5, 3, 7), (11, 9, 13), set()),
    # last cells on every axis: upper ghosts wrap to the start of the grid
    ((10, 8, 15), (16, 12, 20), set()),
    # first cells on every axis: negative start; on y (N = 12) x = nextafter(L, 0) rounds
    # to x/h = N, so its cell is 0 and its stencil indices exceed N before the wrap
    ((0, 0, 0), (6, 4, 5), set()),
]


@pytest.mark.parametrize("order", ORDERS)
@pytest.mark.parametrize("lo, hi, full_axes", BLOCKS)
def test_ghosted_block_equals_full_field_bit_for_bit(order, lo, hi, full_axes):
    # Same stencil values and weights in the same order of operations, so the local-block
    # result must equal the whole-grid result exactly (a property of the index formula).
    rng = np.random.default_rng(5)
    n_global = (16, 12, 20)
    field = random_real_field(rng, 9, n_global)
    block, start = extract_block(field, n_global, lo, hi, order // 2, full_axes)
    positions = block_particles(rng, n_global, lo, hi, 300)
    assert len(positions) > 300  # edge cases survived the ownership filter
    from_full = run_interp(field, positions, order)
    from_block = run_interp(block, positions, order, start=start, n_global=n_global)
    np.testing.assert_array_equal(from_block, from_full)


def test_cell_sort_gives_identical_results():
    # Visiting particles in cell order only changes memory access, never the arithmetic.
    rng = np.random.default_rng(6)
    field = random_real_field(rng, 3, (24, 20, 16))
    positions = rng.uniform(0.0, L, (5000, 3))
    for order in ORDERS:
        plain = run_interp(field, positions, order, cell_sort=False)
        sorted_ = run_interp(field, positions, order, cell_sort=True)
        np.testing.assert_array_equal(plain, sorted_)


def test_grid_points_and_constants_are_reproduced():
    # Interpolation reproduces grid values at nodes and constants everywhere (weights sum
    # to one; Lagrange interpolation theory, common practice).
    rng = np.random.default_rng(7)
    n_global = (12, 10, 8)
    field = random_real_field(rng, 2, n_global)
    x, y, z = np.meshgrid(*grid_coords(n_global), indexing="ij")
    nodes = np.stack([x.ravel(), y.ravel(), z.ravel()], axis=1)
    positions = rng.uniform(0.0, L, (500, 3))
    constant = np.full((1,) + n_global, 2.5)
    for order in ORDERS:
        np.testing.assert_allclose(run_interp(field, nodes, order),
                                   field.reshape(2, -1).T, rtol=0, atol=1e-13)
        np.testing.assert_allclose(run_interp(constant, positions, order), 2.5,
                                   rtol=0, atol=1e-13)


def test_invalid_arguments_are_rejected():
    field = np.zeros((3, 8, 8, 8))
    positions = np.zeros((4, 3))
    out = np.empty((4, 3))
    with pytest.raises(ValueError, match="2, 4, 6, 8"):
        interpolate(field, (0, 0, 0), (8, 8, 8), L / 8, positions, 5, out)
    with pytest.raises(ValueError, match="out"):
        interpolate(field, (0, 0, 0), (8, 8, 8), L / 8, positions, 4, np.empty((4, 2)))
    with pytest.raises(ValueError, match="field"):
        interpolate(field.astype(np.float32), (0, 0, 0), (8, 8, 8), L / 8, positions, 4, out)
    assert sorted(INTERPOLATION_ORDERS) == list(ORDERS)


def test_stencil_outside_block_raises_instead_of_reading_out_of_bounds():
    rng = np.random.default_rng(8)
    n_global = (16, 16, 16)
    field = random_real_field(rng, 3, n_global)
    block, start = extract_block(field, n_global, (4, 4, 4), (8, 8, 8), 2, set())
    h = L / 16
    positions = np.array([[5.5 * h, 5.5 * h, 5.5 * h],     # owned: fine
                          [12.5 * h, 5.5 * h, 5.5 * h]])   # another block's particle
    out = np.empty((2, 3))
    with pytest.raises(IndexError, match="1 particle"):
        interpolate(block, start, n_global, h, positions, 4, out)
    assert np.all(np.isfinite(out[0])) and np.all(np.isnan(out[1]))


# ---------------------------------------------------------------------------------------------
# Interleaved (padded, components side by side) copies, the run loop's interpolation
# ---------------------------------------------------------------------------------------------
from eddybox.particles.interpolation import InterleavedField, interpolate_interleaved  # noqa: E402


def turbulent_field(rng, n, kmax_eta=1.5):
    """A random solenoid-free-agnostic field with the model spectrum E ~ k^(-5/3) exp(-5.2 k eta)
    (the inertial range and dissipation cut-off of Pope 2000, eq. 6.246, beta = 5.2; from
    memory), 2/3-dealiased, eta such that k_max eta = kmax_eta; scaled to max |u| = 1."""
    k1 = np.fft.fftfreq(n, 1.0 / n)
    kz = np.arange(n // 2 + 1)
    k = np.sqrt(k1[:, None, None] ** 2 + k1[None, :, None] ** 2 + kz[None, None, :] ** 2)
    keep = ((3 * np.abs(k1)[:, None, None] < n) & (3 * np.abs(k1)[None, :, None] < n)
            & (3 * kz[None, None, :] < n))
    eta = kmax_eta / (n / 3.0)
    with np.errstate(divide="ignore"):
        spec = np.where(k > 0, k ** (-5.0 / 3.0) * np.exp(-5.2 * k * eta), 0.0)
    amp = np.sqrt(spec / (4 * np.pi * np.maximum(k, 1.0) ** 2)) * keep
    noise = rng.standard_normal((3,) + k.shape) + 1j * rng.standard_normal((3,) + k.shape)
    u = np.fft.irfftn(amp * noise, s=(n, n, n), axes=(1, 2, 3))
    return np.ascontiguousarray(u / np.abs(u).max())


@pytest.mark.parametrize("order", ORDERS)
@pytest.mark.parametrize("ncomp", [1, 3])
def test_interleaved_copy_equals_interpolate(order, ncomp):
    # the same Lagrange sums in another order: equal to round-off, on the whole periodic grid
    # and on a ghosted block (x and y held in part, z whole and padded by the copy)
    rng = np.random.default_rng(order + ncomp)
    n = (12, 10, 14)
    field = random_real_field(rng, ncomp, n)
    pos = rng.uniform(0, 1, (500, 3)) * L
    pos[:4] = [[0.0, 0.0, 0.0], [np.nextafter(L, 0)] * 3, [L - 1e-15, 0.0, np.nextafter(L, 0)],
               [1e-300, L / 2, 3.0]]
    ref = run_interp(field, pos, order)
    copy = InterleavedField(field.shape, (0, 0, 0), n, order, np.float64).fill(field)
    got = interpolate_interleaved(copy, [L / m for m in n], pos, order, np.empty_like(ref))
    assert np.abs(got - ref).max() < 1e-13 * np.abs(field).max()
    n = (24, 20, 14)
    field = random_real_field(rng, ncomp, n)
    lo, hi = (8, 7), (14, 12)  # a block of x in [8, 14), y in [7, 12) with p/2 + 1 ghost planes
    w = order // 2 + 1
    block = np.ascontiguousarray(field[:, lo[0] - w:hi[0] + w, lo[1] - w:hi[1] + w, :])
    start = (lo[0] - w, lo[1] - w, 0)
    inside = rng.uniform(0, 1, (300, 3)) * [(hi[0] - lo[0]) * L / n[0], (hi[1] - lo[1]) * L / n[1], L]
    inside += [lo[0] * L / n[0], lo[1] * L / n[1], 0.0]
    copy = InterleavedField(block.shape, start, n, order, np.float64).fill(block)
    got = interpolate_interleaved(copy, [L / m for m in n], inside, order, np.empty((300, ncomp)))
    assert np.abs(got - run_interp(field, inside, order)).max() < 1e-13 * np.abs(field).max()


def test_single_precision_copy_is_far_below_the_interpolation_error():
    # a field resolved like a run at k_max eta = 1.5: the order-8 interpolation error against
    # the exact Fourier series (fourier_series_at) is ~3e-4 of max |u|; the float32 copy stays
    # within 1e-6 (the bound asked for; InterleavedField states 4 x 2^-24 = 2.4e-7, the IEEE 754
    # rounding of each value times the absolute weight sums) and 1000 times below that error
    rng = np.random.default_rng(11)
    n = 32
    u = turbulent_field(rng, n)
    pos = rng.uniform(0.0, L, (2000, 3))
    exact = fourier_series_at(np.fft.rfftn(u, axes=(1, 2, 3)), L, pos)
    out = {}
    for dtype in (np.float32, np.float64):
        copy = InterleavedField(u.shape, (0, 0, 0), (n, n, n), 8, dtype).fill(u)
        out[dtype] = interpolate_interleaved(copy, L / n, pos, 8, np.empty((2000, 3)))
    rounding = np.abs(out[np.float32] - out[np.float64]).max()
    interp_error = np.abs(out[np.float64] - exact).max()
    assert rounding < 4 * 2.0**-24 < 1e-6
    assert 1e-5 < interp_error < 1e-3
    assert rounding < 1e-3 * interp_error


def test_interleaved_copy_refuses_what_it_cannot_serve():
    rng = np.random.default_rng(5)
    field = random_real_field(rng, 3, (8, 8, 8))
    copy = InterleavedField(field.shape, (0, 0, 0), (8, 8, 8), 4).fill(field)
    with pytest.raises(ValueError, match="order 8"):
        interpolate_interleaved(copy, L / 8, np.zeros((2, 3)), 8, np.empty((2, 3)))
    with pytest.raises(ValueError, match="does not match"):
        copy.fill(field[:, :4])
    with pytest.raises(ValueError, match="components"):
        InterleavedField((4, 8, 8, 8), (0, 0, 0), (8, 8, 8), 4)
    # a block without ghost layers: stencils leave it, NaN rows and IndexError (never a read
    # out of bounds)
    block = np.ascontiguousarray(field[:, 2:6, 2:6, :])
    copy = InterleavedField(block.shape, (2, 2, 0), (8, 8, 8), 4).fill(block)
    out = np.zeros((2, 3))
    with pytest.raises(IndexError, match="1 particle"):
        interpolate_interleaved(copy, L / 8, np.array([[3.5 * L / 8, 3.5 * L / 8, 1.0],
                                                       [0.1, 0.1, 0.1]]), 4, out)
    assert np.isnan(out[1]).all() and np.isfinite(out[0]).all()
