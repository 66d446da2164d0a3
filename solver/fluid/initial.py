"""Initial velocity fields, in a registry. Each builder fills the local Fourier block `uh`
(normalised coefficients, shape (3,) + layout.spec_shape) and is layout independent: the same
config gives the same global field on any number of ranks."""
from __future__ import annotations

import numpy as np

from eddybox.solver.fields import Num, Text
from eddybox.solver.fluid import spectral_ops as ops
from eddybox.solver.fluid.field_file import read_velocity_hat

INITIAL_FIELDS: dict[str, callable] = {}
#: config keys each kind accepts: name -> eddybox.solver.fields.Field
INITIAL_PARAMS: dict[str, dict] = {}
#: bytes of the short-lived arrays each builder allocates besides `uh` and the solver's own
#: arrays (a start-up peak): name -> f(n, spec_points, phys_points) with the local block sizes
#: (tests/test_estimate.py checks each against tracemalloc)
INITIAL_TEMPORARY: dict[str, callable] = {}


def register(name: str, temporary=lambda n, spec, phys: 0, **params):
    def deco(fn):
        INITIAL_FIELDS[name] = fn
        INITIAL_PARAMS[name] = params
        INITIAL_TEMPORARY[name] = temporary
        return fn

    return deco


def _spectrum_temporary(n, spec, phys):
    """The peak of `spectrum`: each k_x plane drawn whole (3 x N x (N/2+1) pairs of normals, their
    complex sum: 144 N (N/2+1) bytes), the Hermitian k_z = 0 plane (3 x N x N: 144 N^2 bytes
    while it is symmetrised, 96 N^2 kept with the last plane until the end), and the amplitude
    |k| and its three temporaries with a mask (33 bytes per local Fourier point)."""
    plane = 48 * n * (n // 2 + 1)
    return max(3 * plane, 144 * n * n + plane, 33 * spec + 96 * n * n + plane)


def _coords(layout):
    h = layout.length / layout.n
    return [(layout.phys_start[a] + np.arange(layout.phys_shape[a])) * h for a in range(3)]


def _from_physical(layout, nonlinear, comps, uh):
    buf = nonlinear.u
    for c in range(3):
        buf[c][...] = comps[c]
        layout.forward(buf[c], uh[c])
    uh *= layout.norm


@register("rest")
def rest(cfg, layout, nonlinear, seed, uh):
    """u = 0."""
    uh[...] = 0.0


@register("taylor-green", temporary=lambda n, spec, phys: 16 * phys + 8 * n * n,  # two components
          amplitude=Num(1.0, "amplitude U_0", "L T^-1", lo=-1e6, hi=1e6))
def taylor_green(cfg, layout, nonlinear, seed, uh):
    """Taylor & Green (1937), Proc. R. Soc. A 158: u = U0 (sin x cos y cos z,
    -cos x sin y cos z, 0), with x scaled by 2 pi / L. All modes sit at |k|^2 = 3 k0^2."""
    u0 = float(cfg.amplitude)
    x, y, z = _coords(layout)
    k = layout.k0
    X, Y, Z = np.meshgrid(k * x, k * y, k * z, indexing="ij", sparse=True)
    comps = [u0 * np.sin(X) * np.cos(Y) * np.cos(Z), -u0 * np.cos(X) * np.sin(Y) * np.cos(Z), 0.0]
    _from_physical(layout, nonlinear, comps, uh)


@register("abc", temporary=lambda n, spec, phys: 24 * n * n,  # three (1, N, N) sums, broadcast
          a=Num(1.0, "A", "L T^-1", lo=-1e6, hi=1e6), b=Num(1.0, "B", "L T^-1", lo=-1e6, hi=1e6),
          c=Num(1.0, "C", "L T^-1", lo=-1e6, hi=1e6))
def abc(cfg, layout, nonlinear, seed, uh):
    """Arnold-Beltrami-Childress flow (Dombre et al. 1986, J. Fluid Mech. 167):
    u = (A sin kz + C cos ky, B sin kx + A cos kz, C sin ky + B cos kx), k = 2 pi / L.
    It is a Beltrami field (curl u = k u), so u x omega = 0 and it decays as exp(-nu k^2 t)."""
    a, b, c = float(cfg.a), float(cfg.b), float(cfg.c)
    x, y, z = _coords(layout)
    k = layout.k0
    X, Y, Z = np.meshgrid(k * x, k * y, k * z, indexing="ij", sparse=True)
    comps = [a * np.sin(Z) + c * np.cos(Y), b * np.sin(X) + a * np.cos(Z),
             c * np.sin(Y) + b * np.cos(X)]
    _from_physical(layout, nonlinear, [np.broadcast_to(v, layout.phys_shape) for v in comps], uh)


@register("spectrum", temporary=_spectrum_temporary,
          energy=Num(0.5, "total kinetic energy E_0", "L^2 T^-2", lo=0.0, lo_open=True),
          peak=Num(3.0, "peak wavenumber k_p", "2π/L", lo=0.0, lo_open=True, hi=1e6))
def spectrum(cfg, layout, nonlinear, seed, uh):
    """Random solenoidal field with the model spectrum E(k) ~ k^4 exp(-2 (k/k_p)^2)
    (a common initial spectrum for decaying and forced DNS; e.g. Rogallo 1981), scaled to the
    given energy. Gaussian white noise per mode with amplitude sqrt(E(k) / (4 pi k^2)),
    projected to be solenoidal; Hermitian symmetry on the kz = 0 plane is enforced from a
    plane drawn identically on every rank; other planes are drawn per kx plane from
    generators keyed by (seed, plane) so any block decomposition sees the same field."""
    e0 = float(cfg.energy)
    kp = float(cfg.peak)
    n, nh = layout.n, layout.n // 2 + 1
    sx, sy, sz = layout.spec_start
    nx, ny, nz = layout.spec_shape
    for li in range(nx):
        gi = sx + li
        rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence([seed, 0x1A17, gi])))
        plane = rng.standard_normal((3, n, nh, 2))
        uh[:, li] = (plane[..., 0] + 1j * plane[..., 1])[:, sy:sy + ny, sz:sz + nz]
    if sz == 0:
        rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence([seed, 0x1A18])))
        p0 = rng.standard_normal((3, n, n, 2))
        p0 = p0[..., 0] + 1j * p0[..., 1]
        idx = np.fft.fftfreq(n, 1.0 / n).astype(int)
        mi = np.mod(-idx, n)
        # Hermitian plane: average the value at k with the conjugate at -k (keeps unit variance
        # per independent mode up to a factor fixed by the final energy scaling)
        herm = (p0 + np.conj(p0[:, mi][:, :, mi])) / np.sqrt(2.0)
        herm[:, 0, 0] = herm[:, 0, 0].real
        uh[:, :, :, 0] = herm[:, sx:sx + nx, sy:sy + ny]
    kk = np.sqrt(layout.kx[:, None, None] ** 2 + layout.ky[None, :, None] ** 2
                 + layout.kz[None, None, :] ** 2) / layout.k0
    with np.errstate(divide="ignore", invalid="ignore"):
        amp = np.where(kk > 0, np.sqrt(kk**4 * np.exp(-2.0 * (kk / kp) ** 2) / (4 * np.pi * kk**2)), 0.0)
    uh *= amp
    ops.project_solenoidal(uh, layout.kx, layout.ky, layout.kz)
    nonlinear.keep_mask_apply(uh)
    e = layout.sum(energy_local(uh, layout))
    if e > 0:
        uh *= np.sqrt(e0 / e)


# every rank reads the file's global field and maps it to N: two global fields at once
@register("file", temporary=lambda n, spec, phys: 2 * 48 * n * n * (n // 2 + 1),
          path=Text(None, "field snapshot or checkpoint written by eddybox", none_ok=False))
def from_file(cfg, layout, nonlinear, seed, uh):
    """Velocity from an eddybox field snapshot or checkpoint (dataset `velocity_hat`, global
    half-complex coefficients). A different N is handled by spectral truncation (coarser
    target) or zero padding (finer target); the box length must match. The file is checked
    (shape, type, finite values, checksum) by `field_file.read_velocity_hat`."""
    glob = read_velocity_hat(cfg.path, layout.n, layout.length)
    layout.scatter_spectral(glob, uh)
    nonlinear.keep_mask_apply(uh)


def energy_local(uh, layout) -> float:
    """1/2 sum |u_k|^2 over this rank's block with the Hermitian weights."""
    return float(ops.energy_sum(uh, layout.wz))


def build_initial(cfg, layout, nonlinear, seed: int, uh):
    """Fill uh with the initial field of config section `cfg` (its `kind` picks the builder)."""
    INITIAL_FIELDS[cfg.kind](cfg, layout, nonlinear, seed, uh)
    return uh
