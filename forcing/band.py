"""The set of forced Fourier modes 0 < |k| <= band, and where each one lives on this process.

Modes are enumerated globally (the same list on every rank, so random draws for the whole band
are identical whatever the layout), in the half-complex storage (kz >= 0). On the kz = 0 plane
both k and -k are stored; only one of each pair is "independent", the other holds its complex
conjugate so that the forcing stays real in physical space.
"""
from __future__ import annotations

import numpy as np


def band_modes(band: float):
    """Integer wavenumbers (ix, iy, iz) with 0 < |k| <= band and iz >= 0 (on the iz = 0 plane
    both k and -k)."""
    r = int(np.floor(band))
    ints = np.arange(-r, r + 1)
    ix, iy, iz = np.meshgrid(ints, ints, np.arange(0, r + 1), indexing="ij")
    ix, iy, iz = ix.ravel(), iy.ravel(), iz.ravel()
    k2 = ix**2 + iy**2 + iz**2
    keep = (k2 > 0) & (k2 <= band * band + 1e-12)
    return ix[keep], iy[keep], iz[keep]


def full_mode_count(band: float) -> int:
    """Number of forced wavenumbers in the full (both-signs) space, N_F."""
    iz = band_modes(band)[2]
    return 2 * int(np.sum(iz > 0)) + int(np.sum(iz == 0))


class ForcedBand:
    def __init__(self, layout, band: float):
        n = layout.n
        ix, iy, iz = band_modes(band)
        independent = (iz > 0) | ((iz == 0) & ((iy > 0) | ((iy == 0) & (ix > 0))))
        self.ind = np.stack([ix[independent], iy[independent], iz[independent]], axis=1)
        # stored list = independent modes, then the mirrors -k of the kz = 0 ones
        plane0 = self.ind[:, 2] == 0
        mirrors = -self.ind[plane0]
        self.stored = np.concatenate([self.ind, mirrors], axis=0)
        self.source = np.concatenate([np.arange(len(self.ind)), np.nonzero(plane0)[0]])
        self.conj = np.concatenate([np.zeros(len(self.ind), bool), np.ones(plane0.sum(), bool)])
        #: number of forced modes in the full (both-signs) wavenumber space
        self.n_full = full_mode_count(band)
        self.n_independent = len(self.ind)
        k0 = layout.k0
        self.k_ind = self.ind.astype(float) * k0
        # local positions of the stored modes in this rank's Fourier block
        sx, sy, sz = layout.spec_start
        nx, ny, nz = layout.spec_shape
        gx = np.mod(self.stored[:, 0], n)
        gy = np.mod(self.stored[:, 1], n)
        gz = self.stored[:, 2]
        lx, ly, lz = gx - sx, gy - sy, gz - sz
        local = (lx >= 0) & (lx < nx) & (ly >= 0) & (ly < ny) & (lz >= 0) & (lz < nz)
        self.local = np.nonzero(local)[0]
        self.li, self.lj, self.ll = lx[local], ly[local], lz[local]
        # Hermitian weights of the stored modes (kz = 0 stands for itself only)
        self.weight_local = np.where(gz[local] == 0, 1.0, 2.0)

    def expand(self, values_ind: np.ndarray) -> np.ndarray:
        """Values (n_ind, 3) on the independent modes -> values on this rank's stored modes."""
        v = values_ind[self.source[self.local]]
        c = self.conj[self.local]
        v[c] = np.conj(v[c])
        return v

    def gather(self, field: np.ndarray) -> np.ndarray:
        """field[:, modes] for this rank's stored forced modes, shape (n_local, 3)."""
        return field[:, self.li, self.lj, self.ll].T

    def band_energy(self, field: np.ndarray) -> float:
        """Energy of this rank's share of the band (reduce across ranks by the caller)."""
        v = self.gather(field)
        return float(0.5 * np.sum(self.weight_local[:, None] * (v.real**2 + v.imag**2)))
