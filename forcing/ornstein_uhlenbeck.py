"""Stochastic large-scale forcing by Ornstein-Uhlenbeck processes (Eswaran & Pope 1988)."""
from __future__ import annotations

import numpy as np

from eddybox.forcing.band import ForcedBand
from eddybox.forcing.base import Forcing, register
from eddybox.solver.errors import ConfigError
from eddybox.solver.fields import Num
from eddybox.solver.run.checkpoint import restore_rng_state, rng_state_array


@register("ou")
class OrnsteinUhlenbeckForcing(Forcing):
    """Eswaran, V. & Pope, S. B. (1988) "An examination of forcing in direct numerical
    simulations of turbulence", Comput. Fluids 16(3), 257-278.

    Every forced mode 0 < |k| <= band (in units of 2 pi / L) carries a complex vector b_k whose
    real and imaginary parts are independent Ornstein-Uhlenbeck processes

        db = -b dt / T_F + sqrt(2 sigma^2 / T_F) dW,

    advanced with the exact update over a step h (no time-step error in the statistics):

        b(t+h) = b(t) e^{-h/T_F} + sigma sqrt(1 - e^{-2h/T_F}) xi,   xi ~ N(0, 1).

    The force is the solenoidal projection f_k = (I - k k / k^2) b_k, held fixed within a step.
    Its variance follows from a target dissipation by the relation of Eswaran & Pope (1988),

        eps* = 4 N_F sigma^2 T_F,

    N_F the number of forced wavenumbers (both signs); it is exact in the limit T_F small
    against the flow's response time and an estimate otherwise, so the measured dissipation
    (series `dissipation`) is what to quote. Random numbers are drawn for the whole band from
    one generator seeded by `seed`, so every parallel layout sees the same forcing.
    """

    params = {
        "band": Num(2.0 * np.sqrt(2.0), "forced modes 0 < |k| <= band", "2π/L", lo=0.0, lo_open=True),
        "timescale": Num(1.0, "OU time scale T_F", "T", lo=0.0, lo_open=True),
        "dissipation": Num(None, "target dissipation ε*; sets σ² = ε*/(4 N_F T_F) (default 0.1)",
                           "L^2 T^-3", lo=0.0, lo_open=True),
        "variance": Num(None, "σ² of each real and imaginary part (instead of dissipation)",
                        "L^2 T^-4", lo=0.0, lo_open=True),
    }

    moves_fluid_at_rest = True

    @staticmethod
    def check_config(f):
        if f.variance is not None and f.dissipation is not None:
            raise ConfigError("forcing: give either forcing.variance or forcing.dissipation, not both")

    def __init__(self, cfg, layout, seed):
        super().__init__(cfg, layout, seed)
        self.band = ForcedBand(layout, float(cfg.band))
        self.T = float(cfg.timescale)
        if cfg.variance is not None:
            self.sigma2 = float(cfg.variance)
        else:
            eps = 0.1 if cfg.dissipation is None else float(cfg.dissipation)
            self.sigma2 = eps / (4.0 * self.band.n_full * self.T)
        self.rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence([seed, 0x0F0C])))
        n = self.band.n_independent
        self._xi = np.empty((n, 3, 2))
        self.b = np.empty((n, 3), complex)
        # start from the stationary distribution, so there is no forcing transient
        self.rng.standard_normal(out=self._xi)
        self.b[...] = np.sqrt(self.sigma2) * (self._xi[..., 0] + 1j * self._xi[..., 1])
        k = self.band.k_ind
        self._proj = np.eye(3)[None] - k[:, :, None] * k[:, None, :] / np.sum(k * k, 1)[:, None, None]
        self._f_local = np.zeros((len(self.band.local), 3), complex)
        self._refresh()

    def _refresh(self):
        f_ind = np.einsum("nij,nj->ni", self._proj, self.b)
        self._f_local[...] = self.band.expand(f_ind)

    def target_dissipation(self):
        return 4.0 * self.band.n_full * self.sigma2 * self.T

    def _work_rate(self, uh):
        v = self.band.gather(uh)
        w = self.band.weight_local[:, None]
        return float(np.sum(w * (np.conj(self._f_local) * v).real))

    def begin_step(self, sim, dt):
        self._p0 = self.layout.sum(self._work_rate(sim.uh))

    def add_to_rhs(self, rhs, weight):
        b = self.band
        for c in range(3):
            rhs[c, b.li, b.lj, b.ll] += weight * self._f_local[:, c]

    def end_step(self, sim, dt):
        # trapezoidal mean of f_n . u over the step, f_n held fixed: the work actually done
        p1 = self.layout.sum(self._work_rate(sim.uh))
        self.power = 0.5 * (self._p0 + p1)
        a = np.exp(-dt / self.T)
        self.rng.standard_normal(out=self._xi)
        self.b *= a
        self.b += np.sqrt(self.sigma2 * (1.0 - a * a)) * (self._xi[..., 0] + 1j * self._xi[..., 1])
        self._refresh()

    def state(self):
        st = super().state()
        st["b"] = self.b.copy()
        st["rng"] = rng_state_array(self.rng)
        return st

    def load_state(self, st):
        super().load_state(st)
        self.b[...] = st["b"]
        restore_rng_state(self.rng, st["rng"])
        self._refresh()
