"""Detected ("ghost") collisions in the run loop, streamed to collisions.h5 beside the kinematic
kernel at the same radius.

In every step, after the particles have moved and before they migrate between ranks, the
contacts of each group (every set with itself and, with ``cross``, every two sets) are counted
by `particles.migration.distributed_ghost_collisions` (the kernel `particles.pairs
.ghost_collisions`: particles on straight lines over the step, pairs crossing R from above; see
its docstring for the formulation). Each sample of ``stats.collisions.every`` writes, per group,
the contacts N_c counted since the previous sample and the time Δt they were counted over, so
the detected kernel of a sample is

    Γ = N_c / (n_a n_b V Δt) = N_c V / (N_a N_b Δt)   (two sets),
    Γ = N_c / (½ n² V Δt)    = N_c V / (½ N (N − 1) Δt)  (one set, each pair once),

with the number of distinct pairs N(N − 1)/2 for ½ n² V² (the count an ideal gas of N particles
holds, as in `particles.pairs.expected_pair_counts`). Beside it, from the particles at the
sample, the kinematic kernel at the same R in the spherical formulation, K = 2πR² g(R)
⟨|w_r|⟩(R) (Wang, Wexler & Zhou 2000, J. Fluid Mech. 415, 117), measured in the thin shell
R(1 ± δ) (``stats.collisions.shell``; its bias is second order in δ) as 2πR² Σ|w_r| / E with E
the ideal-gas pairs of the shell; and Saffman & Turner's kernel for tracers with the sample's
τ_η (:func:`saffman_turner_kernel`). Averages over samples are pooled ratios of sums with
blocking errors (`solver.study.readers.collision_table`).

R is fixed at the release: ``stats.collisions.radius`` in box units, or in Kolmogorov lengths
times η at the release, or, for sets given by radius and density, the sum of the two radii in
units of the physical η times η at the release (the same matching of Kolmogorov scales that
gives their Stokes numbers, `particles.physical`).
"""
from __future__ import annotations

import math

import numpy as np

from eddybox.particles import migration
from eddybox.particles.hooks import PAIR_COLUMNS, _finite, _LazyFileHook
from eddybox.solver.errors import ConfigError, NumericalInstability
from eddybox.solver.estimators import pairs as pair_estimators
from eddybox.solver.run.hooks import state_key, state_path
from eddybox.solver.run.output import Column, SampleFile, file_attrs

__all__ = ["SAFFMAN_TURNER", "saffman_turner_kernel", "COLUMNS", "CollisionHook"]

#: √(8π/15): Saffman & Turner's (1956) kernel of tracers is √(8π/15) R³/τ_η
SAFFMAN_TURNER = math.sqrt(8.0 * math.pi / 15.0)


def saffman_turner_kernel(radius, tau_eta):
    """Collision kernel of fluid tracers of collision radius R << η (Saffman & Turner 1956,
    J. Fluid Mech. 1, 16–30, eq. 2.2, from memory for the equation number):

        Γ_ST = √(8π/15) R³ / τ_η,

    from the spherical formulation 2πR²⟨|w_r|⟩ with w_r = R ∂u/∂x Gaussian of variance
    R² ε/(15ν) = R²/(15 τ_η²)."""
    return SAFFMAN_TURNER * np.asarray(radius, dtype=float) ** 3 / np.asarray(tau_eta, dtype=float)


#: the datasets of every /collisions/<a>__<b> group: name -> (units, description, dtype)
COLUMNS = {
    "interval": ("T", "time the contacts of this sample were counted over (the steps since the "
                 "previous sample)", np.float64),
    "collisions": ("1", "contacts detected in the interval: pairs whose separation crossed R "
                   "from above, particles on straight lines over each step (each pair once)",
                   np.int64),
    "kernel": ("L^3 T^-1", "detected collision kernel N_c V / (pairs interval), pairs = N_a N_b "
               "(two sets) or N (N - 1) / 2 (one set)", np.float64),
    "eta": PAIR_COLUMNS["eta"],
    "tau_eta": PAIR_COLUMNS["tau_eta"],
    "radius_eta": ("1", "R / eta at the sample", np.float64),
    "shell_counts": ("1", "pairs in the shell R(1 - shell) <= r < R(1 + shell) at the sample",
                     np.int64),
    "shell_expected": ("1", "pairs of uniformly distributed particles in the shell", np.float64),
    "shell_sum_abs": ("L T^-1", "sum of |w_r| over the pairs of the shell", np.float64),
    "shell_sum_inward": ("L T^-1", "sum of -min(w_r, 0) over the pairs of the shell", np.float64),
    "kinematic_kernel": ("L^3 T^-1", "kinematic kernel at R, 2 pi R^2 g <|w_r|> = 2 pi R^2 "
                         "shell_sum_abs / shell_expected (Wang, Wexler & Zhou 2000)", np.float64),
    "saffman_turner": ("L^3 T^-1", "Saffman & Turner (1956) kernel of tracers sqrt(8 pi/15) "
                       "R^3 / tau_eta at the sample", np.float64),
}
#: w_r edges of the shell's statistics: only counts and sums are used (one wide bin each side)
_SHELL_WR_EDGES = np.array([-1e300, 0.0, 1e300])


class CollisionHook(_LazyFileHook):
    """Counts contacts in every step (`detect`, registered in ParticleSystem.after_step) and
    writes one record per group every ``stats.collisions.every`` to /collisions/<a>__<b> of
    collisions.h5 (see the module docstring)."""

    name = "collisions"

    def __init__(self, cfg, path: str, particles_cfg, length: float):
        """`cfg`: the section stats.collisions; `particles_cfg`: the section particles (the
        sets' names and radii); `length`: the box side."""
        super().__init__(cfg.every, path)
        self.c = cfg
        self.length = float(length)
        self.set_cfg = {s.name: s for s in particles_cfg.sets}
        self.physical = particles_cfg.physical
        names = list(self.set_cfg)
        self.groups = [(a, a) for a in names]
        if cfg.cross:
            self.groups += [(a, b) for i, a in enumerate(names) for b in names[i + 1:]]
        self.radius = None  # group path -> R in box units, fixed at the release
        self.floor = {}  # group path -> earliest window start (release + 3 tau_p)
        self.pending = {}  # group path -> contacts since the last sample
        self.interval = 0.0  # time since the last sample

    @staticmethod
    def group(a, b) -> str:
        return f"/collisions/{a}__{b}"

    def _ready(self):
        return self.radius is not None

    # -- the radius, fixed at the release --------------------------------------------------------
    def _fix_radius(self, sim):
        ps = sim.particles
        eta = ps.release_scales.get("eta", math.nan)
        sets = {s.name: s for s in ps.sets}
        self.radius, self.floor, self.pending = {}, {}, {}
        for a, b in self.groups:
            g = self.group(a, b)
            if self.c.radius is not None:
                unit = eta if self.c.units == "eta" else 1.0
                r = float(self.c.radius) * unit
                what = f"{self.c.radius:g} " + ("eta" if self.c.units == "eta" else "L")
            else:
                phys_eta = sets[a].physical["eta"]
                r = (self.set_cfg[a].radius + self.set_cfg[b].radius) / phys_eta * eta
                what = f"the radii of {a} and {b}"
            if not (math.isfinite(r) and 0.0 < r * (1.0 + self.c.shell) < 0.25 * self.length):
                raise ConfigError(f"stats.collisions.radius: R from {what} is {r:.4g} in box "
                                  f"units at the release (eta = {eta:.4g}); it must be finite and "
                                  f"R (1 + shell) below a quarter of the box "
                                  f"({0.25 * self.length:.4g})")
            self.radius[g] = r
            tau_p = max(_finite(sets[a].tau_p), _finite(sets[b].tau_p))
            release = ps.release_scales.get("time", sim.t)
            self.floor[g] = release + pair_estimators.TRANSIENT_TAU_P * tau_p
            self.pending[g] = 0

    # -- every step ------------------------------------------------------------------------------
    def detect(self, sim):
        """Count this step's contacts of every group (collective; ParticleSystem.after_step)."""
        ps = sim.particles
        if self.radius is None:
            self._fix_radius(sim)
        sets = {s.name: s for s in ps.sets}
        for a, b in self.groups:
            g = self.group(a, b)
            sa, sb = sets[a], sets[b]
            try:
                n = migration.distributed_ghost_collisions(
                    sim.layout, ps.blockmap, self.length, self.radius[g], sa.x_start, sa.disp,
                    None if a == b else sb.x_start, None if a == b else sb.disp)
            except ValueError as exc:
                raise NumericalInstability(f"collision detection of {a} x {b} at t={sim.t:.6g}: "
                                           f"{exc}; the particles move too far in one step "
                                           "(lower time.cfl or set time.max_dt)") from None
            self.pending[g] += n
        self.interval += sim.dt

    # -- one sample ------------------------------------------------------------------------------
    def sample(self, sim):
        ps = sim.particles
        if ps is None or not ps.released or self.radius is None or self.interval <= 0.0:
            return  # nothing counted yet (the release, or no step since the last sample)
        sp = sim.spectral_stats()  # collective
        eps = sp["dissipation"]
        eta = (sim.nu**3 / eps) ** 0.25 if eps > 0 else math.inf
        tau_eta = math.sqrt(sim.nu / eps) if eps > 0 else math.inf
        self._ensure_file(sim)
        sets = {s.name: s for s in ps.sets}
        volume = self.length**3
        rec = {}
        for a, b in self.groups:
            g = self.group(a, b)
            sa, sb = sets[a], sets[b]
            same = a == b
            r = self.radius[g]
            edges = np.array([r * (1.0 - self.c.shell), r * (1.0 + self.c.shell)])
            shell = migration.distributed_pair_statistics(
                sim.layout, ps.blockmap, self.length, edges, _SHELL_WR_EDGES, sa.x, sa.v,
                None if same else sb.x, None if same else sb.v, n_a_global=sa.count,
                n_b_global=None if same else sb.count)
            pairs = _pairs(sa.count, None if same else sb.count)
            n_c = int(self.pending[g])
            with np.errstate(invalid="ignore", divide="ignore"):
                kin = 2.0 * math.pi * r * r * shell.sum_abs[0] / shell.expected[0]
            values = {"time": sim.t, "interval": self.interval, "collisions": n_c,
                      "kernel": n_c * volume / (pairs * self.interval) if pairs else math.nan,
                      "eta": eta, "tau_eta": tau_eta, "radius_eta": r / eta,
                      "shell_counts": int(shell.counts[0]),
                      "shell_expected": float(shell.expected[0]),
                      "shell_sum_abs": float(shell.sum_abs[0]),
                      "shell_sum_inward": float(shell.sum_inward[0]),
                      "kinematic_kernel": float(kin),
                      "saffman_turner": float(saffman_turner_kernel(r, tau_eta))}
            for k, v in values.items():
                rec[f"{g}/{k}"] = v
            self.pending[g] = 0
        self.interval = 0.0
        if self.file is not None:
            self.file.append(rec)

    # -- the file --------------------------------------------------------------------------------
    def _build(self, sim):
        cols, gattrs, scales = [], {}, []
        sets = {s.name: s for s in sim.particles.sets}
        for a, b in self.groups:
            g = self.group(a, b)
            time = f"{g}/time"
            scales.append(time)
            cols.append(Column(time, "T", "sample time", dims=[time]))
            for k, (u, d, dt) in COLUMNS.items():
                cols.append(Column(f"{g}/{k}", u, d, dtype=dt, dims=[time]))
            sa, sb = sets[a], sets[b]
            same = a == b
            attrs = {"set_a": a, "set_b": b, "n_a": sa.count, "n_b": sb.count,
                     "pairs": float(_pairs(sa.count, None if same else sb.count)),
                     "volume": self.length**3, "radius": self.radius[g],
                     "radius_source": ("stats.collisions.radius" if self.c.radius is not None
                                       else "sets"),
                     "shell": float(self.c.shell),
                     "stokes_a": float(sa.stokes), "stokes_b": float(sb.stokes),
                     "tau_p_a": float(sa.tau_p), "tau_p_b": float(sb.tau_p),
                     "window": "auto" if self.c.start == "auto" else "start",
                     "window_start": math.nan if self.c.start == "auto" else float(self.c.start),
                     "window_floor": float(self.floor[g])}
            if sa.physical is not None and sb.physical is not None:
                attrs.update(physical_radius=self.set_cfg[a].radius + self.set_cfg[b].radius,
                             physical_eta=sa.physical["eta"],
                             physical_tau_eta=sa.physical["tau_eta"])
            gattrs[g] = attrs
        return SampleFile(self.path, cols, [], attrs=file_attrs(sim.config.hash()),
                          group_attrs=gattrs, sample_scales=scales)

    # -- checkpoints -----------------------------------------------------------------------------
    def state(self):
        st = super().state()
        st["interval"] = np.float64(self.interval)
        if self.radius is not None:
            st["radius"] = {state_key(g): np.float64(r) for g, r in self.radius.items()}
            st["floor"] = {state_key(g): np.float64(v) for g, v in self.floor.items()}
            st["pending"] = {state_key(g): np.int64(n) for g, n in self.pending.items()}
        return st

    def load_state(self, st):
        super().load_state(st)
        self.interval = float(st["interval"])
        if "radius" in st:
            self.radius = {state_path(k): float(v) for k, v in st["radius"].items()}
            self.floor = {state_path(k): float(v) for k, v in st["floor"].items()}
            self.pending = {state_path(k): int(v) for k, v in st["pending"].items()}


def _pairs(n_a: int, n_b: int | None) -> float:
    """Distinct pairs: N(N − 1)/2 within a set, N_a N_b across two."""
    return n_a * (n_a - 1) / 2.0 if n_b is None else float(n_a) * float(n_b)
