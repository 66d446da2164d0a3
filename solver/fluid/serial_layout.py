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

    # --- transforms (unnormalised; the inverse destroys its input) -------------------------
    def forward(self, phys: np.ndarray, spec: np.ndarray) -> np.ndarray:
        return self._fwd(phys, spec)

    def inverse(self, spec: np.ndarray, phys: np.ndarray) -> np.ndarray:
        return self._inv(spec, phys)

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
