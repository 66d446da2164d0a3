"""The forcing interface and its registry.

A forcing scheme is a class registered under a config name with `@register("name")`. The run
loop calls, once per time step:

    begin_step(sim, dt)        fix the forcing for the step (random draws, coefficients)
    add_to_rhs(rhs, weight)    add weight * f_k to a right-hand side (every RK stage)
    end_step(sim, dt)          after the step: rescale modes, advance processes, record power

`linear_rate` is a growth rate A that the time scheme folds into its integrating factor
exp(-(nu k^2 - A) t) (exact for forcing of the form f = A u). `power` is the mean power injected
during the last step (per unit mass), so that dE/dt = P - eps can be checked.
`state()` / `load_state()` carry everything a checkpoint needs (RNG states included).
"""
from __future__ import annotations

import numpy as np

FORCINGS: dict[str, type] = {}


def register(name: str):
    def deco(cls):
        cls.kind = name
        FORCINGS[name] = cls
        return cls

    return deco


class Forcing:
    kind = "base"
    #: config keys this scheme accepts: name -> eddybox.solver.fields.Field (default, type,
    #: range, units, description); the config section `forcing` is built from them
    params: dict = {}
    #: extra per-sample series in fluid.h5 /series/: name -> (units, description); `series()`
    #: returns their values
    series_columns: dict = {}
    #: whether the forcing sets a fluid at rest moving (a forcing proportional to u, or one
    #: that rescales the existing modes, does not); checked before a run whose particle sets
    #: need the Kolmogorov time of the flow
    moves_fluid_at_rest = False

    @staticmethod
    def check_config(section) -> None:
        """Rules across this scheme's keys (raise ConfigError naming the key)."""

    def __init__(self, cfg, layout, seed: int):
        self.cfg = cfg
        self.layout = layout
        self.seed = seed
        self.linear_rate = 0.0
        self.power = 0.0

    def begin_step(self, sim, dt: float) -> None:
        pass

    def add_to_rhs(self, rhs: np.ndarray, weight: float) -> None:
        pass

    def end_step(self, sim, dt: float) -> None:
        pass

    def series(self) -> dict:
        """Values of `series_columns` at a sample."""
        return {}

    def derived(self) -> dict:
        """Entries for the `derived:` block of the run's config.yaml (rewritten when they
        change, e.g. when a calibration ends)."""
        return {}

    def drain_notes(self) -> list[str]:
        """Messages for the run log since the last call (e.g. a calibration has ended)."""
        notes = list(getattr(self, "notes", ()))
        if notes:
            self.notes = []
        return notes

    def target_dissipation(self):
        """The dissipation rate this forcing aims at in the stationary state, if it has one."""
        return None

    def state(self) -> dict:
        return {"power": np.float64(self.power), "linear_rate": np.float64(self.linear_rate)}

    def load_state(self, st: dict) -> None:
        self.power = float(st["power"])
        self.linear_rate = float(st["linear_rate"])

    def summary(self) -> str:
        return f"forcing {self.cfg.summary()}"


@register("none")
class NoForcing(Forcing):
    """Freely decaying turbulence: f = 0."""


def make_forcing(cfg, layout, seed: int) -> Forcing:
    """The forcing of config section `cfg` (its `kind` picks the scheme)."""
    return FORCINGS[cfg.kind](cfg, layout, seed)
