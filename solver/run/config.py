"""The run configuration: typed sections, defaults, validation and one-line summaries.

A config file is read by `run.yaml_input` (a safe YAML loader that refuses duplicate keys and
oversized documents), overridden by `--set KEY=VALUE` pairs, and checked section by section:
every section is a small immutable object (`eddybox.solver.fields.Section`) whose class lists its
fields with default, type, range, units and description in one place. The README's config
reference and the JSON Schema of `eddybox schema` are generated from these classes
(`run.config_docs`), so the three cannot drift. Every problem raises `ConfigError` with one
message naming the key and what is allowed; the CLI turns it into exit code 2.

    cfg = load("run.yaml", ["grid.points=32"])
    cfg.grid.points, cfg.forcing.kind, cfg.particles.sets[0].stokes
"""
from __future__ import annotations

import copy
import hashlib
import json
import math
from pathlib import Path

import yaml

from eddybox.forcing import FORCINGS
from eddybox.solver.errors import ConfigError
from eddybox.solver.fields import (
    Choice,
    Duration,
    Flag,
    KindOf,
    ListOf,
    Name,
    Num,
    NumOrWord,
    Optional,
    Section,
    Text,
    Vector,
)
from eddybox.solver.fluid.initial import INITIAL_PARAMS
from eddybox.solver.fluid.timestepping import SCHEMES
from eddybox.solver.run.yaml_input import apply_overrides, read_yaml


# --- sections -----------------------------------------------------------------------------------
class GridConfig(Section):
    """The periodic box [0, L)^3 sampled on N^3 points."""

    points = Num(64, "points per direction N", "1", lo=4, hi=16384, integer=True, even=True)
    length = Num(2 * math.pi, "box side L", "L", lo=1e-6, hi=1e6)

    def summary(self):
        return f"{self.points}^3 box L={self.length:.4g}"


class ForcingParams(Section):
    """Base of the per-kind forcing sections (fields from the scheme's `params`)."""

    def check(self):
        FORCINGS[self.kind].check_config(self)

    def summary(self):
        rest = Section.summary(self).split(", ")
        args = ",".join(p for p in rest if p and not p.startswith("kind="))
        return f"{self.kind}({args})"


class InitialParams(Section):
    """Base of the per-kind initial-field sections (fields from the field's registration)."""

    def summary(self):
        rest = [p for p in Section.summary(self).split(", ") if p and not p.startswith("kind=")]
        return self.kind + (f"({','.join(rest)})" if rest else "")


class FluidConfig(Section):
    """The fluid: viscosity, initial field, dealiasing."""

    viscosity = Num(0.01, "kinematic viscosity ν", "L^2 T^-1", lo=1e-12, hi=1e6)
    initial = KindOf("initial field", lambda: INITIAL_PARAMS, lambda kind: INITIAL_PARAMS[kind],
                     "spectrum", "initial velocity field, chosen by `kind` (spectrum: random "
                     "solenoidal field with E(k) ∝ k⁴ exp(−2(k/k_p)²); file: an eddybox field "
                     "snapshot or checkpoint, truncated or zero-padded to this N)", base=InitialParams)
    frozen = Flag(False, "keep the velocity field fixed (particle-only studies)")
    dealias = Choice("two-thirds", ("two-thirds", "phase-shift", "stage-shift"), "dealiasing: "
                     "two-thirds (Orszag 1971), phase-shift (two products per stage, spherical "
                     "truncation, Patterson & Orszag 1971) or stage-shift (one product per stage on "
                     "stage-dependent random shifts, Rogallo 1981; time.scheme rk4 or rk2); the "
                     "spherical options keep |k| < √2 N/3, so the same k_max needs √2 fewer points "
                     "per direction; use time.cfl divided by √2 for the same time step")

    def summary(self):
        return (f"nu={self.viscosity:g}, init={self.initial.summary()}"
                + (" frozen" if self.frozen else "") + f", dealias {self.dealias}")


class TimeConfig(Section):
    """Time stepping and when the run ends."""

    scheme = Choice("rk4", tuple(SCHEMES), "integrating-factor Runge–Kutta scheme (rk3: "
                    "low-storage, Williamson 1980)")
    cfl = Num(0.6, "CFL number: dt = cfl·dx / max(|u|+|v|+|w|); refused above the "
              "imaginary-axis bound of the scheme (rk4 2.8, rk3 1.7, rk2 1.0); stable for "
              "pseudo-spectral advection up to that bound × 3/(2π) (rk4 1.34, rk3 0.81, rk2 0.48), "
              "`check` warns above it", "1", lo=0.0, lo_open=True, hi=10.0)
    max_dt = Num(None, "upper bound on dt", "T", lo=0.0, lo_open=True)
    end = Num(10.0, "end time (the last step lands on it)", "T", lo=0.0, lo_open=True, restart=True)
    max_steps = Num(None, "stop after this many steps in all", "1", lo=1, hi=10**15, integer=True,
                    restart=True)
    walltime = Duration(None, "wall-clock budget of this invocation: checkpoint and exit 75 "
                        "before it runs out", "s", restart=True)

    def check(self):
        limit = SCHEMES[self.scheme].cfl_limit
        if self.cfl > limit:
            raise ConfigError(f"time.cfl: {self.cfl} is above the stability limit {limit} of "
                              f"scheme {self.scheme!r}; allowed: 0 < cfl <= {limit}")

    def summary(self):
        return f"{self.scheme} cfl={self.cfl:g} end={self.end:g}"


class PhysicalConfig(Section):
    """The physical flow that particle sets given by radius and density are placed in."""

    viscosity = Num(1.5e-5, "kinematic viscosity of the gas", "m^2/s", lo=0.0, lo_open=True, hi=1.0)
    dissipation = Num(0.01, "dissipation rate of the flow represented", "m^2/s^3", lo=0.0,
                      lo_open=True, hi=1e6)
    fluid_density = Num(1.2, "fluid density", "kg/m^3", lo=0.0, lo_open=True, hi=1e5)
    gravity = Num(9.81, "gravitational acceleration", "m/s^2", lo=0.0, hi=1e4)


class SetConfig(Section):
    """One particle set: a name, a count, and its response time (one of stokes, tau_p, or
    radius with density)."""

    name = Name(None, "unique name of the set", none_ok=False)
    count = Num(1000, "number of particles", "1", lo=1, hi=10**12, integer=True)
    stokes = Num(None, "Stokes number τ_p/τ_η (τ_η measured at release)", "1", lo=0.0, hi=1e6)
    tau_p = Num(None, "particle response time (instead of stokes); 0 means tracers", "T", lo=0.0)
    radius = Num(None, "particle radius (with density and particles.physical)", "m", lo=0.0,
                 lo_open=True, hi=1.0)
    density = Num(None, "particle material density", "kg/m^3", lo=0.0, lo_open=True, hi=1e5)
    interpolation = Choice(None, (2, 4, 6, 8), "Lagrange points per direction for this set "
                           "(default particles.interpolation)")
    gravity = Vector(None, "gravity vector for this set (default particles.gravity)", "L T^-2")

    def check(self):
        given = [k for k in ("stokes", "tau_p", "radius") if getattr(self, k) is not None]
        if len(given) != 1:
            raise ConfigError(f"{self.key}: give exactly one of stokes, tau_p or radius "
                              f"(got {', '.join(given) or 'none'})")
        if (self.radius is None) != (self.density is None):
            raise ConfigError(f"{self.key}: radius and density go together")

    def summary(self):
        what = (f"St={self.stokes:g}" if self.stokes is not None else
                f"tau_p={self.tau_p:g}" if self.tau_p is not None else
                f"radius={self.radius:g} m, density={self.density:g} kg/m^3")
        return f"{self.name}: {self.count} particles, {what}"


class SetList(ListOf):
    """The particle sets, with a shorthand: a set whose `stokes`, `tau_p` or `radius` is a list
    stands for one set per value, named by the set's name followed by the value
    (`{name: st, stokes: [0.5, 1, 2]}` gives the sets st0.5, st1 and st2)."""

    EXPANDABLE = ("stokes", "tau_p", "radius")

    def parse(self, raw, key):
        if isinstance(raw, list):
            raw = self.expand(raw, key)
        return super().parse(raw, key)

    def expand(self, raw, key):
        out = []
        for i, item in enumerate(raw):
            lists = [k for k in self.EXPANDABLE if isinstance(item, dict) and isinstance(item.get(k), list)]
            if not lists:
                out.append(item)
                continue
            if len(lists) > 1:
                raise ConfigError(f"{key}[{i}]: only one of {', '.join(lists)} may be a list")
            k = lists[0]
            values = item[k]
            if not values:
                raise ConfigError(f"{key}[{i}].{k}: an empty list; give at least one value")
            if not isinstance(item.get("name"), str):
                raise ConfigError(f"{key}[{i}].name: a set with a list of {k} needs a name to "
                                  "build the names of its sets from")
            for j, v in enumerate(values):
                value = SetConfig.section_fields()[k].check(f"{key}[{i}].{k}[{j}]", v)
                out.append(dict(item, **{k: value, "name": f"{item['name']}{value:g}"}))
        return out


class ParticlesConfig(Section):
    """Inertial point particles: release time, interpolation, gravity and the sets."""

    release = Num(0.0, "time at which particles are seeded uniformly at random, with the local "
                  "fluid velocity", "T", lo=0.0)
    interpolation = Choice(8, (2, 4, 6, 8), "Lagrange interpolation points per direction")
    gravity = Vector([0.0, 0.0, 0.0], "gravitational acceleration (settling)", "L T^-2",
                     none_ok=False)
    physical = Optional(PhysicalConfig, "physical flow for sets given by radius: viscosity "
                        "(m²/s), dissipation (m²/s³), fluid_density (kg/m³), gravity (m/s²)")
    sets = SetList(SetConfig, "particle sets: `name`, `count`, and one of `stokes`, `tau_p` (0 = "
                   "tracers) or `radius` + `density`; optional `interpolation`, `gravity`. A list "
                   "of stokes, tau_p or radius values stands for one set per value, named "
                   "`name` + value (`{name: st, stokes: [0.5, 1, 2]}`: sets st0.5, st1, st2)",
                   unique="name")

    def summary(self):
        if not self.sets:
            return "no particles"
        return f"{len(self.sets)} set(s) released at t={self.release:g}: " + "; ".join(
            s.summary() for s in self.sets)


def _every(default, doc):
    return Num(default, doc + "; 0 means every step, null disables", "T", lo=0.0, none_ok=True)


class FluidStatsConfig(Section):
    every = _every(0.05, "time between fluid series samples")


class SpectraConfig(Section):
    every = _every(0.5, "time between energy spectra")


class PairStatsConfig(Section):
    """In-situ pair statistics: g(r), w_r histograms and the collision kernel."""

    every = _every(None, "time between pair-statistics samples")
    r_max = Num(10.0, "largest separation", "η or L (see units)", lo=0.0, lo_open=True, hi=1e6)
    bins = Num(40, "separation bins", "1", lo=1, hi=10000, integer=True)
    spacing = Choice("log", ("log", "linear"), "bin spacing")
    r_min = Num(None, "smallest edge for log bins (default r_max/100)", "η or L", lo=0.0,
                lo_open=True, hi=1e6)
    units = Choice("eta", ("eta", "box"), "units of r_max and r_min: Kolmogorov lengths at each "
                   "sample (r_max is clipped to 0.45 L at the release if it reaches further), or "
                   "box units")
    wr_bins = Num(101, "bins of the w_r histogram of each separation bin (odd: one bin centred "
                  "on w_r = 0); sinh-spaced per separation bin, fine near the rms of w_r that "
                  "tracers have there, geometric out to ±8·√2 u′", "1", lo=3, hi=100001,
                  integer=True)
    start = NumOrWord("auto", "start of the averaging window of running/ and of the default "
                      "averages (report, inspect, readers): a time, or auto: the end of the "
                      "transient after the release, by MSER-5 on g at small r, no earlier than "
                      "release + 3 τ_p; earlier samples are still written", "T", lo=0.0)
    cross = Flag(False, "also pairs across every two sets")
    subsample_above = Num(None, "separation above which a particle subsample is used", "η or L",
                          lo=0.0, lo_open=True, hi=1e6)
    subsample_count = Num(20000, "particles per set in that subsample", "1", lo=2, hi=10**12,
                          integer=True)

    def check(self):
        if self.wr_bins % 2 == 0:
            raise ConfigError(f"stats.pairs.wr_bins: expected an odd integer (a bin centred on "
                              f"w_r = 0), got {self.wr_bins}")
        if self.r_min is not None and self.r_min >= self.r_max:
            raise ConfigError("stats.pairs.r_min: must be below stats.pairs.r_max")
        if self.subsample_above is not None and self.subsample_above >= self.r_max:
            raise ConfigError(f"stats.pairs.subsample_above: {self.subsample_above:g} is not below "
                              f"stats.pairs.r_max {self.r_max:g}; no bin would be subsampled")

    def summary(self):
        if self.every is None:
            return "pairs off"
        lo = self.r_min if self.r_min is not None else self.r_max / 100.0
        r = (f"{self.bins} {self.spacing} bins {lo:g}..{self.r_max:g}"
             + (" eta" if self.units == "eta" else " L"))
        start = "window auto" if self.start == "auto" else f"window t>={self.start:g}"
        return (f"pairs every {self.every:g}: {r}, {self.wr_bins} w_r bins per r bin, {start}"
                + (", cross" if self.cross else ""))


class ParticleStatsConfig(Section):
    every = _every(None, "time between particle snapshots")
    max_count = Num(10000, "particles per set in snapshots", "1", lo=1, hi=10**12, integer=True)
    series_every = Num(None, "time between per-set series (default stats.fluid.every)", "T", lo=0.0)


class CollisionStatsConfig(Section):
    """Ghost collisions: contacts of the non-interacting particles counted in every step
    (particles on straight lines over the step), streamed per sample beside the kinematic
    kernel measured at the same radius."""

    every = _every(None, "time between samples of the detected collisions (detection itself "
                   "runs in every step)")
    radius = Num(None, "collision radius R; null: the sum of the two sets' radii (sets given "
                 "by radius and density)", "η or L (see units)", lo=0.0, lo_open=True, hi=1e6)
    units = Choice("eta", ("eta", "box"), "units of radius: Kolmogorov lengths at the release "
                   "(R is then fixed for the run), or box units")
    cross = Flag(False, "also collisions across every two sets")
    shell = Num(0.05, "relative half-width of the shell R(1 ± shell) in which the kinematic "
                "kernel 2πR²g⟨|w_r|⟩ is measured at each sample for comparison", "1", lo=0.0,
                lo_open=True, hi=0.5)
    start = NumOrWord("auto", "start of the averaging window of the default averages (report, "
                      "readers): a time, or auto: the end of the transient after the release, "
                      "by MSER-5 on g(R) in the shell, no earlier than release + 3 τ_p", "T",
                      lo=0.0)

    def summary(self):
        if self.every is None:
            return "collisions off"
        r = ("R from the sets' radii" if self.radius is None else
             f"R = {self.radius:g}" + (" eta" if self.units == "eta" else " L"))
        return (f"collisions every {self.every:g}: {r}, shell ±{self.shell:g} R"
                + (", cross" if self.cross else ""))


class LagrangianStatsConfig(Section):
    """Single-particle Lagrangian statistics per set: the velocity autocorrelation R_L(τ), the
    mean-square displacement (from unwrapped positions) and T_L, with multiple time origins."""

    every = Num(None, "time between Lagrangian samples (the lag resolution); null disables", "T",
                lo=0.0, lo_open=True)
    max_lag = Num(2.0, "largest lag τ of R_L(τ) and the mean-square displacement", "T", lo=0.0,
                  lo_open=True)
    count = Num(2000, "particles followed per set (the first by id); each keeps (max_lag/every "
                "+ 1) velocities and positions, 48 bytes per lag", "1", lo=1, hi=10**9,
                integer=True)
    start = NumOrWord("auto", "start of the averaging window (time origins and ends at or after "
                      "it): a time, or auto: release + 3 τ_p of each set", "T", lo=0.0)

    def check(self):
        if self.every is not None:
            lags = self.max_lag / self.every
            if not 1 <= round(lags) <= 10000:
                raise ConfigError(f"stats.lagrangian.max_lag: {self.max_lag:g} gives "
                                  f"{lags:.4g} lags of {self.every:g}; allowed: 1 to 10000 lags")

    def lags(self) -> int:
        """Lags kept: max_lag / every, rounded."""
        return int(round(self.max_lag / self.every))

    def summary(self):
        if self.every is None:
            return "lagrangian off"
        return (f"lagrangian every {self.every:g} to lag {self.max_lag:g}, {self.count} "
                "particles per set")


class FieldsStatsConfig(Section):
    every = _every(None, "time between velocity-field snapshots (with XDMF sidecars)")


class StatsConfig(Section):
    """What is measured during the run, and how often."""

    fluid = FluidStatsConfig
    spectra = SpectraConfig
    pairs = PairStatsConfig
    collisions = CollisionStatsConfig
    lagrangian = LagrangianStatsConfig
    particles = ParticleStatsConfig
    fields = FieldsStatsConfig


class CheckpointConfig(Section):
    every = Num(None, "time between checkpoints (one is always written at the end and on "
                "signals)", "T", lo=0.0, lo_open=True, restart=True)
    keep = Num(2, "checkpoints kept", "1", lo=1, hi=1000, integer=True, restart=True)


class ParallelConfig(Section):
    layout = Choice("auto", ("auto", "serial", "slab", "pencil"), "domain decomposition over MPI "
                    "ranks", restart=True)
    grid = Vector(None, "pencil process grid [P1, P2]", "1", length=2, integer=True, lo=1,
                  hi=65536, restart=True)

    def check(self):
        if self.grid is not None and self.layout not in ("pencil", "auto"):
            raise ConfigError("parallel.grid: only used with parallel.layout: pencil")


class RunConfig(Section):
    """The whole config file."""

    name = Name("eddybox-run", "run name", restart=True)
    output = Text(None, "output folder (default runs/<name>); an existing non-empty folder "
                  "needs --overwrite or --restart", restart=True)
    seed = Num(2026, "seed of every random draw (initial field, forcing, particles, subsamples)",
               "1", lo=0, hi=2**63 - 1, integer=True)
    grid = GridConfig
    fluid = FluidConfig
    time = TimeConfig
    forcing = KindOf("forcing", lambda: FORCINGS, lambda kind: FORCINGS[kind].params, "none",
                     "large-scale forcing, chosen by `kind`", base=ForcingParams)
    particles = ParticlesConfig
    stats = StatsConfig
    checkpoint = CheckpointConfig
    parallel = ParallelConfig


# --- rules across sections ----------------------------------------------------------------------
def _cross_checks(c: RunConfig):
    n = c.grid.points
    scheme = SCHEMES[c.time.scheme]
    if c.fluid.dealias == "stage-shift" and not scheme.stage_shifts:
        able = ", ".join(k for k, v in SCHEMES.items() if v.stage_shifts)
        raise ConfigError(f"fluid.dealias: 'stage-shift' cancels aliasing across the stages of "
                          f"a step, which time.scheme {scheme.name!r} cannot do (no stage shifts "
                          f"make its weights cancel); use time.scheme {able}, or fluid.dealias "
                          "two-thirds or phase-shift")
    f = c.forcing
    if hasattr(f, "band"):
        if f.band < 1.0:
            raise ConfigError(f"forcing.band: {f.band} holds no Fourier mode; the smallest "
                              "nonzero |k| is 1 (in units of 2 pi / L); allowed: 1 <= band < N/3")
        if f.band >= n / 3.0:
            raise ConfigError(f"forcing.band: {f.band} reaches the dealiased modes of a {n}^3 "
                              f"grid; allowed: 1 <= band < {n / 3:.3g}")
    p = c.particles
    if p.sets:
        if p.release >= c.time.end:
            raise ConfigError(f"particles.release: {p.release} is not before time.end "
                              f"{c.time.end}; particles would never move")
        if any(s.radius is not None for s in p.sets) and p.physical is None:
            raise ConfigError("particles.physical: required when a set gives radius and density")
    pr = c.stats.pairs
    if pr.every is not None:
        if not p.sets:
            raise ConfigError("stats.pairs.every: pair statistics need particles.sets")
        if pr.units == "box" and pr.r_max >= 0.5 * c.grid.length:
            raise ConfigError(f"stats.pairs.r_max: {pr.r_max} must be below half the box "
                              f"({0.5 * c.grid.length:.6g}) with units: box")
        _start_before_end("stats.pairs.start", pr.start, c.time.end)
        # a flow at rest has no dissipation, hence no eta: for ever, or at a release at t = 0
        still = _stays_at_rest(c)
        if pr.units == "eta" and c.fluid.initial.kind == "rest" and (still or p.release == 0.0):
            why = "stays at rest" if still else "is at rest at the release (t = 0)"
            raise ConfigError(f"stats.pairs.units: 'eta' needs the Kolmogorov length, but the "
                              f"flow {why} and has no dissipation; use units: box, or release "
                              "the particles later (particles.release)")
    _collision_checks(c)
    lg = c.stats.lagrangian
    if lg.every is not None:
        if not p.sets:
            raise ConfigError("stats.lagrangian.every: Lagrangian statistics need particles.sets")
        _start_before_end("stats.lagrangian.start", lg.start, c.time.end)


def _start_before_end(key, start, end):
    if start != "auto" and start >= end:
        raise ConfigError(f"{key}: {start:g} is not before time.end {end:g}; no sample would be "
                          "averaged")


def _stays_at_rest(c: RunConfig) -> bool:
    """The flow starts at rest and nothing sets it moving (frozen, or a forcing that does not
    move a fluid at rest)."""
    return c.fluid.initial.kind == "rest" and (
        c.fluid.frozen or not FORCINGS[c.forcing.kind].moves_fluid_at_rest)


def _collision_checks(c: RunConfig):
    """stats.collisions: particles to collide, a radius for every group, an eta to measure it
    in, and a radius that fits the box."""
    col, p = c.stats.collisions, c.particles
    if col.every is None:
        return
    if not p.sets:
        raise ConfigError("stats.collisions.every: collision detection needs particles.sets")
    if col.radius is None:
        loose = [s.name for s in p.sets if s.radius is None]
        if loose:
            raise ConfigError(f"stats.collisions.radius: required, since set {loose[0]!r} is not "
                              "given by radius and density (the collision radius is the sum of "
                              "the two sets' radii only for such sets); give it in eta or box "
                              "units (stats.collisions.units)")
    elif col.units == "box" and col.radius >= 0.25 * c.grid.length:
        raise ConfigError(f"stats.collisions.radius: {col.radius:g} must be below a quarter of "
                          f"the box ({0.25 * c.grid.length:.6g}) with units: box")
    _start_before_end("stats.collisions.start", col.start, c.time.end)
    if (col.radius is not None and col.units == "eta" and c.fluid.initial.kind == "rest"
            and (_stays_at_rest(c) or p.release == 0.0)):
        raise ConfigError("stats.collisions.units: 'eta' needs the Kolmogorov length at the "
                          "release, but the flow is at rest there and has no dissipation; use "
                          "units: box, or release the particles later (particles.release)")

# --- the Config object --------------------------------------------------------------------------
def restart_mutable_keys(section=RunConfig, prefix="") -> list[str]:
    """Dotted keys that may change when a run is restarted (the one list used by the code,
    its messages and the README)."""
    out = []
    for name, spec in section.section_fields().items():
        key = f"{prefix}.{name}" if prefix else name
        if isinstance(spec, type) and issubclass(spec, Section):
            out += restart_mutable_keys(spec, key)
        elif getattr(spec, "restart", False):
            out.append(key)
    return out


class Config:
    """A validated configuration: the typed sections as attributes (`cfg.grid.points`),
    plus where it came from. Immutable; `with_changes` makes a modified copy."""

    def __init__(self, root: RunConfig, source: str = "<dict>"):
        self.root = root
        self.source = source
        self.data = root.to_dict()  # the plain nested form, for hashing and the YAML copy

    def __getattr__(self, name):
        if name in ("root", "source", "data"):
            raise AttributeError(name)
        return getattr(self.root, name)

    def get(self, path, default=None):
        """The value at a dotted key (`'stats.pairs.every'`), or `default`."""
        cur = self.data
        for part in path.split("."):
            if not isinstance(cur, dict) or part not in cur:
                return default
            cur = cur[part]
        return cur

    def with_changes(self, changes: dict) -> "Config":
        """A new validated config with dotted keys replaced (`{'grid.points': 128}`)."""
        raw = copy.deepcopy(self.data)
        for key, value in changes.items():
            cur = raw
            parts = key.split(".")
            for part in parts[:-1]:
                cur = cur[int(part)] if isinstance(cur, list) else cur.setdefault(part, {})
            cur[parts[-1]] = value
        return validate(raw, self.source)

    @property
    def output(self) -> Path:
        return Path(self.root.output or f"runs/{self.root.name}")

    def summary(self) -> str:
        r = self.root
        sets = r.particles.sets
        return ", ".join([f"{r.name}: {r.grid.summary()}", f"nu={r.fluid.viscosity:g}",
                          f"init={r.fluid.initial.summary()}" + (" frozen" if r.fluid.frozen else ""),
                          f"forcing={r.forcing.summary()}", r.time.summary(),
                          f"{len(sets)} particle set(s)" if sets else "no particles",
                          f"seed={r.seed}"])

    def physics(self) -> dict:
        """The config without the keys a restart may change."""
        d = copy.deepcopy(self.data)
        for path in restart_mutable_keys():
            parts = path.split(".")
            cur = d
            for p in parts[:-1]:
                cur = cur.get(p, {})
            cur.pop(parts[-1], None)
        return d

    def physics_hash(self) -> str:
        return hashlib.sha256(json.dumps(self.physics(), sort_keys=True).encode()).hexdigest()[:16]

    def hash(self) -> str:
        return hashlib.sha256(json.dumps(self.data, sort_keys=True).encode()).hexdigest()[:16]

    def to_yaml(self, derived: dict | None = None) -> str:
        d = copy.deepcopy(self.data)
        if derived is not None:
            d["derived"] = derived
        return yaml.safe_dump(d, sort_keys=False)


def flat_keys(d: dict, prefix="") -> dict:
    out = {}
    for k, v in d.items():
        key = f"{prefix}.{k}" if prefix else str(k)
        if isinstance(v, dict):
            out.update(flat_keys(v, key))
        else:
            out[key] = v
    return out


def differing_keys(a: dict, b: dict) -> list[str]:
    fa, fb = flat_keys(a), flat_keys(b)
    return sorted(k for k in set(fa) | set(fb) if fa.get(k) != fb.get(k))


def validate(raw, source="<dict>") -> Config:
    """The validated Config of a raw mapping. A `derived:` block (a run folder's config.yaml
    carries one) is ignored: it describes the run it was written by and is recomputed."""
    if raw is None:
        raw = {}
    if not isinstance(raw, dict):
        raise ConfigError(f"{source}: the top level must be a mapping of keys, got {type(raw).__name__}")
    if "derived" in raw:
        raw = {k: v for k, v in raw.items() if k != "derived"}
    root = RunConfig.parse(raw, "")
    _cross_checks(root)
    return Config(root, source)


def load(path, overrides=None) -> Config:
    raw = apply_overrides(read_yaml(path), overrides)
    return validate(raw, str(path))
