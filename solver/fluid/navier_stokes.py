"""The nonlinear term of the incompressible Navier-Stokes equations in Fourier space.

    du_k/dt = P(k) [u x omega]_k - nu k^2 u_k + f_k,    P(k) = I - k k / k^2

(rotational form; the pressure and the kinetic-energy gradient are removed by the projection
P; see Canuto, Hussaini, Quarteroni & Zang 1988, Spectral Methods in Fluid Dynamics, ch. 7).
The product is formed pseudo-spectrally. Evaluated on a grid shifted by delta, the computed
coefficient at k is (Patterson & Orszag 1971, Phys. Fluids 14, 2538)

    sum_{p + q = k} u_p x w_q  +  sum_{m != 0} exp(i N m . delta) sum_{p + q = k + N m} u_p x w_q,

the second sum being the aliases: m in {-1, 0, 1}^3 with one nonzero component (single
aliases), two (double) or three (triple). The dealiasing methods, in `DEALIASING`:

two-thirds   keep |k_i| < N/3 (Orszag 1971, J. Atmos. Sci. 28): no alias reaches a kept mode.
phase-shift  keep |k| < sqrt(2) N/3 and average the product over the grid and the grid shifted
             by half a cell in every direction (Patterson & Orszag 1971): exp(i N m . delta) =
             (-1)^(m_x + m_y + m_z) cancels single and triple aliases; for double aliases
             |p|, |q|, |k| < sqrt(2) N/3 is too short to reach (the truncation radius is chosen
             for that). Exact; two products per stage.
stage-shift  the same truncation, one product per stage: the Runge-Kutta scheme evaluates
             stage i on the grid shifted by (beta + sigma_i) h in every direction, beta drawn
             afresh every step (Rogallo 1981, NASA TM-81315: shifts that differ between the
             stages of one step cancel the aliasing of the step to leading order, random shifts
             decorrelate the remainder from step to step). Double and triple aliases are
             removed by the truncation as above (a triple alias needs |k| >= N/sqrt(3)).
             Single aliases cancel at first order in the step h: what remains of them in a
             step is O(h^2) (RK2 with shifts (0, 1/2); RK4 with (0, 1/3, 2/3, 0), where the
             O(h^2) part linear in the aliased amplitudes cancels too and only the part
             quadratic in them remains), i.e. O(h) over a fixed time, against O(1) per step
             without shifts. Derivation and the exact sums in `stage_shift_residual`; the
             measured order in tests/test_stage_shift.py.

All work arrays are allocated once here; `evaluate` allocates nothing. With `pruned` (the
default) the transforms of the product skip the wavenumber lines that are zero outside the
kept band (the layout's `band_limited` transforms); the results are the same to round-off.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from eddybox.solver.errors import ConfigError
from eddybox.solver.fluid import fft
from eddybox.solver.fluid import spectral_ops as ops


@dataclass(frozen=True)
class Dealiasing:
    """A dealiasing method: which modes survive and what a Runge-Kutta stage costs."""

    name: str
    #: spherical truncation |k| < sqrt(2) N/3 (else the cube |k_i| < N/3 of the 2/3 rule)
    sphere: bool
    #: pseudo-spectral products (9 real 3-D transforms each) per Runge-Kutta stage
    evaluations: int
    #: the grid shift changes from stage to stage (needs a scheme with `stage_shifts`)
    stage_shifted: bool
    #: spectral arrays of 3 components allocated besides the scheme's (the phase-shift copy)
    extra_arrays: int
    summary: str

    def kmax_index(self, n: int) -> float:
        """Largest kept |k| in units of 2 pi / L (the k_max of k_max eta)."""
        return math.sqrt(2.0) * n / 3.0 if self.sphere else n / 3.0

    def axis_index(self, n: int) -> int:
        """Largest kept |k_i| along an axis: the kept modes lie in the box |k_i| <= this."""
        if self.sphere:
            k = int(math.isqrt(2 * n * n // 9))
            while 9 * k * k >= 2 * n * n:  # strict: |k|^2 < 2 N^2 / 9
                k -= 1
            return k
        return (n - 1) // 3

    def kept_modes(self, n: int) -> int:
        """Number of kept wavenumbers in the full (both signs) spectrum."""
        k = np.arange(-self.axis_index(n), self.axis_index(n) + 1, dtype=np.int64)
        if not self.sphere:
            return len(k) ** 3
        # per (k_x, k_y) line: the k_z with 9 k_z^2 < M = 2 N^2 - 9 (k_x^2 + k_y^2), i.e.
        # |k_z| <= isqrt((M - 1) // 9), counted in integers (a float root, then corrected)
        m = 2 * n * n - 9 * (k[:, None] ** 2 + k[None, :] ** 2)
        q = np.where(m > 0, (m - 1) // 9, -1)
        top = np.floor(np.sqrt(np.maximum(q, 0))).astype(np.int64)
        top -= top * top > q
        top += (top + 1) * (top + 1) <= q
        return int(np.sum(np.where(q >= 0, 2 * top + 1, 0)))

    def cfl_factor(self) -> float:
        """Largest kept |k_i| times dx / (2 pi / 3): 1 for the 2/3 rule, sqrt(2) on the sphere,
        so the advective CFL bound of a scheme is divided by it."""
        return math.sqrt(2.0) if self.sphere else 1.0


DEALIASING = {d.name: d for d in (
    Dealiasing("two-thirds", False, 1, False, 0, "2/3 rule, |k_i| < N/3"),
    Dealiasing("phase-shift", True, 2, False, 3,
               "two shifted products per stage, |k| < sqrt(2) N/3"),
    Dealiasing("stage-shift", True, 1, True, 0,
               "one product per stage on stage-dependent random shifts, |k| < sqrt(2) N/3"),
)}


def stage_shift_residual(b, c, a, fractions):
    """The single-alias terms that survive one Runge-Kutta step with stage shifts.

    A single alias (m = +-e_d) of stage i carries the phase phi_i^(+-1), phi_i =
    exp(2 pi i sigma_i), times the common exp(+-2 pi i beta_d) of the step; its error in the
    step is h sum_i b_i phi_i a_m(U_i), with a_m bilinear in the stage value U_i = u + h c_i
    du/dt + h sum_j a_ij (alias of stage j) + .... Expanding in h (derived here, extending
    Rogallo 1981's first-order argument), the sums that multiply the aliasing error are

        order h    (0) sum_i b_i phi_i                     the alias of u itself
        order h^2  (1) sum_i b_i c_i phi_i                 the alias of the change of u
                   (2) sum_j (sum_i b_i a_ij) phi_j        an alias fed into later stages
                   (3) sum_ij b_i a_ij phi_i phi_j         the alias of an earlier alias
                   (4) sum_ij b_i a_ij phi_i conj(phi_j)   ... of the opposite sign

    (with the integrating factor the weights become b_i exp(-nu k^2 h (1 - c_i)), whose first
    correction is (0) - (1)). Returns their moduli for the Butcher tableau (b, c, a) and the
    shifts sigma_i in cells. (0) = 0 makes the step's aliasing error O(h^2); (1) and (2) are
    linear in the aliased amplitudes, (3) and (4) quadratic (aliases of modes near the
    truncation, which carry little energy in a resolved run). (4) has no beta in its phase,
    so it does not average out over steps; no choice of phases zeros (0)-(4) for the
    classical RK4 (phi_1 = phi_4 and {phi_2, phi_3} = {w phi_1, w^2 phi_1}, w = e^(2 pi i/3),
    are forced by (0)-(2), and then (4) = 1/2)."""
    b, c, a = np.asarray(b, float), np.asarray(c, float), np.asarray(a, float)
    phi = np.exp(2j * np.pi * np.asarray(fractions, float))
    ba = b[:, None] * a
    return (abs(np.sum(b * phi)), abs(np.sum(b * c * phi)), abs(np.sum((b @ a) * phi)),
            abs(phi @ ba @ phi), abs(phi @ ba @ phi.conj()))


class NonlinearTerm:
    def __init__(self, layout, dealias: str = "two-thirds", seed: int = 0, pruned: bool = True):
        self.layout = layout
        self.dealias = dealias
        self.method = DEALIASING[dealias]
        self.mode = 1 if self.method.sphere else 0
        self.seed = int(seed)
        n = layout.n
        self.kc2 = 2.0 * (n / 3.0) ** 2 if self.mode == 1 else 0.0
        self.u = fft.empty_real((3,) + layout.phys_shape)
        self.w = fft.empty_real((3,) + layout.phys_shape)
        self.rowmax = np.zeros(layout.phys_shape[0])
        lx = layout
        self.ones = (np.ones(lx.spec_shape[0], complex), np.ones(lx.spec_shape[1], complex),
                     np.ones(lx.spec_shape[2], complex))
        self._k = (lx.kx, lx.ky, lx.kz)
        self._h = layout.length / n
        if self.method.evaluations == 2:
            self.shift = tuple(np.exp(1j * k * 0.5 * self._h) for k in self._k)
            self._copy = np.empty((3,) + layout.spec_shape, complex)
        self._stages = None
        #: the random part beta of this step's shift (cells, per direction), for stage-shift
        self.beta = np.zeros(3)
        # transforms of band-limited fields: only the box |k_i| <= axis_index is nonzero
        self.pruned = bool(pruned) and hasattr(layout, "band_limited")
        if self.pruned:
            bt = layout.band_limited(self.method.axis_index(n))
            self._fwd, self._inv = bt.forward, bt.inverse
        else:
            self._fwd, self._inv = layout.forward, layout.inverse
        #: max over the grid of |u|+|v|+|w| at the last evaluation
        self.umax = 0.0

    def summary(self) -> str:
        return f"dealias {self.dealias} ({self.method.summary})" + \
            (", pruned transforms" if self.pruned else "")

    def bytes_moved_per_transform(self, direction: str = "forward") -> int:
        """Bytes this rank sends in one 3-D transform of the product (truncated transposes
        when pruned; 0 on one process)."""
        owner = getattr(self._fwd, "__self__", self.layout)
        moved = getattr(owner, "bytes_moved_per_transform", None)
        return moved(direction) if moved else 0

    def kmax(self) -> float:
        """Largest wavenumber kept after dealiasing (for k_max eta)."""
        return self.layout.k0 * self.method.kmax_index(self.layout.n)

    def keep_mask_apply(self, uh):
        lx = self.layout
        ops.apply_mask(uh, lx.ikx, lx.iky, lx.ikz, lx.n, self.mode, self.kc2)

    # --- stage shifts ------------------------------------------------------------------------
    def set_stage_shifts(self, fractions, scheme_name="?"):
        """Called by the time scheme: the shift of stage i is (beta + fractions[i]) cells."""
        if not self.method.stage_shifted:
            return
        if not fractions:
            raise ConfigError(f"fluid.dealias: {self.dealias!r} needs a time.scheme whose stage "
                              f"weights cancel aliasing; {scheme_name!r} has none")
        self._stages = [tuple(np.ones(len(k), complex) for k in self._k) for _ in fractions]
        self._fractions = tuple(float(f) for f in fractions)

    def begin_step(self, step: int) -> None:
        """Draw this step's random shift beta from (seed, step): the same on every rank and
        layout, and again after a restart, with no state to checkpoint."""
        if self._stages is None:
            return
        gen = np.random.Generator(np.random.PCG64(np.random.SeedSequence([self.seed, 0x5A1F7,
                                                                          int(step)])))
        self.beta[...] = gen.random(3)
        for sigma, factors in zip(self._fractions, self._stages):
            for d in range(3):
                np.exp(1j * self._k[d] * ((self.beta[d] + sigma) * self._h), out=factors[d])

    # --- evaluation -------------------------------------------------------------------------
    def evaluate(self, src: np.ndarray, dst: np.ndarray, a: float, b: float,
                 stage: int = 0) -> float:
        """dst <- a dst + b P[u x omega](src); dst must be solenoidal and dealiased when
        a != 0. src may be dst. `stage` is the Runge-Kutta stage (it picks the grid shift
        with stage-shift dealiasing). Returns max |u|+|v|+|w| of src in physical space."""
        if self.method.evaluations == 1:
            shift = self._stages[stage] if self._stages is not None else self.ones
            if src is dst and a == 0.0:
                self._in_place(dst, b, shift)
            else:
                self._once(src, dst, a, b, shift)
            return self.umax
        if src is dst:
            np.copyto(self._copy, src)
            src = self._copy
        self._once(src, dst, a, 0.5 * b, self.ones)
        umax = self.umax
        self._once(src, dst, 1.0, 0.5 * b, self.shift)
        self.umax = umax
        return umax

    def _in_place(self, uh, b, shift):
        """uh <- b P[u x omega](uh) with the fewest passes: the vorticity transforms read uh,
        the velocity transforms then consume uh itself (c2r destroys its input, and uh is
        about to be overwritten), and the forward transforms write straight into uh."""
        lx = self.layout
        for c in range(3):
            ops.curl_component(uh, lx.kx, lx.ky, lx.kz, c, lx.scratch, *shift)
            self._inv(lx.scratch, self.w[c])
        for c in range(3):
            if shift is not self.ones:
                ops.copy_shifted(uh[c], uh[c], *shift)
            self._inv(uh[c], self.u[c])
        ops.cross_in_place(self.u, self.w, self.rowmax)
        self.umax = lx.max(float(self.rowmax.max()))
        for c in range(3):
            self._fwd(self.w[c], uh[c])
        ops.scale_mask_project(uh, lx.kx, lx.ky, lx.kz, lx.ikx, lx.iky, lx.ikz, lx.n, self.mode,
                               self.kc2, b * lx.norm, *shift)

    def _once(self, src, dst, a, b, shift):
        lx = self.layout
        scratch = lx.scratch
        sx, sy, sz = shift
        for c in range(3):
            if shift is self.ones:
                np.copyto(scratch, src[c])
            else:
                ops.copy_shifted(src[c], scratch, sx, sy, sz)
            self._inv(scratch, self.u[c])
        for c in range(3):
            ops.curl_component(src, lx.kx, lx.ky, lx.kz, c, scratch, sx, sy, sz)
            self._inv(scratch, self.w[c])
        ops.cross_in_place(self.u, self.w, self.rowmax)
        self.umax = lx.max(float(self.rowmax.max()))
        for c in range(3):
            self._fwd(self.w[c], scratch)
            ops.accumulate_masked(dst[c], scratch, a, b * lx.norm, lx.ikx, lx.iky, lx.ikz,
                                  lx.n, self.mode, self.kc2, sx, sy, sz)
        ops.project_solenoidal(dst, lx.kx, lx.ky, lx.kz)

    def to_physical(self, uh: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """Velocity in physical space (into the work array `u` unless `out` is given); uh must
        be dealiased (zero outside the kept modes), as the state always is."""
        out = self.u if out is None else out
        for c in range(3):
            np.copyto(self.layout.scratch, uh[c])
            self._inv(self.layout.scratch, out[c])
        return out
