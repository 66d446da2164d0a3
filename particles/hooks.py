"""Statistics hooks for particles (particles.h5) and pair statistics (pairs.h5).

Both files are created when the particles are released (their attributes, such as tau_p,
are only known then), in SWMR mode, flushed after every sample."""
from __future__ import annotations

import os

import numpy as np

from eddybox.particles import migration
from eddybox.particles import pairs as pairs_kernel
from eddybox.solver.errors import OutputError
from eddybox.solver.run.checkpoint import restore_rng_state, rng_state_array
from eddybox.solver.run.hooks import Hook, Schedule, state_key, state_path
from eddybox.solver.run.output import Column, Fixed, SampleFile, file_attrs

SET_SERIES = {
    "time": ("T", "sample time"),
    "kinetic_energy": ("L^2 T^-2", "mean particle kinetic energy <|v|^2>/2"),
    "slip_velocity": ("L T^-1", "mean slip speed <|u(x_p) - v|>"),
    "settling_velocity": ("L T^-1", "mean velocity along gravity (or -z without gravity)"),
    "q_particles": ("T^-2", "mean of Q = (||Omega||^2 - ||S||^2)/2 at the particles"),
    "q_volume": ("T^-2", "volume average of Q (zero in homogeneous flow)"),
}


class _LazyFileHook(Hook):
    """A hook whose file appears at the particle release; restores per-column counts."""

    def __init__(self, every, path):
        super().__init__(every)
        self.path = path
        self.file = None
        self._resume = None
        self._resume_counts = None

    def open(self, sim, resume_samples=None):
        # per-column counts from the checkpoint when there are any, else one count for all
        self._resume = None if resume_samples is None else (self._resume_counts or resume_samples)
        self._reopen_now(sim)

    def _reopen_now(self, sim):
        # on restart, take the file over at once (truncated to the checkpoint), so that a
        # checkpoint written before the next sample still records the right counts
        if (self._resume is not None and sim.is_root and os.path.exists(self.path)
                and sim.particles is not None and sim.particles.released and self._ready()):
            self._ensure_file(sim)

    def _ready(self):
        return True

    def verify_resume(self, sim, resume_samples):
        keep = self._resume_counts or resume_samples
        if not sim.is_root:
            return
        if not os.path.exists(self.path):
            if max(keep.values(), default=0) if isinstance(keep, dict) else keep:
                raise OutputError(f"{self.path}: missing, but the checkpoint recorded samples in "
                                  "it; restore it, or start the run again with --overwrite")
        elif sim.particles is not None and sim.particles.released and self._ready():
            self._build(sim).verify_existing(keep)

    def _ensure_file(self, sim):
        if self.file is not None or not sim.is_root:
            return
        self.file = self._build(sim)
        if self._resume is not None and os.path.exists(self.path):
            self.file.reopen(self._resume)
        else:
            self.file.create()
        self._resume = None

    def samples_written(self):
        if self.file is not None:
            return self.file.n
        pending = self._resume
        if isinstance(pending, dict):
            return min(pending.values()) if pending else 0
        return int(pending or 0)

    def _counts(self):
        if self.file is not None:
            return self.file.counts
        return self._resume if isinstance(self._resume, dict) else None

    def state(self):
        st = super().state()
        counts = self._counts()
        if counts:
            st["counts"] = {state_key(p): np.int64(n) for p, n in counts.items()}
        return st

    def load_state(self, st):
        super().load_state(st)
        self._resume_counts = {state_path(k): int(v) for k, v in st.get("counts", {}).items()}

    def close(self):
        if self.file:
            self.file.close()


class ParticleHook(_LazyFileHook):
    """Per-set series (every `series_every`, default the fluid cadence) and snapshots of the
    first `max_count` particles by id (every `every`)."""

    name = "particles"

    def __init__(self, cfg, path: str, series_every):
        """`cfg`: the section stats.particles; `series_every`: its series cadence resolved
        (default the fluid series cadence)."""
        super().__init__(series_every, path)
        self.snap = Schedule(cfg.every)
        self.max_count = cfg.max_count

    def due(self, t, step):
        return self.schedule.due(t, step) or self.snap.due(t, step)

    def run(self, sim):
        ps = sim.particles
        if ps is None or not ps.released:
            return
        self._ensure_file(sim)
        if self.schedule.due(sim.t, sim.step):
            series = ps.set_series(sim)
            if self.file is not None:
                rec = {}
                for name, values in series.items():
                    for k, v in values.items():
                        rec[f"/sets/{name}/series/{k}"] = v
                self.file.append(rec)
            self.schedule.done(sim.t)
        if self.snap.due(sim.t, sim.step):
            rec = {}
            for s in ps.sets:
                g = ps.snapshot(s, self.max_count)  # collective; the rows on rank 0 only
                if g is not None:
                    rec[f"/sets/{s.name}/snapshots/time"] = sim.t
                    rec[f"/sets/{s.name}/snapshots/position"] = g["x"]
                    rec[f"/sets/{s.name}/snapshots/velocity"] = g["v"]
                    rec[f"/sets/{s.name}/snapshots/fluid_velocity"] = g["u_seen"]
            if self.file is not None:
                self.file.append(rec)
            self.snap.done(sim.t)

    def _build(self, sim):
        cols, fixed, gattrs = [], [], {}
        for s in sim.particles.sets:
            base = f"/sets/{s.name}"
            gattrs[base] = s.attrs()
            for k, (u, d) in SET_SERIES.items():
                cols.append(Column(f"{base}/series/{k}", u, d, dims=[f"{base}/series/time"]))
            m = min(self.max_count, s.count)
            snap = f"{base}/snapshots"
            cols.append(Column(f"{snap}/time", "T", "snapshot time", dims=[f"{snap}/time"]))
            for k, desc in (("position", "particle positions in [0, L)"),
                            ("velocity", "particle velocities v"),
                            ("fluid_velocity", "fluid velocity u(x_p) at the particles")):
                cols.append(Column(f"{snap}/{k}", "L" if k == "position" else "L T^-1", desc,
                                   tail=(m, 3), dims=[f"{snap}/time"]))
            fixed.append(Fixed(f"{snap}/ids", np.arange(s.first_id, s.first_id + m, dtype=np.int64), "1",
                               "ids of the particles in the snapshots (the same every time)"))
        scales = [f"/sets/{s.name}/series/time" for s in sim.particles.sets] + \
                 [f"/sets/{s.name}/snapshots/time" for s in sim.particles.sets]
        return SampleFile(self.path, cols, fixed, attrs=file_attrs(sim.config.hash()),
                          group_attrs=gattrs, sample_scales=scales)

    def state(self):
        st = super().state()
        st["snapshots"] = self.snap.state()
        return st

    def load_state(self, st):
        super().load_state(st)
        self.snap.load_state(st["snapshots"])


PAIR_COLUMNS = {
    "counts": ("1", "pair counts per separation bin", np.int64),
    "expected": ("1", "expected counts for uniformly distributed particles", np.float64),
    "rdf": ("1", "radial distribution function g(r) = counts / expected", np.float64),
    "wr_hist": ("1", "histogram of w_r = (v_j - v_i).r_hat per separation bin (r-bins x w-bins)", np.int64),
    "wr_under": ("1", "pairs with w_r below the first w_r edge (also in the first w bin)", np.int64),
    "wr_over": ("1", "pairs with w_r above the last w_r edge (also in the last w bin)", np.int64),
    "wr_mean": ("L T^-1", "<w_r> per bin", np.float64),
    "wr_sq": ("L^2 T^-2", "<w_r^2> per bin", np.float64),
    "wr_abs": ("L T^-1", "<|w_r|> per bin", np.float64),
    "wr_inward": ("L T^-1", "mean inward velocity <-min(w_r, 0)> per bin", np.float64),
    "wr_trans": ("L^2 T^-2", "transverse variance <(|dv|^2 - w_r^2)/2> per bin", np.float64),
    "kernel": ("L^3 T^-1", "collision kernel K(r) = 2 pi r^2 g(r) <|w_r|> (Wang, Wexler & Zhou 2000)",
               np.float64),
    "eta": ("L", "Kolmogorov length at the sample", np.float64),
    "r_centres": ("L", "bin centres in simulation units at the sample", np.float64),
}
RUNNING = ("counts", "rdf", "wr_hist", "wr_sq", "wr_abs", "wr_inward", "kernel")


class PairHook(_LazyFileHook):
    """Pair statistics of every set and, with `cross`, of every two sets, appended to
    /pairs/<a>__<b> in pairs.h5; /pairs/<group>/running holds averages over all samples."""

    name = "pairs"

    def __init__(self, cfg, path: str, set_names, length: float, seed: int):
        """`cfg`: the section stats.pairs; the names of the particle sets, the box side and the
        run's seed (for the subsample draws)."""
        super().__init__(cfg.every, path)
        self.c = cfg
        self.length = length
        names = list(set_names)
        self.groups = [(a, a) for a in names]
        if cfg.cross:
            self.groups += [(a, b) for i, a in enumerate(names) for b in names[i + 1:]]
        r_max = cfg.r_max
        r_min = cfg.r_min or r_max / 100.0
        nb = cfg.bins
        self.edges_units = (np.geomspace(r_min, r_max, nb + 1) if cfg.spacing == "log"
                            else np.linspace(0.0, r_max, nb + 1))
        self.k_sub = None
        if cfg.subsample_above is not None:
            # snap once, in the configured units, so the subsampled bins never change
            import warnings

            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                self.k_sub, _ = pairs_kernel.snap_to_edge(self.edges_units, cfg.subsample_above)
        self.wr_edges = None
        self.rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence([seed, 0x5A11])))
        self.running = {}
        self.n_running = 0

    def _ready(self):
        return self.wr_edges is not None

    def sample(self, sim):
        ps = sim.particles
        if ps is None or not ps.released:
            return
        eps = sim.spectral_stats()["dissipation"]  # collective
        eta = (sim.nu**3 / eps) ** 0.25 if eps > 0 else float("inf")
        unit = eta if self.c.units == "eta" else 1.0
        r_edges = self.edges_units * unit
        if r_edges[-1] >= 0.5 * self.length:
            sim.log.write(f"pair statistics skipped at t={sim.t:.6g}: r_max = "
                          f"{r_edges[-1]:.4g} is not below L/2; lower stats.pairs.r_max")
            return
        sets = {s.name: s for s in ps.sets}
        if self.wr_edges is None:
            # w_r edges from the rms of one velocity component of all particles at the first
            # sample, kept for the whole run so histograms can be summed over samples
            v = np.concatenate([s.v for s in ps.sets])
            tot = sim.layout.sum(np.array([float(np.sum(v * v)), 3.0 * v.shape[0]]))
            rms = float(np.sqrt(tot[0] / tot[1])) if tot[1] > 0 else 1.0
            self.wr_edges = pairs_kernel.wr_edges_from_rms(rms, self.c.wr_bins)
        self._ensure_file(sim)
        r_sub = None if self.k_sub is None else r_edges[self.k_sub]
        subsets = {}
        if r_sub is not None:
            # the subset is drawn by global id, so every layout picks the same particles
            for s in ps.sets:
                m = min(self.c.subsample_count, s.count)
                subsets[s.name] = s.first_id + np.sort(self.rng.choice(s.count, size=m, replace=False))
        centres = pairs_kernel.bin_centres(r_edges)
        rec = {}
        for a, b in self.groups:
            sa, sb = sets[a], sets[b]
            same = a == b
            sub = None
            if r_sub is not None:
                sub = subsets[a] if same else (subsets[a], subsets[b])
            smp = migration.distributed_pair_statistics(
                sim.layout, ps.blockmap, self.length, r_edges, self.wr_edges, sa.x, sa.v,
                None if same else sb.x, None if same else sb.v, n_a_global=sa.count,
                n_b_global=None if same else sb.count, ids_a=sa.ids, ids_b=None if same else sb.ids,
                r_sub=r_sub, subsample_ids=sub)
            values = pairs_kernel.pairs_record(smp)
            g = f"/pairs/{a}__{b}"
            values.update(eta=eta, r_centres=centres, time=sim.t,
                          subsampled=values["subsampled"].astype(np.int8))
            for k in ("time", "subsampled", *PAIR_COLUMNS):
                rec[f"{g}/{k}"] = values[k]
            self._accumulate(g, values)
        self.n_running += 1
        if self.file is not None:
            self.file.append(rec)
            for g, acc in self.running.items():
                for k, v in acc.items():
                    self.file.write_fixed(f"{g}/running/{k}", v if k in ("counts", "wr_hist")
                                          else v / max(1, self.n_running))
                self.file.write_fixed(f"{g}/running/samples", self.n_running)

    def _accumulate(self, g, values):
        acc = self.running.setdefault(g, {})
        for k in RUNNING:
            v = np.nan_to_num(np.asarray(values[k], float)) if k not in ("counts", "wr_hist") \
                else np.asarray(values[k], np.int64)
            acc[k] = acc.get(k, 0) + v

    def _build(self, sim):
        nb = len(self.edges_units) - 1
        nw = len(self.wr_edges) - 1
        cols, fixed, gattrs = [], [], {}
        scales = []
        for a, b in self.groups:
            g = f"/pairs/{a}__{b}"
            scales.append(f"{g}/time")
            cols.append(Column(f"{g}/time", "T", "sample time", dims=[f"{g}/time"]))
            for k, (u, d, dt) in PAIR_COLUMNS.items():
                if k == "eta":
                    tail = ()
                elif k == "wr_hist":
                    tail = (nb, nw)
                else:
                    tail = (nb,)
                cols.append(Column(f"{g}/{k}", u, d, dtype=dt, tail=tail, dims=[f"{g}/time"]))
            cols.append(Column(f"{g}/subsampled", "1", "1 where the bin used the particle subsample",
                               dtype=np.int8, tail=(nb,), dims=[f"{g}/time"]))
            units = "eta (Kolmogorov lengths at each sample)" if self.c.units == "eta" else "L"
            fixed.append(Fixed(f"{g}/r_edges", self.edges_units, units, "separation bin edges"))
            fixed.append(Fixed(f"{g}/wr_edges", self.wr_edges, "L T^-1",
                               "w_r bin edges, from the particle velocity rms at the first sample"))
            for k in RUNNING:
                shape = (nb, nw) if k == "wr_hist" else (nb,)
                dt = np.int64 if k in ("counts", "wr_hist") else np.float64
                desc = ("sum over all samples so far" if k in ("counts", "wr_hist")
                        else "mean over all samples so far")
                fixed.append(Fixed(f"{g}/running/{k}", np.zeros(shape, dt), PAIR_COLUMNS[k][0],
                                   f"{PAIR_COLUMNS[k][1]}: {desc}"))
            fixed.append(Fixed(f"{g}/running/samples", np.int64(0), "1", "samples in the running averages"))
            st = {s.name: s for s in sim.particles.sets}
            gattrs[g] = {"set_a": a, "set_b": b, "n_a": st[a].count, "n_b": st[b].count,
                         "stokes_a": float(st[a].stokes), "stokes_b": float(st[b].stokes),
                         "r_units": self.c.units, "spacing": self.c.spacing,
                         "subsample_above": float(self.edges_units[self.k_sub]) if self.k_sub is not None else 0.0}
        return SampleFile(self.path, cols, fixed, attrs=file_attrs(sim.config.hash()),
                          group_attrs=gattrs, sample_scales=scales)

    def state(self):
        st = super().state()
        st["rng"] = rng_state_array(self.rng)
        if self.wr_edges is not None:
            st["wr_edges"] = self.wr_edges
        st["n_running"] = np.int64(self.n_running)
        st["running"] = {state_key(g): {k: np.asarray(v) for k, v in acc.items()} for g, acc in self.running.items()}
        return st

    def load_state(self, st):
        super().load_state(st)
        restore_rng_state(self.rng, st["rng"])
        self.wr_edges = st.get("wr_edges")
        self.n_running = int(st["n_running"])
        self.running = {state_path(g): dict(acc) for g, acc in st.get("running", {}).items()}
