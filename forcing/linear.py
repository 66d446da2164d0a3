"""Linear forcing in physical space (Lundgren 2003; Rosales & Meneveau 2005)."""
from __future__ import annotations

from eddybox.forcing.base import Forcing, register
from eddybox.solver.errors import ConfigError
from eddybox.solver.fields import Num


@register("linear")
class LinearForcing(Forcing):
    """Lundgren, T. S. (2003) "Linearly forced isotropic turbulence", Annual Research Briefs,
    Center for Turbulence Research, 461-473; studied in detail by Rosales, C. & Meneveau, C.
    (2005) Phys. Fluids 17, 095106.

        f = A u,  power P = 2 A E.

    A is either given (`coefficient`) or set at the start of every step from a target
    dissipation, A = eps* / (2 E) = eps* / (3 u'^2) (Rosales & Meneveau 2005), which holds the
    stationary dissipation at eps*. The term is folded exactly into the integrating factor
    exp(-(nu k^2 - A) t) of the time scheme, so it costs nothing per stage.
    """

    params = {
        "coefficient": Num(None, "A in f = A u (instead of dissipation)", "T^-1", lo=0.0,
                           lo_open=True, hi=1e6),
        "dissipation": Num(None, "target dissipation ε*; A = ε*/(2E) each step", "L^2 T^-3",
                           lo=0.0, lo_open=True),
    }

    @staticmethod
    def check_config(f):
        if (f.coefficient is None) == (f.dissipation is None):
            raise ConfigError("forcing: kind 'linear' needs exactly one of forcing.coefficient or "
                              "forcing.dissipation")

    def target_dissipation(self):
        return None if self.cfg.dissipation is None else float(self.cfg.dissipation)

    def begin_step(self, sim, dt):
        if self.cfg.coefficient is not None:
            self.linear_rate = float(self.cfg.coefficient)
        else:
            eps = float(self.cfg.dissipation)
            e = sim.energy()
            self.linear_rate = eps / (2.0 * e) if e > 0 else 0.0
        self._p0 = 2.0 * self.linear_rate * sim.energy()

    def end_step(self, sim, dt):
        self.power = 0.5 * (self._p0 + 2.0 * self.linear_rate * sim.energy())
