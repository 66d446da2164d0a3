"""Particle sets in the run loop: seeding at the release time, one ETD step per fluid step,
per-set statistics, checkpoint state.

Per step (after the fluid has advanced from t_n to t_{n+1}), with the multistep ETD2 scheme
(`particles.integrator`, registry PARTICLE_SCHEMES; second order, exact for frozen u):
    x_{n+1}, v_{n+1} from u_n = u(x_n, t_n) and u_{n-1} (both kept from earlier steps)
    u(x_{n+1}, t_{n+1}) interpolated from the new field and kept for the next step
so each step costs one inverse transform of the velocity, one interleaved single-precision
copy of it (`interpolation.InterleavedField`) and one interpolation per particle. A set
without history (just released, or restarted from a checkpoint without it) takes one
two-interpolation ETD2RK step first.
"""
from __future__ import annotations

import numpy as np

from eddybox.particles import integrator, interpolation, migration
from eddybox.particles.physical import physical_numbers

#: steps between re-sorts of the particles by grid cell
SORT_EVERY = 16
#: float64 arrays of 3 components kept per particle: x, v, u_seen, u_prev and x_start (the
#: position at the start of the step); plus an int64 id and three int32 image counters
_ARRAYS_PER_PARTICLE = 5
#: dtype of the periodic image counters (a particle crosses the box 2^31 times never)
IMAGE_DTYPE = np.int32
#: the particle time scheme of the run loop (integrator.PARTICLE_SCHEMES)
SCHEME = "etd2"
#: precision of the interleaved velocity copy the particles interpolate from
COPY_DTYPE = np.float32


def bytes_per_particle() -> int:
    return _ARRAYS_PER_PARTICLE * 3 * 8 + 8 + 3 * np.dtype(IMAGE_DTYPE).itemsize


def interpolation_copy_bytes(n, max_order, ranks, layout, grid=None) -> int:
    """Bytes of the interleaved velocity copy (`interpolation.InterleavedField`) per rank: the
    grid, or the largest ghosted block, with whole axes padded for the largest order (0 without
    particles: max_order None)."""
    if max_order is None:
        return 0
    ext = (n, n, n) if ranks <= 1 else migration.ghost_block_extents(n, max_order, ranks, layout, grid)
    return 3 * np.dtype(COPY_DTYPE).itemsize * int(np.prod([e + max_order if e == n else e
                                                             for e in ext]))


class ParticleSet:
    """One set: name, response time, gravity, interpolation order and the particle arrays."""

    def __init__(self, spec, index: int, order: int, gravity, physical):
        """`spec`: the set's own config section; `order` and `gravity` its resolved
        interpolation order and gravity vector; `physical` the particles.physical section."""
        self.name = spec.name
        self.index = index
        self.count = spec.count
        self.order = order
        self.gravity = np.asarray(gravity, float)
        self.stokes = spec.stokes
        self.tau_p = spec.tau_p
        self.physical = None
        if spec.radius is not None:
            self.physical = physical_numbers(spec.radius, spec.density, physical)
            self.stokes = self.physical["stokes"]
        self.released = False
        self.ids = np.empty(0, np.int64)
        self._alloc(0)

    def _alloc(self, n):
        self.x, self.v, self.u_seen, self.u_prev, self.x_start = (np.zeros((n, 3))
                                                                  for _ in range(5))
        #: periodic image counters: x + image L is the unwrapped position
        self.image = np.zeros((n, 3), IMAGE_DTYPE)
        #: displacements of the last step (x_start itself unless an observer needs both)
        self.disp = self.x_start
        #: the multistep scheme's history: u_prev and h_prev hold the step before
        self.history, self.h_prev = False, 0.0

    def resolve(self, tau_eta: float, a_eta: float):
        """Fix tau_p (from St and the measured tau_eta) and, for physical sets, gravity."""
        if self.tau_p is None:
            if not np.isfinite(tau_eta):
                from eddybox.solver.errors import ConfigError

                raise ConfigError(f"particles.sets[{self.index}].stokes: the flow has no "
                                  "dissipation at the release (tau_eta is infinite), so the "
                                  "Stokes number gives no response time; give tau_p instead")
            self.tau_p = float(self.stokes) * tau_eta
        elif self.stokes is None:
            self.stokes = self.tau_p / tau_eta if tau_eta > 0 else float("nan")
        if self.physical is not None:
            g = self.gravity
            direction = g / np.linalg.norm(g) if np.linalg.norm(g) > 0 else np.array([0.0, 0.0, -1.0])
            froude = self.physical["froude"]
            self.gravity = direction * (a_eta / froude if np.isfinite(froude) else 0.0)

    def attrs(self) -> dict:
        a = {"stokes": float(self.stokes), "tau_p": float(self.tau_p), "count": int(self.count),
             "interpolation": int(self.order), "gravity": self.gravity.astype(float)}
        if self.physical is not None:
            for k, v in self.physical.items():
                a[f"physical_{k}"] = float(v)
        return a


class ParticleSystem:
    def __init__(self, cfg, grid, seed: int, layout):
        """`cfg`: the section particles; `grid`: the section grid; `seed`: the run's seed."""
        self.layout = layout
        self.release = cfg.release
        self.rng_seed = seed
        self.length = grid.length
        self.n = grid.points
        self.h = self.length / self.n
        self.sets = [ParticleSet(s, i, s.interpolation or cfg.interpolation,
                                 s.gravity if s.gravity is not None else cfg.gravity, cfg.physical)
                     for i, s in enumerate(cfg.sets)]
        first = 0
        for st in self.sets:
            st.first_id = first
            first += st.count
        # across ranks: each rank owns the particles of its physical block and interpolates
        # from its velocity block extended by ghost planes (particles.migration)
        self.distributed = layout.size > 1
        self.blockmap = migration.BlockMap(layout)
        if self.distributed:
            width = migration.ghost_width(max(st.order for st in self.sets))
            self.ghost_u = migration.GhostField(layout, self.blockmap, 3, width)
            self.ghost_q = migration.GhostField(layout, self.blockmap, 1, width)
        self.released = False
        self.release_scales = {}
        #: called as f(sim) after every step of the released sets, before any migration: each
        #: set then holds x_start (its positions at the start of the step) and disp (the
        #: displacements over it); collision detection (particles.collisions) is one
        self.after_step = []
        self._frozen_field = None
        self.scheme = integrator.PARTICLE_SCHEMES[SCHEME]()
        shape, start = ((self.ghost_u.array.shape, self.ghost_u.start) if self.distributed
                        else ((3,) + tuple(layout.phys_shape), (0, 0, 0)))
        self._copy = interpolation.InterleavedField(shape, start, (self.n,) * 3,
                                                    max(st.order for st in self.sets), COPY_DTYPE)

    # -- the velocity field in physical space, as the interpolation kernels want it -----------
    def _field(self, sim):
        """The velocity for the interpolation: an interleaved single-precision copy of the
        whole grid (serial) or of this rank's ghosted block (`interpolation.InterleavedField`;
        its rounding, 2.4e-7 of max |u| at most, is far below the interpolation error)."""
        if sim.frozen and self._frozen_field is not None:
            return self._frozen_field
        u = sim.nl.to_physical(sim.uh)
        if self.distributed:
            self.ghost_u.fill(u)
            array = self.ghost_u.array
        else:
            array = u
        self._copy.fill(array)
        if sim.frozen:
            self._frozen_field = self._copy
        return self._copy

    def _interp(self, copy, s, pos, out):
        # particles are kept in cell order (see `_sort_by_cell`): neighbours share stencil rows
        try:
            interpolation.interpolate_interleaved(copy, self.h, pos, s.order, out)
        except IndexError:
            self._escaped(s)

    def _escaped(self, s):
        from eddybox.solver.errors import NumericalInstability

        raise NumericalInstability(
            f"particles of set {s.name!r} moved more than {migration.GHOST_MARGIN} grid cells "
            "in one step, beyond the ghost layers of their rank; lower time.cfl or set "
            "time.max_dt (fast settling needs dt |v| < 2 dx)") from None

    def _interp_grid(self, field, s, pos, out):
        """Interpolate a (array, start) grid field directly (statistics such as Q)."""
        array, start = field
        try:
            interpolation.interpolate(array, start, (self.n,) * 3, self.h, pos, s.order, out,
                                      cell_sort=False)
        except IndexError:
            self._escaped(s)

    def _sum(self, x):
        return self.layout.sum(x) if self.distributed else x

    def _sort_by_cell(self):
        """Reorder every set by grid cell: neighbouring particles then share cache lines of
        the interpolation stencils (about 3x faster at 128^3, see eddybox.solver.study.bench_interp).
        Ids move with their particles, so snapshots and checkpoints are unaffected."""
        for s in self.sets:
            if s.x.shape[0] < 1024:
                continue
            perm = interpolation.cell_order(s.x, np.full(3, self.h), np.full(3, self.n, np.int64))
            for name in ("ids", "x", "v", "u_seen", "u_prev", "image"):
                setattr(s, name, np.ascontiguousarray(getattr(s, name)[perm]))

    def seed(self, sim):
        """Release every set: uniform positions, the fluid velocity as initial velocity, tau_p
        from the Stokes number and the tau_eta measured now (collective)."""
        sp = sim.spectral_stats()
        eps = sp["dissipation"]
        tau_eta = float(np.sqrt(sim.nu / eps)) if eps > 0 else float("inf")
        a_eta = float((eps**3 / sim.nu) ** 0.25) if eps > 0 else 0.0
        self.release_scales = {"tau_eta": tau_eta, "eta": (sim.nu**3 / eps) ** 0.25 if eps > 0 else float("inf"),
                               "dissipation": eps, "time": sim.t}
        field = self._field(sim)
        first_id = 0
        for s in self.sets:
            rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence([self.rng_seed, 0x9A27, s.index])))
            # every rank draws the whole set and keeps its own: the same particles on any layout
            x = rng.random((s.count, 3)) * self.length
            x[x >= self.length] = 0.0
            ids = np.arange(first_id, first_id + s.count, dtype=np.int64)
            first_id += s.count
            if self.distributed:
                mine = self.blockmap.owner(x, self.h) == self.layout.rank
                x, ids = x[mine], ids[mine]
            s._alloc(x.shape[0])
            s.x[...] = x
            s.ids = ids
            self._interp(field, s, s.x, s.u_seen)
            s.resolve(tau_eta, a_eta)
            s.v[...] = s.u_seen
            s.released = True
        self.released = True
        sim.log.write(f"particles released at t={sim.t:.6g}: tau_eta={tau_eta:.4g}; "
                      + ", ".join(f"{s.name} St={s.stokes:.3g} tau_p={s.tau_p:.3g}" for s in self.sets))

    # -- one step -----------------------------------------------------------------------------
    def advance(self, sim, dt):
        """Called after the fluid step from sim.t to sim.t + dt (sim.uh is already new)."""
        if not self.released:
            if sim.t + dt >= self.release - 1e-12:
                t_save = sim.t
                sim.t = sim.t + dt
                self.seed(sim)
                sim.t = t_save
            return
        field = self._field(sim)
        if sim.step % SORT_EVERY == 0:
            self._sort_by_cell()
        for s in self.sets:
            np.copyto(s.x_start, s.x)
            self.scheme.step(s, lambda pos, out, s=s: self._interp(field, s, pos, out), dt,
                             self.length)
            if s.tau_p == 0.0:
                # a tracer's velocity is the fluid velocity where it is
                s.v[...] = s.u_seen
            # the wraps of this step into the image counters; the displacements overwrite
            # x_start unless an observer needs both
            s.disp = np.empty_like(s.x) if self.after_step else s.x_start
            integrator.track_images(s.x_start, s.x, self.length, s.image, s.disp)
        for observe in self.after_step:
            observe(sim)
        if self.distributed:
            for s in self.sets:
                history, h_prev = s.history, s.h_prev
                got = migration.migrate(self.layout, self.blockmap, self.h,
                                        {"ids": s.ids, "x": s.x, "v": s.v, "u_seen": s.u_seen,
                                         "u_prev": s.u_prev, "image": s.image})
                s._alloc(got["x"].shape[0])
                s.ids = got["ids"]
                s.x[...], s.v[...], s.u_seen[...], s.u_prev[...] = (got["x"], got["v"],
                                                                    got["u_seen"], got["u_prev"])
                s.image[...] = got["image"]
                s.history, s.h_prev = history, h_prev

    def finite(self) -> bool:
        bad = sum(int(not (np.isfinite(s.x).all() and np.isfinite(s.v).all())) for s in self.sets)
        return self._sum(bad) == 0

    # -- statistics ---------------------------------------------------------------------------
    def q_field(self, sim):
        """Second invariant Q = (||Omega||^2 - ||S||^2)/2 = -(1/2) A_ij A_ji of the velocity
        gradient A_ij = du_i/dx_j on the grid (Pope 2000, ex. 6.? ; Squires & Eaton 1991)."""
        from eddybox.solver.fluid import spectral_ops as ops

        lay = sim.layout
        a, b, q = sim.nl.u[0], sim.nl.u[1], sim.nl.w[0]
        q[...] = 0.0
        for i in range(3):
            for j in range(i, 3):
                ops.derivative_component(sim.uh, lay.kx, lay.ky, lay.kz, i, j, lay.scratch)
                lay.inverse(lay.scratch, a)
                if i == j:
                    q -= 0.5 * a * a
                    continue
                ops.derivative_component(sim.uh, lay.kx, lay.ky, lay.kz, j, i, lay.scratch)
                lay.inverse(lay.scratch, b)
                q -= a * b
        return sim.nl.w[0:1]

    def set_series(self, sim) -> dict:
        """Per set: mean kinetic energy, slip, settling velocity, <Q> at the particles."""
        out = {}
        if not self.released:
            return out
        q = self.q_field(sim)
        q_mean = float(self._sum(float(q.sum()))) / float(self.n) ** 3
        if self.distributed:
            self.ghost_q.fill(q)
            qf = (self.ghost_q.array, self.ghost_q.start)
        else:
            qf = (q, (0, 0, 0))
        for s in self.sets:
            qp = np.empty((s.x.shape[0], 1))
            self._interp_grid(qf, s, s.x, qp)
            g = s.gravity
            gn = np.linalg.norm(g)
            ghat = g / gn if gn > 0 else np.array([0.0, 0.0, -1.0])
            sums = self._sum(np.array([0.5 * np.sum(s.v**2), np.sum(np.linalg.norm(s.v - s.u_seen, axis=1)),
                                       np.sum(s.v @ ghat), np.sum(qp), float(s.x.shape[0])]))
            n = max(sums[4], 1.0)
            out[s.name] = {
                "time": sim.t,
                "kinetic_energy": float(sums[0] / n),
                "slip_velocity": float(sums[1] / n),
                "settling_velocity": float(sums[2] / n),
                "q_particles": float(sums[3] / n),
                "q_volume": q_mean,
            }
        return out

    def snapshot(self, s, max_count):
        """The first `max_count` particles of set s by id, gathered in id order (rank 0;
        None elsewhere): positions x, velocities v, the fluid velocity u_seen and the image
        counters."""
        mine = (s.ids - s.first_id) < max_count
        return migration.gather_by_id(self.layout, s.ids[mine],
                                      {"x": s.x[mine], "v": s.v[mine], "u_seen": s.u_seen[mine],
                                       "image": s.image[mine]})

    def unwrapped_sample(self, s, max_count):
        """Velocities and unwrapped positions x + image L of the first `max_count` particles
        of set s by id, in id order (rank 0; None elsewhere). Collective."""
        mine = (s.ids - s.first_id) < max_count
        g = migration.gather_by_id(self.layout, s.ids[mine],
                                   {"x": s.x[mine], "v": s.v[mine], "image": s.image[mine]})
        if g is None:
            return None
        return {"ids": g["ids"], "v": g["v"], "x": g["x"] + self.length * g["image"]}

    # -- checkpoint ---------------------------------------------------------------------------
    def state(self, sim) -> dict:
        st = {"released": np.int8(self.released)}
        for s in self.sets:
            # global id order, so any layout can restart from it
            arrays = {"x": s.x, "v": s.v, "u_seen": s.u_seen, "u_prev": s.u_prev,
                      "image": s.image}
            g = migration.gather_by_id(self.layout, s.ids, arrays)
            if g is None:
                g = dict({k: a[:0] for k, a in arrays.items()}, ids=s.ids[:0])
            st[s.name] = {"ids": g["ids"], "x": g["x"], "v": g["v"], "u_seen": g["u_seen"],
                          "u_prev": g["u_prev"], "image": g["image"],
                          "history": np.int8(s.history),
                          "h_prev": np.float64(s.h_prev),
                          "tau_p": np.float64(np.nan if s.tau_p is None else s.tau_p),
                          "stokes": np.float64(np.nan if s.stokes is None else s.stokes),
                          "gravity": s.gravity}
        st["release_scales"] = {k: np.float64(v) for k, v in self.release_scales.items()}
        return st

    def load_state(self, sim, st):
        self.released = bool(st["released"])
        self.release_scales = {k: float(v) for k, v in st.get("release_scales", {}).items()}
        for s in self.sets:
            d = dict(st[s.name])
            # a checkpoint without the multistep history restarts with one ETD2RK step
            history = bool(d.get("history", 0)) and "u_prev" in d
            d.setdefault("u_prev", d["u_seen"])
            # checkpoints of versions before the image counters: unwrapped from here on
            d.setdefault("image", np.zeros(np.shape(d["x"]), IMAGE_DTYPE))
            rows = d
            if d["x"].shape[0]:
                rows = migration.scatter_by_owner(
                    self.layout, self.blockmap, self.h, d["ids"],
                    {k: d[k] for k in ("x", "v", "u_seen", "u_prev", "image")})
            s._alloc(rows["x"].shape[0])
            s.ids = np.asarray(rows["ids"], np.int64)
            s.x[...], s.v[...], s.u_seen[...] = rows["x"], rows["v"], rows["u_seen"]
            s.u_prev[...] = rows["u_prev"]
            s.image[...] = rows["image"]
            s.history, s.h_prev = history, float(d.get("h_prev", 0.0))
            s.tau_p = None if np.isnan(d["tau_p"]) else float(d["tau_p"])
            s.stokes = None if np.isnan(d["stokes"]) else float(d["stokes"])
            s.gravity = np.asarray(d["gravity"], float)
            s.released = self.released

    def inventory(self) -> dict:
        inv = {"particles": sum(sum(a.nbytes for a in (s.x, s.v, s.u_seen, s.u_prev, s.x_start,
                                                       s.image)) + s.ids.nbytes
                                for s in self.sets)}
        if self.distributed:
            inv["ghosted_velocity"] = self.ghost_u.array.nbytes
        inv["interpolation_copy"] = self._copy.nbytes
        return inv
