"""Data layouts: which block of the global grid this process holds, in physical and in
Fourier space, and the 3-D transforms between them.

Every layout presents its local Fourier block in (kx, ky, kz) axis order with kz the
half-complex axis, and its local physical block in (x, y, z) order. The block is always a
tensor product of 1-D index ranges, so every spectral kernel takes the three local 1-D
wavenumber arrays and works unchanged on the serial grid, a slab or a pencil.

The serial layout lives here; the MPI slab and pencil layouts (same interface) live in
`mpi_layout`; `layout.make_layout` picks one.
"""
from __future__ import annotations

import numpy as np

from eddybox.solver.fluid import fft


def fft_index(n: int) -> np.ndarray:
    """Integer wavenumbers of an n-point complex FFT axis: 0..n/2-1, -n/2..-1."""
    return np.fft.fftfreq(n, d=1.0 / n).astype(np.int64)


def rfft_index(n: int) -> np.ndarray:
    """Integer wavenumbers of the half-complex axis: 0..n/2."""
    return np.arange(n // 2 + 1, dtype=np.int64)


class SerialLayout:
    """The whole grid on one process."""

    kind = "serial"

    def __init__(self, n: int, length: float, threads: int | None = None, backend: str = "auto"):
        self.n = int(n)
        self.length = float(length)
        self.rank, self.size, self.comm = 0, 1, None
        self.proc_grid = (1, 1)
        nh = self.n // 2 + 1
        self.phys_shape = (self.n, self.n, self.n)
        self.phys_start = (0, 0, 0)
        self.spec_shape = (self.n, self.n, nh)
        self.spec_start = (0, 0, 0)
        self.k0 = 2.0 * np.pi / self.length
        self.ikx = fft_index(self.n)
        self.iky = fft_index(self.n)
        self.ikz = rfft_index(self.n)
        self.kx = self.k0 * self.ikx
        self.ky = self.k0 * self.iky
        self.kz = self.k0 * self.ikz
        # Hermitian weight: planes kz = 0 and kz = N/2 stand for themselves only
        self.wz = np.where((self.ikz == 0) | (self.ikz == self.n // 2), 1.0, 2.0)
        self.norm = 1.0 / float(self.n) ** 3
        self.threads = threads or fft.thread_count()
        # FFTW's threads cost more than they save on small grids
        fft_threads = self.threads if self.n >= 48 else 1
        self.scratch = fft.empty_complex(self.spec_shape)
        self._rbuf = fft.empty_real(self.phys_shape)
        self._fwd = fft.Plan("r2c", self._rbuf, self.scratch, axes=(0, 1, 2), threads=fft_threads,
                             backend=backend)
        self._inv = fft.Plan("c2r", self.scratch, self._rbuf, axes=(0, 1, 2), threads=fft_threads,
                             backend=backend)
        self._plan_args = {"threads": fft_threads, "backend": backend}
        self._band = {}

    # --- transforms (unnormalised; the inverse destroys its input) -------------------------
    def forward(self, phys: np.ndarray, spec: np.ndarray) -> np.ndarray:
        return self._fwd(phys, spec)

    def inverse(self, spec: np.ndarray, phys: np.ndarray) -> np.ndarray:
        return self._inv(spec, phys)

    def band_limited(self, keep: int):
        """Transforms of fields that are zero outside |k_y|, |k_z| <= keep (`BandTransforms`);
        the layout itself when nothing can be skipped."""
        if 2 * keep + 1 >= self.n:
            return self
        if keep not in self._band:
            self._band[keep] = BandTransforms(self, keep)
        return self._band[keep]

    # --- reductions (identity on one process) ---------------------------------------------
    def sum(self, x):
        return x

    def max(self, x):
        return x

    def barrier(self) -> None:
        pass

    def bcast(self, obj):
        return obj

    # --- global views for output and restart ----------------------------------------------
    def gather_spectral(self, local: np.ndarray) -> np.ndarray:
        return np.array(local, copy=True)

    def scatter_spectral(self, full: np.ndarray, out: np.ndarray) -> np.ndarray:
        out[...] = full
        return out

    def gather_physical(self, local: np.ndarray) -> np.ndarray:
        return np.array(local, copy=True)

    def summary(self) -> str:
        return f"serial layout, {self.n}^3 points on 1 process"


class BandTransforms:
    """Pruned 3-D transforms for fields band-limited to the box |k_y|, |k_z| <= K (any k_x),
    as dealiased fields are (the 2/3 rule keeps K = (N-1)//3): the 3-D transform is done
    axis by axis and every 1-D transform whose input is known to be zero, or whose output is
    discarded, is skipped (FFT pruning, Markel 1971, IEEE Trans. Audio Electroacoust. 19(4),
    305-311, applied here line by line rather than inside one 1-D transform).

        inverse: c2c along x on the lines (k_y, k_z) in the box only (a 4/9 share for the 2/3
                 rule), c2c along y on the planes k_z <= K only (2/3), c2r along z on all;
        forward: r2c along z on all, c2c along y on the planes k_z <= K, c2c along x on the
                 lines in the box.

    `forward` leaves the modes outside the box undefined: callers keep only dealiased modes
    (the consumers of the nonlinear term write zero there without reading). `inverse` needs
    its input zero outside the box and destroys it, like the full c2r. The retained values
    equal the full transforms to round-off (tests/test_pruned_transforms.py)."""

    def __init__(self, layout, keep: int):
        n, k = layout.n, int(keep)
        self.keep = k
        self.n = n
        c, r, args = layout.scratch, layout._rbuf, layout._plan_args
        m = k + 1
        self._m = m
        self._z_f = fft.Plan("r2c", r, c, axes=(2,), **args)
        self._z_b = fft.Plan("c2r", c, r, axes=(2,), **args)
        planes = c[:, :, :m]
        self._y_f = fft.Plan("c2c_f", planes, planes, axes=(1,), **args)
        self._y_b = fft.Plan("c2c_b", planes, planes, axes=(1,), **args)
        # the kept k_y rows: 0..K and N-K..N-1, two blocks of lines along x
        self._rows = (slice(0, m), slice(n - k, n))
        self._x_f, self._x_b = [], []
        for rows in self._rows:
            lines = c[:, rows, :m]
            self._x_f.append(fft.Plan("c2c_f", lines, lines, axes=(0,), **args))
            self._x_b.append(fft.Plan("c2c_b", lines, lines, axes=(0,), **args))

    def forward(self, phys: np.ndarray, spec: np.ndarray) -> np.ndarray:
        self._z_f(phys, spec)
        planes = spec[:, :, :self._m]
        self._y_f(planes, planes)
        for rows, plan in zip(self._rows, self._x_f):
            lines = spec[:, rows, :self._m]
            plan(lines, lines)
        return spec

    def inverse(self, spec: np.ndarray, phys: np.ndarray) -> np.ndarray:
        for rows, plan in zip(self._rows, self._x_b):
            lines = spec[:, rows, :self._m]
            plan(lines, lines)
        planes = spec[:, :, :self._m]
        self._y_b(planes, planes)
        return self._z_b(spec, phys)
