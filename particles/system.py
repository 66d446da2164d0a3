"""Particle sets in the run loop: seeding at the release time, one ETD step per fluid step,
per-set statistics, checkpoint state.

Per step (after the fluid has advanced from t_n to t_{n+1}):
    predictor with u_n = u(x_n, t_n) (kept from the previous step)      -> x*, v*
    u* = u(x*, t_{n+1}) interpolated from the new field                  -> corrector x_{n+1}, v_{n+1}
    u(x_{n+1}, t_{n+1}) interpolated and kept for the next step's predictor
so each step costs one inverse transform of the velocity and two interpolations per particle.
See `particles.integrator` for the scheme (exact for frozen u, second order; tracers, tau_p = 0,
reduce to Heun's method, the second-order RK scheme).
"""
from __future__ import annotations

import numpy as np

from eddybox.particles import integrator, interpolation, migration
from eddybox.particles.physical import physical_numbers

#: steps between re-sorts of the particles by grid cell
SORT_EVERY = 16
#: float64 arrays of 3 components kept per particle: x, v, u_seen, x*, v*, u*; plus an int64 id
_ARRAYS_PER_PARTICLE = 6


def bytes_per_particle() -> int:
    return _ARRAYS_PER_PARTICLE * 3 * 8 + 8


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
        self.x, self.v, self.u_seen = (np.zeros((n, 3)) for _ in range(3))
        self.x_star, self.v_star, self.u_star = (np.zeros((n, 3)) for _ in range(3))

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
        self._frozen_field = None

    # -- the velocity field in physical space, as the interpolation kernels want it -----------
    def _field(self, sim):
        """The velocity for the interpolation: (array, start) of the whole grid (serial) or of
        this rank's ghosted block."""
        if sim.frozen and self._frozen_field is not None:
            return self._frozen_field
        u = sim.nl.to_physical(sim.uh)
        if self.distributed:
            self.ghost_u.fill(u)
            field = (self.ghost_u.array, self.ghost_u.start)
        else:
            field = (u, (0, 0, 0))
        if sim.frozen:
            self._frozen_field = (field[0].copy(), field[1])
            return self._frozen_field
        return field

    def _interp(self, field, s, pos, out):
        # particles are kept in cell order (see `_sort_by_cell`), so no sort inside the call
        array, start = field
        try:
            interpolation.interpolate(array, start, (self.n,) * 3, self.h, pos, s.order, out,
                                      cell_sort=False)
        except IndexError:
            from eddybox.solver.errors import NumericalInstability

            raise NumericalInstability(
                f"particles of set {s.name!r} moved more than {migration.GHOST_MARGIN} grid cells "
                "in one step, beyond the ghost layers of their rank; lower time.cfl or set "
                "time.max_dt (fast settling needs dt |v| < 2 dx)") from None

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
            for name in ("ids", "x", "v", "u_seen"):
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
            integrator.etd_predict(s.x, s.v, s.u_seen, s.tau_p, s.gravity, dt, self.length,
                                   s.x_star, s.v_star)
            self._interp(field, s, s.x_star, s.u_star)
            integrator.etd_correct(s.x, s.v, s.u_seen, s.u_star, s.tau_p, s.gravity, dt, self.length)
            self._interp(field, s, s.x, s.u_seen)
            if s.tau_p == 0.0:
                # a tracer's velocity is the fluid velocity where it is, not at the predictor
                s.v[...] = s.u_seen
        if self.distributed:
            for s in self.sets:
                got = migration.migrate(self.layout, self.blockmap, self.h,
                                        {"ids": s.ids, "x": s.x, "v": s.v, "u_seen": s.u_seen})
                s._alloc(got["x"].shape[0])
                s.ids = got["ids"]
                s.x[...], s.v[...], s.u_seen[...] = got["x"], got["v"], got["u_seen"]

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
            self._interp(qf, s, s.x, qp)
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
        None elsewhere)."""
        mine = (s.ids - s.first_id) < max_count
        return migration.gather_by_id(self.layout, s.ids[mine],
                                      {"x": s.x[mine], "v": s.v[mine], "u_seen": s.u_seen[mine]})

    # -- checkpoint ---------------------------------------------------------------------------
    def state(self, sim) -> dict:
        st = {"released": np.int8(self.released)}
        for s in self.sets:
            # global id order, so any layout can restart from it
            g = migration.gather_by_id(self.layout, s.ids, {"x": s.x, "v": s.v, "u_seen": s.u_seen})
            if g is None:
                g = {"ids": s.ids[:0], "x": s.x[:0], "v": s.v[:0], "u_seen": s.u_seen[:0]}
            st[s.name] = {"ids": g["ids"], "x": g["x"], "v": g["v"], "u_seen": g["u_seen"],
                          "tau_p": np.float64(np.nan if s.tau_p is None else s.tau_p),
                          "stokes": np.float64(np.nan if s.stokes is None else s.stokes),
                          "gravity": s.gravity}
        st["release_scales"] = {k: np.float64(v) for k, v in self.release_scales.items()}
        return st

    def load_state(self, sim, st):
        self.released = bool(st["released"])
        self.release_scales = {k: float(v) for k, v in st.get("release_scales", {}).items()}
        for s in self.sets:
            d = st[s.name]
            rows = d
            if d["x"].shape[0]:
                rows = migration.scatter_by_owner(self.layout, self.blockmap, self.h, d["ids"],
                                                  {"x": d["x"], "v": d["v"], "u_seen": d["u_seen"]})
            s._alloc(rows["x"].shape[0])
            s.ids = np.asarray(rows["ids"], np.int64)
            s.x[...], s.v[...], s.u_seen[...] = rows["x"], rows["v"], rows["u_seen"]
            s.tau_p = None if np.isnan(d["tau_p"]) else float(d["tau_p"])
            s.stokes = None if np.isnan(d["stokes"]) else float(d["stokes"])
            s.gravity = np.asarray(d["gravity"], float)
            s.released = self.released

    def inventory(self) -> dict:
        inv = {"particles": sum(sum(a.nbytes for a in (s.x, s.v, s.u_seen, s.x_star, s.v_star, s.u_star))
                                + s.ids.nbytes for s in self.sets)}
        if self.distributed:
            inv["ghosted_velocity"] = self.ghost_u.array.nbytes
        return inv
