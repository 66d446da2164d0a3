"""The velocity field as eddybox stores it in checkpoints and field snapshots: a dataset
`velocity_hat` of shape (3, N, N, N/2+1), complex, the normalised Fourier coefficients in
global index order, with attributes `length` (the box side) and `crc32` (see `checksum`).

`read_velocity_hat` reads such a dataset into an N'^3 field of another resolution, checking
everything a hand-made or damaged file can get wrong, and never holding more than one block of
the source in memory beyond the result.
"""
from __future__ import annotations

import zlib

import numpy as np

from eddybox.solver.errors import InitialFieldError

EXPECTED = "a dataset 'velocity_hat' of shape (3, M, M, M/2+1), M even >= 4, of finite complex numbers"
#: bytes of the source read at once
BLOCK_BYTES = 16 << 20


def _head(dtype, shape) -> int:
    return zlib.crc32(f"{np.dtype(dtype).str}{tuple(shape)}".encode())


def checksum(data) -> int:
    """CRC-32 (zlib.crc32, the ISO 3309 polynomial) of an array's dtype, shape and bytes."""
    a = np.ascontiguousarray(data)
    return zlib.crc32(a.reshape(-1).view(np.uint8), _head(a.dtype, a.shape))


def read_velocity_hat(path, n: int, length: float) -> np.ndarray:
    """The global (3, n, n, n/2+1) field from the `velocity_hat` of file `path`, truncated
    (coarser target) or zero-padded (finer target) spectrally, keeping |k_i| < min(M, n)/2.
    InitialFieldError says what was found and what is expected."""
    import h5py

    try:
        f = h5py.File(path, "r")
    except FileNotFoundError:
        raise InitialFieldError(f"{path}: no such file") from None
    except (OSError, RuntimeError) as exc:
        raise InitialFieldError(f"{path}: not a readable HDF5 file ({exc}); expected {EXPECTED}") from None
    with f:
        ds = f.get("velocity_hat")
        if ds is None:
            raise InitialFieldError(f"{path}: no dataset 'velocity_hat' (not an eddybox field or "
                                    f"checkpoint); expected {EXPECTED}")
        if not isinstance(ds, h5py.Dataset):
            raise InitialFieldError(f"{path}: 'velocity_hat' is a group, not a dataset; expected {EXPECTED}")
        shape, dtype = ds.shape, ds.dtype
        if dtype.kind != "c":
            raise InitialFieldError(f"{path}: velocity_hat holds {dtype} values; expected {EXPECTED}")
        m_src = shape[1] if len(shape) == 4 else 0
        if len(shape) != 4 or shape[0] != 3 or shape[2] != m_src or m_src < 4 or m_src % 2 \
                or shape[3] != m_src // 2 + 1:
            raise InitialFieldError(f"{path}: velocity_hat has shape {shape}; expected {EXPECTED}")
        try:
            src_length = float(ds.attrs.get("length", length))
        except (TypeError, ValueError):
            raise InitialFieldError(f"{path}: velocity_hat's attribute 'length' is not a number") from None
        if not abs(src_length - length) <= 1e-12 * length:
            raise InitialFieldError(f"{path}: box length {src_length} differs from grid.length {length}")
        crc = ds.attrs.get("crc32")
        try:
            out, got = _map_modes(ds, n)
        except (OSError, RuntimeError) as exc:
            raise InitialFieldError(f"{path}: cannot read velocity_hat ({exc})") from None
    if crc is not None and got != int(crc):
        raise InitialFieldError(f"{path}: velocity_hat does not match its checksum (the file is corrupt)")
    return out


def _map_modes(ds, n):
    """Stream the source block by block: checksum, finiteness, and the modes kept."""
    m_src = ds.shape[1]
    src_idx = np.fft.fftfreq(m_src, 1.0 / m_src).astype(int)
    dst_idx = np.fft.fftfreq(n, 1.0 / n).astype(int)
    m = min(m_src, n) // 2  # keep |k_i| < m on both grids (drops both Nyquist planes)
    to_dst = np.full(m_src, -1)
    keep = np.nonzero(np.abs(src_idx) < m)[0]
    to_dst[keep] = [np.nonzero(dst_idx == src_idx[i])[0][0] for i in keep]
    out = np.zeros((3, n, n, n // 2 + 1), complex)
    crc = _head(ds.dtype, ds.shape)
    planes = max(1, BLOCK_BYTES // (m_src * ds.shape[3] * ds.dtype.itemsize))
    for c in range(3):
        for i0 in range(0, m_src, planes):
            block = np.ascontiguousarray(ds[c, i0:i0 + planes])
            crc = zlib.crc32(block.reshape(-1).view(np.uint8), crc)
            if not np.isfinite(block).all():
                raise InitialFieldError(f"{ds.file.filename}: velocity_hat holds NaN or infinite "
                                        f"values; expected {EXPECTED}")
            rows = np.arange(i0, i0 + block.shape[0])
            sel = to_dst[rows] >= 0
            if sel.any():
                sub = block[sel][:, keep, :m]
                out[c, to_dst[rows[sel]][:, None], to_dst[keep][None, :], :m] = sub
    return out, crc
