"""Deterministic re-injection of energy into the lowest modes."""
from __future__ import annotations

import numpy as np

from eddybox.forcing.band import ForcedBand
from eddybox.forcing.base import Forcing, register
from eddybox.solver.errors import ConfigError
from eddybox.solver.fields import Choice, Num


@register("reinject")
class ReinjectionForcing(Forcing):
    """Deterministic forcing by rescaling the amplitudes of the modes 0 < |k| <= band after
    each step, keeping their phases and shapes (common practice in DNS of stationary isotropic
    turbulence; see Pope 2000, sec. 9.1, and the comparison of Eswaran & Pope 1988, Comput.
    Fluids 16, for its deterministic character).

    With E the total energy after the step and E_b the energy of the band,
      mode `energy`: u_k <- s u_k,  s^2 = (E_b + E_0 - E) / E_b, so E stays at E_0 (the energy
                    at the start of the run, or `energy` when given);
      mode `power`:  s^2 = (E_b + eps* h) / E_b, injecting eps* per unit time.
    The power recorded is the energy added divided by the step h.
    """

    params = {
        "band": Num(2.0, "forced modes 0 < |k| <= band", "2π/L", lo=0.0, lo_open=True),
        "mode": Choice("energy", ("energy", "power"), "energy: hold the total energy; power: "
                       "inject `dissipation` per unit time"),
        "dissipation": Num(None, "injected power ε* in mode `power`", "L^2 T^-3", lo=0.0,
                           lo_open=True),
        "energy": Num(None, "energy held in mode `energy` (default: the initial energy)",
                      "L^2 T^-2", lo=0.0, lo_open=True),
    }

    @staticmethod
    def check_config(f):
        if f.mode == "power" and f.dissipation is None:
            raise ConfigError("forcing.dissipation: required with forcing.mode: power")

    def __init__(self, cfg, layout, seed):
        super().__init__(cfg, layout, seed)
        self.band = ForcedBand(layout, float(cfg.band))
        self.mode = cfg.mode
        self.eps = None if cfg.dissipation is None else float(cfg.dissipation)
        self.e_target = None if cfg.energy is None else float(cfg.energy)

    def target_dissipation(self):
        return self.eps if self.mode == "power" else None

    def begin_step(self, sim, dt):
        if self.e_target is None:
            self.e_target = sim.energy()

    def end_step(self, sim, dt):
        e_band = self.layout.sum(self.band.band_energy(sim.uh))
        if e_band <= 0.0:
            self.power = 0.0
            return
        if self.mode == "energy":
            added = self.e_target - sim.energy()
        else:
            added = self.eps * dt
        s2 = max(0.0, (e_band + added) / e_band)
        b = self.band
        sim.uh[:, b.li, b.lj, b.ll] *= np.sqrt(s2)
        self.power = (s2 - 1.0) * e_band / dt

    def state(self):
        st = super().state()
        st["e_target"] = np.float64(np.nan if self.e_target is None else self.e_target)
        return st

    def load_state(self, st):
        super().load_state(st)
        e = float(st["e_target"])
        self.e_target = None if np.isnan(e) else e
