"""The nonlinear term of the incompressible Navier-Stokes equations in Fourier space.

    du_k/dt = P(k) [u x omega]_k - nu k^2 u_k + f_k,    P(k) = I - k k / k^2

(rotational form; the pressure and the kinetic-energy gradient are removed by the projection
P; see Canuto, Hussaini, Quarteroni & Zang 1988, Spectral Methods in Fluid Dynamics, ch. 7).
The product is formed pseudo-spectrally and dealiased either by the two-thirds rule (Orszag
1971, J. Atmos. Sci. 28) or by phase shifting with spherical truncation at |k| <= sqrt(2) N/3
(Patterson & Orszag 1971, Phys. Fluids 14), which evaluates the product on the grid and on a
grid shifted by half a cell in every direction and averages the two.

All work arrays are allocated once here; `evaluate` allocates nothing.
"""
from __future__ import annotations

import numpy as np

from eddybox.solver.fluid import fft
from eddybox.solver.fluid import spectral_ops as ops

DEALIAS_MODES = {"two-thirds": 0, "phase-shift": 1}


class NonlinearTerm:
    def __init__(self, layout, dealias: str = "two-thirds"):
        self.layout = layout
        self.dealias = dealias
        self.mode = DEALIAS_MODES[dealias]
        n = layout.n
        self.kc2 = 2.0 * (n / 3.0) ** 2 if self.mode == 1 else 0.0
        self.u = fft.empty_real((3,) + layout.phys_shape)
        self.w = fft.empty_real((3,) + layout.phys_shape)
        self.rowmax = np.zeros(layout.phys_shape[0])
        lx = layout
        self.ones = (np.ones(lx.spec_shape[0], complex), np.ones(lx.spec_shape[1], complex),
                     np.ones(lx.spec_shape[2], complex))
        if self.mode == 1:
            h = layout.length / n
            self.shift = tuple(np.exp(1j * k * 0.5 * h) for k in (lx.kx, lx.ky, lx.kz))
            self._copy = np.empty((3,) + layout.spec_shape, complex)
        #: max over the grid of |u|+|v|+|w| at the last evaluation
        self.umax = 0.0

    def kmax(self) -> float:
        """Largest wavenumber kept after dealiasing (for k_max eta)."""
        k0 = self.layout.k0
        n = self.layout.n
        return k0 * (np.sqrt(2.0) * n / 3.0 if self.mode == 1 else n / 3.0)

    def keep_mask_apply(self, uh):
        lx = self.layout
        ops.apply_mask(uh, lx.ikx, lx.iky, lx.ikz, lx.n, self.mode, self.kc2)

    def evaluate(self, src: np.ndarray, dst: np.ndarray, a: float, b: float) -> float:
        """dst <- a dst + b P[u x omega](src); dst must be solenoidal and dealiased when
        a != 0. src may be dst. Returns max |u|+|v|+|w| of src in physical space."""
        if self.mode == 0:
            if src is dst and a == 0.0:
                self._in_place(dst, b)
            else:
                self._once(src, dst, a, b, self.ones)
            return self.umax
        if src is dst:
            np.copyto(self._copy, src)
            src = self._copy
        self._once(src, dst, a, 0.5 * b, self.ones)
        umax = self.umax
        self._once(src, dst, 1.0, 0.5 * b, self.shift)
        self.umax = umax
        return umax

    def _in_place(self, uh, b):
        """uh <- b P[u x omega](uh) with the fewest passes: the vorticity transforms read uh,
        the velocity transforms then consume uh itself (c2r destroys its input, and uh is
        about to be overwritten), and the forward transforms write straight into uh."""
        lx = self.layout
        for c in range(3):
            ops.curl_component(uh, lx.kx, lx.ky, lx.kz, c, lx.scratch, *self.ones)
            lx.inverse(lx.scratch, self.w[c])
        for c in range(3):
            lx.inverse(uh[c], self.u[c])
        ops.cross_in_place(self.u, self.w, self.rowmax)
        self.umax = lx.max(float(self.rowmax.max()))
        for c in range(3):
            lx.forward(self.w[c], uh[c])
        ops.scale_mask_project(uh, lx.kx, lx.ky, lx.kz, lx.ikx, lx.iky, lx.ikz, lx.n, self.mode,
                               self.kc2, b * lx.norm)

    def _once(self, src, dst, a, b, shift):
        lx = self.layout
        scratch = lx.scratch
        sx, sy, sz = shift
        for c in range(3):
            if shift is self.ones:
                np.copyto(scratch, src[c])
            else:
                ops.copy_shifted(src[c], scratch, sx, sy, sz)
            lx.inverse(scratch, self.u[c])
        for c in range(3):
            ops.curl_component(src, lx.kx, lx.ky, lx.kz, c, scratch, sx, sy, sz)
            lx.inverse(scratch, self.w[c])
        ops.cross_in_place(self.u, self.w, self.rowmax)
        self.umax = lx.max(float(self.rowmax.max()))
        for c in range(3):
            lx.forward(self.w[c], scratch)
            ops.accumulate_masked(dst[c], scratch, a, b * lx.norm, lx.ikx, lx.iky, lx.ikz,
                                  lx.n, self.mode, self.kc2, sx, sy, sz)
        ops.project_solenoidal(dst, lx.kx, lx.ky, lx.kz)

    def to_physical(self, uh: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """Velocity in physical space (into the work array `u` unless `out` is given)."""
        out = self.u if out is None else out
        for c in range(3):
            np.copyto(self.layout.scratch, uh[c])
            self.layout.inverse(self.layout.scratch, out[c])
        return out
