"""Numba kernels on a local Fourier block (kx, ky, kz-half axis order) and on physical blocks.

Every kernel takes the three local 1-D wavenumber arrays of its block, so it works unchanged
on the serial grid and on any slab or pencil block (see `eddybox.solver.fluid.serial_layout`). Kernels run in
parallel over the first axis and allocate nothing.

Conventions: Fourier coefficients are normalised (u(x) = sum_k u_k e^{ik.x}); the Hermitian
weight wz[l] is 1 on the kz = 0 and kz = N/2 planes and 2 elsewhere, so sum_k over the full
spectrum equals sum over the half block with that weight.
"""
from __future__ import annotations

import numpy as np
from numba import njit, prange

# ---------------------------------------------------------------------------------------------
# Dealiasing masks (Orszag 1971 two-thirds rule; Patterson & Orszag 1971 spherical truncation
# used together with phase shifting). Mode 0: cubic |k_i| < N/3; mode 1: |k|^2 <= kc2.
# ---------------------------------------------------------------------------------------------


@njit(cache=True, inline="always")
def _keep(ix, iy, iz, n, mode, kc2):
    """Whether mode (ix, iy, iz) survives dealiasing; Nyquist modes never do."""
    half = n // 2
    if ix == -half or iy == -half or iz == half:
        return False
    if mode == 0:
        return 3 * abs(ix) < n and 3 * abs(iy) < n and 3 * abs(iz) < n
    return ix * ix + iy * iy + iz * iz <= kc2


@njit(parallel=True, cache=True)
def apply_mask(a, ikx, iky, ikz, n, mode, kc2):
    """Zero every mode outside the dealiasing region, and the Nyquist modes, in place."""
    nc = a.shape[0]
    for i in prange(a.shape[1]):
        for j in range(a.shape[2]):
            for l in range(a.shape[3]):
                if not _keep(ikx[i], iky[j], ikz[l], n, mode, kc2):
                    for c in range(nc):
                        a[c, i, j, l] = 0.0


@njit(parallel=True, cache=True)
def copy_shifted(src, dst, sx, sy, sz):
    """dst = src * sx[i] sy[j] sz[l]: the field on a grid shifted by the phase factors s."""
    for i in prange(src.shape[0]):
        for j in range(src.shape[1]):
            sxy = sx[i] * sy[j]
            for l in range(src.shape[2]):
                dst[i, j, l] = src[i, j, l] * sxy * sz[l]


@njit(parallel=True, cache=True)
def curl_component(uh, kx, ky, kz, comp, out, sx, sy, sz):
    """out = (i k x u_k)_comp * s: one Cartesian component of the vorticity in Fourier space."""
    for i in prange(uh.shape[1]):
        for j in range(uh.shape[2]):
            for l in range(uh.shape[3]):
                s = sx[i] * sy[j] * sz[l]
                if comp == 0:
                    v = ky[j] * uh[2, i, j, l] - kz[l] * uh[1, i, j, l]
                elif comp == 1:
                    v = kz[l] * uh[0, i, j, l] - kx[i] * uh[2, i, j, l]
                else:
                    v = kx[i] * uh[1, i, j, l] - ky[j] * uh[0, i, j, l]
                out[i, j, l] = 1j * v * s


@njit(parallel=True, cache=True)
def cross_in_place(u, w, rowmax):
    """w <- u x w point by point (w holds the vorticity on entry), and
    rowmax[i] = max over the plane i of |u|+|v|+|w| (for the CFL number)."""
    for i in prange(u.shape[1]):
        m = 0.0
        for j in range(u.shape[2]):
            for l in range(u.shape[3]):
                a0 = u[0, i, j, l]
                a1 = u[1, i, j, l]
                a2 = u[2, i, j, l]
                b0 = w[0, i, j, l]
                b1 = w[1, i, j, l]
                b2 = w[2, i, j, l]
                w[0, i, j, l] = a1 * b2 - a2 * b1
                w[1, i, j, l] = a2 * b0 - a0 * b2
                w[2, i, j, l] = a0 * b1 - a1 * b0
                s = abs(a0) + abs(a1) + abs(a2)
                if s > m or s != s:  # NaN must not hide from the maximum
                    m = s if s == s else np.inf
        rowmax[i] = m


@njit(parallel=True, cache=True)
def accumulate_masked(dst, src, a, b, ikx, iky, ikz, n, mode, kc2, sx, sy, sz):
    """dst = a dst + b conj(s) src inside the dealiasing region, 0 outside (and at Nyquist)."""
    for i in prange(dst.shape[0]):
        for j in range(dst.shape[1]):
            for l in range(dst.shape[2]):
                if _keep(ikx[i], iky[j], ikz[l], n, mode, kc2):
                    s = sx[i] * sy[j] * sz[l]
                    dst[i, j, l] = a * dst[i, j, l] + b * src[i, j, l] * s.conjugate()
                else:
                    dst[i, j, l] = 0.0


@njit(parallel=True, cache=True)
def scale_mask_project(uh, kx, ky, kz, ikx, iky, ikz, n, mode, kc2, b):
    """uh <- b P(k) uh inside the dealiasing region, 0 outside: one fused pass that finishes a
    nonlinear term whose forward transforms were written straight into uh."""
    for i in prange(uh.shape[1]):
        for j in range(uh.shape[2]):
            for l in range(uh.shape[3]):
                k2 = kx[i] * kx[i] + ky[j] * ky[j] + kz[l] * kz[l]
                if k2 == 0.0 or not _keep(ikx[i], iky[j], ikz[l], n, mode, kc2):
                    uh[0, i, j, l] = 0.0
                    uh[1, i, j, l] = 0.0
                    uh[2, i, j, l] = 0.0
                    continue
                a0 = uh[0, i, j, l]
                a1 = uh[1, i, j, l]
                a2 = uh[2, i, j, l]
                d = (kx[i] * a0 + ky[j] * a1 + kz[l] * a2) / k2
                uh[0, i, j, l] = b * (a0 - kx[i] * d)
                uh[1, i, j, l] = b * (a1 - ky[j] * d)
                uh[2, i, j, l] = b * (a2 - kz[l] * d)


@njit(parallel=True, cache=True)
def project_solenoidal(uh, kx, ky, kz):
    """u_k <- (I - k k / k^2) u_k; the k = 0 mode is set to zero (no mean flow)."""
    for i in prange(uh.shape[1]):
        for j in range(uh.shape[2]):
            for l in range(uh.shape[3]):
                k2 = kx[i] * kx[i] + ky[j] * ky[j] + kz[l] * kz[l]
                if k2 == 0.0:
                    uh[0, i, j, l] = 0.0
                    uh[1, i, j, l] = 0.0
                    uh[2, i, j, l] = 0.0
                    continue
                d = (kx[i] * uh[0, i, j, l] + ky[j] * uh[1, i, j, l] + kz[l] * uh[2, i, j, l]) / k2
                uh[0, i, j, l] -= kx[i] * d
                uh[1, i, j, l] -= ky[j] * d
                uh[2, i, j, l] -= kz[l] * d


# ---------------------------------------------------------------------------------------------
# Integrating-factor Runge-Kutta combinations. F(i,j,l) = fx[i] fy[j] fz[l] is a separable
# factor exp(-(nu k^2 - A) p dt); the separability keeps it exact on any local block.
# ---------------------------------------------------------------------------------------------


@njit(parallel=True, cache=True)
def if_combine(acc, stage, un, ax, ay, az, alpha, beta, ux, uy, uz, gx, gy, gz, gamma):
    """With k = stage on entry:  acc <- alpha acc + beta Fa k;  stage <- Fu un + gamma Fg k."""
    for c in range(acc.shape[0]):
        for i in prange(acc.shape[1]):
            for j in range(acc.shape[2]):
                fa = ax[i] * ay[j]
                fu = ux[i] * uy[j]
                fg = gx[i] * gy[j]
                for l in range(acc.shape[3]):
                    k = stage[c, i, j, l]
                    acc[c, i, j, l] = alpha * acc[c, i, j, l] + beta * fa * az[l] * k
                    stage[c, i, j, l] = fu * uz[l] * un[c, i, j, l] + gamma * fg * gz[l] * k


@njit(parallel=True, cache=True)
def if_finish(un, acc, stage, fx, fy, fz, gamma):
    """un <- F un + acc + gamma stage (last stage of an integrating-factor RK step)."""
    for c in range(un.shape[0]):
        for i in prange(un.shape[1]):
            for j in range(un.shape[2]):
                f = fx[i] * fy[j]
                for l in range(un.shape[3]):
                    un[c, i, j, l] = f * fz[l] * un[c, i, j, l] + acc[c, i, j, l] \
                        + gamma * stage[c, i, j, l]


@njit(parallel=True, cache=True)
def lsrk_advance(u, q, b, fx, fy, fz, scale_q):
    """u <- F (u + b q);  q <- F q when scale_q (low-storage RK stage with integrating factor)."""
    for c in range(u.shape[0]):
        for i in prange(u.shape[1]):
            for j in range(u.shape[2]):
                f = fx[i] * fy[j]
                for l in range(u.shape[3]):
                    ff = f * fz[l]
                    u[c, i, j, l] = ff * (u[c, i, j, l] + b * q[c, i, j, l])
                    if scale_q:
                        q[c, i, j, l] = ff * q[c, i, j, l]


# ---------------------------------------------------------------------------------------------
# Reductions for statistics (Pope 2000, ch. 6: E = 1/2 <u.u>, eps = 2 nu sum k^2 E(k)).
# ---------------------------------------------------------------------------------------------


@njit(cache=True)
def spectral_moments(uh, kx, ky, kz, wz, k0, n_shells, shells, comp_energy):
    """Fill shells[s] with the energy of the modes with s - 1/2 <= |k|/k0 < s + 1/2 and
    comp_energy[c] with 1/2 <|u_c|^2>; return (sum k^2 |u_k|^2 / 2 , sum E_k / |k|)."""
    shells[:] = 0.0
    comp_energy[:] = 0.0
    d = 0.0
    inv = 0.0
    for i in range(uh.shape[1]):
        for j in range(uh.shape[2]):
            for l in range(uh.shape[3]):
                k2 = kx[i] * kx[i] + ky[j] * ky[j] + kz[l] * kz[l]
                e = 0.0
                for c in range(3):
                    v = uh[c, i, j, l]
                    ec = 0.5 * wz[l] * (v.real * v.real + v.imag * v.imag)
                    comp_energy[c] += ec
                    e += ec
                kk = np.sqrt(k2)
                # compare as floats first: int() of an infinite or NaN |k| (an overflowed k^2)
                # is undefined and once gave a huge negative index, i.e. a heap write
                shell = kk / k0 + 0.5
                if shell < n_shells:
                    shells[int(shell)] += e
                d += k2 * e
                if k2 > 0.0:
                    inv += e / kk
    return d, inv


@njit(parallel=True, cache=True)
def derivative_component(uh, kx, ky, kz, comp, axis, out):
    """out = i k_axis u_comp: the Fourier coefficients of d u_comp / d x_axis."""
    for i in prange(uh.shape[1]):
        for j in range(uh.shape[2]):
            for l in range(uh.shape[3]):
                if axis == 0:
                    k = kx[i]
                elif axis == 1:
                    k = ky[j]
                else:
                    k = kz[l]
                out[i, j, l] = 1j * k * uh[comp, i, j, l]


@njit(parallel=True, cache=True)
def divergence(uh, kx, ky, kz, out):
    """out = i k . u_k."""
    for i in prange(uh.shape[1]):
        for j in range(uh.shape[2]):
            for l in range(uh.shape[3]):
                out[i, j, l] = 1j * (kx[i] * uh[0, i, j, l] + ky[j] * uh[1, i, j, l]
                                     + kz[l] * uh[2, i, j, l])


@njit(cache=True)
def power_moments(a):
    """Sums of a^2, a^3, a^4 and max |a| over a real block."""
    s2 = 0.0
    s3 = 0.0
    s4 = 0.0
    m = 0.0
    flat = a.ravel()
    for p in range(flat.size):
        v = flat[p]
        v2 = v * v
        s2 += v2
        s3 += v2 * v
        s4 += v2 * v2
        if abs(v) > m:
            m = abs(v)
    return s2, s3, s4, m


@njit(parallel=True, cache=True)
def energy_sum(uh, wz):
    """1/2 sum_k w |u_k|^2 over a local block (the kinetic energy per unit mass)."""
    total = 0.0
    for i in prange(uh.shape[1]):
        for c in range(3):
            for j in range(uh.shape[2]):
                for l in range(uh.shape[3]):
                    v = uh[c, i, j, l]
                    total += 0.5 * wz[l] * (v.real * v.real + v.imag * v.imag)
    return total


@njit(cache=True)
def all_finite(a):
    flat = a.ravel()
    for p in range(flat.size):
        v = flat[p]
        if not (np.isfinite(v.real) and np.isfinite(v.imag)):
            return False
    return True
