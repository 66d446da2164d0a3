"""Real-to-complex FFT plans on local blocks: pyFFTW when available, numpy.fft otherwise.

Transforms here are *unnormalised* (forward = sum u e^{-ikx}); callers fold the 1/N^3 factor
into the kernel that consumes the result, which saves a pass over the array.

FFTW wisdom is cached in the user cache directory so that FFTW_MEASURE planning is paid once
per machine and shape.
"""
from __future__ import annotations

import os
from pathlib import Path

import numpy as np

try:  # pyFFTW is a hard dependency, but the numpy fallback keeps the code usable without it
    import pyfftw

    HAVE_PYFFTW = True
except ImportError:  # pragma: no cover - exercised only on machines without pyFFTW
    pyfftw = None
    HAVE_PYFFTW = False


def available_cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - non-Linux
        return os.cpu_count() or 1


def thread_count(ranks_on_node: int = 1) -> int:
    """Threads per process: EDDYBOX_THREADS if set, else the cores shared among the ranks."""
    env = os.environ.get("EDDYBOX_THREADS")
    if env:
        try:
            return max(1, int(env))
        except ValueError:
            pass
    return max(1, available_cores() // max(1, ranks_on_node))


def configure_threads(n: int) -> int:
    """Use n threads in the numba kernels (bounded by what numba was started with)."""
    import numba

    n = max(1, min(n, numba.config.NUMBA_NUM_THREADS))
    numba.set_num_threads(n)
    return n


def cache_dir() -> Path:
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "eddybox"


_WISDOM_FILE = "fftw_wisdom.bin"
_wisdom_loaded = False


def _load_wisdom() -> None:
    global _wisdom_loaded
    if _wisdom_loaded or not HAVE_PYFFTW:
        return
    _wisdom_loaded = True
    path = cache_dir() / _WISDOM_FILE
    try:
        blob = path.read_bytes()
        parts = blob.split(b"\0\0EDDYBOX\0\0")
        if len(parts) == 3:
            pyfftw.import_wisdom(tuple(parts))
    except (OSError, ValueError):
        pass  # wisdom is only a speed-up; a missing or stale file is harmless


_wisdom_saved = None


def save_wisdom() -> None:
    """Write the wisdom file when planning has added to it (each plan calls this)."""
    global _wisdom_saved
    if not HAVE_PYFFTW:
        return
    blob = b"\0\0EDDYBOX\0\0".join(pyfftw.export_wisdom())
    if blob == _wisdom_saved:
        return
    try:
        path = cache_dir()
        path.mkdir(parents=True, exist_ok=True)
        tmp = path / (_WISDOM_FILE + f".{os.getpid()}.tmp")
        tmp.write_bytes(blob)
        os.replace(tmp, path / _WISDOM_FILE)
        _wisdom_saved = blob
    except OSError:
        pass


def empty_real(shape) -> np.ndarray:
    if HAVE_PYFFTW:
        return pyfftw.empty_aligned(shape, dtype=np.float64)
    return np.empty(shape, dtype=np.float64)


def empty_complex(shape) -> np.ndarray:
    if HAVE_PYFFTW:
        return pyfftw.empty_aligned(shape, dtype=np.complex128)
    return np.empty(shape, dtype=np.complex128)


def fftw_effort() -> str:
    return os.environ.get("EDDYBOX_FFTW_EFFORT", "FFTW_MEASURE")


class Plan:
    """One transform between two fixed-shape arrays, re-targetable to other arrays of the same
    shape and alignment (pyFFTW `update_arrays`), or a numpy.fft equivalent.

    kind: 'r2c' (real -> half complex along the last of `axes`), 'c2r', 'c2c_f', 'c2c_b'.
    """

    def __init__(self, kind: str, a_in: np.ndarray, a_out: np.ndarray, axes, threads=None,
                 backend: str = "auto"):
        self.kind = kind
        self.axes = tuple(axes)
        self.a_in = a_in
        self.a_out = a_out
        self.use_fftw = HAVE_PYFFTW and backend in ("auto", "pyfftw")
        if self.use_fftw:
            _load_wisdom()
            direction = "FFTW_BACKWARD" if kind in ("c2r", "c2c_b") else "FFTW_FORWARD"
            # c2r destroys its input; callers always hand it a scratch array
            flags = (fftw_effort(), "FFTW_DESTROY_INPUT")
            self._fftw = pyfftw.FFTW(a_in, a_out, axes=self.axes, direction=direction,
                                     flags=flags, threads=threads or thread_count())
            save_wisdom()
        self._real_n = [a_out.shape[ax] for ax in self.axes] if kind == "c2r" else None

    def __call__(self, a_in: np.ndarray | None = None, a_out: np.ndarray | None = None):
        a_in = self.a_in if a_in is None else a_in
        a_out = self.a_out if a_out is None else a_out
        if self.use_fftw:
            if a_in is not self.a_in or a_out is not self.a_out:
                self._fftw.update_arrays(a_in, a_out)
                self.a_in, self.a_out = a_in, a_out
            self._fftw.execute()
            return a_out
        # numpy fallback: unnormalised transforms to match FFTW
        if self.kind == "r2c":
            a_out[...] = np.fft.rfftn(a_in, axes=self.axes)
        elif self.kind == "c2r":
            size = float(np.prod(self._real_n))
            a_out[...] = np.fft.irfftn(a_in, s=self._real_n, axes=self.axes) * size
        elif self.kind == "c2c_f":
            a_out[...] = np.fft.fftn(a_in, axes=self.axes)
        else:
            size = float(np.prod([a_in.shape[ax] for ax in self.axes]))
            a_out[...] = np.fft.ifftn(a_in, axes=self.axes) * size
        return a_out
