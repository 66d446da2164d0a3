"""Linear forcing in physical space (Lundgren 2003; Rosales & Meneveau 2005)."""
from __future__ import annotations

from eddybox.forcing.base import Forcing, register


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
        "coefficient": (None, "A in f = A u (instead of dissipation)"),
        "dissipation": (None, "target dissipation eps*; A = eps*/(2E) each step"),
    }

    def target_dissipation(self):
        return None if self.cfg.get("dissipation") is None else float(self.cfg["dissipation"])

    def begin_step(self, sim, dt):
        if self.cfg.get("coefficient") is not None:
            self.linear_rate = float(self.cfg["coefficient"])
        else:
            eps = 0.1 if self.cfg.get("dissipation") is None else float(self.cfg["dissipation"])
            e = sim.energy()
            self.linear_rate = eps / (2.0 * e) if e > 0 else 0.0
        self._p0 = 2.0 * self.linear_rate * sim.energy()

    def end_step(self, sim, dt):
        self.power = 0.5 * (self._p0 + 2.0 * self.linear_rate * sim.energy())
