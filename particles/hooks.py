"""Statistics hooks for particles (particles.h5) and pair statistics (pairs.h5).

Both files are created when the particles are released (their attributes, such as tau_p,
are only known then), in SWMR mode, flushed after every sample."""
from __future__ import annotations

import os
import warnings

import numpy as np

from eddybox.particles import migration
from eddybox.particles import pairs as pairs_kernel
from eddybox.particles.lagrangian import ROW_FIELDS, LagrangianCorrelator
from eddybox.solver.errors import ConfigError, OutputError
from eddybox.solver.estimators import pairs as pair_estimators
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
    """Per-set series (every `series_every`, default the fluid cadence), snapshots of the
    first `max_count` particles by id with their image counters (every `every`), and the
    Lagrangian statistics of each set (`stats.lagrangian`: the first `count` particles by id,
    every `every`; particles.lagrangian)."""

    name = "particles"

    def __init__(self, cfg, path: str, series_every, lagrangian=None):
        """`cfg`: the section stats.particles; `series_every`: its series cadence resolved
        (default the fluid series cadence); `lagrangian`: the section stats.lagrangian."""
        super().__init__(series_every, path)
        self.snap = Schedule(cfg.every)
        self.max_count = cfg.max_count
        self.lag_cfg = lagrangian
        self.lag = Schedule(None if lagrangian is None else lagrangian.every)
        self.correlators = {}  # set name -> LagrangianCorrelator (rank 0), made at the release
        self._pending_correlators = {}  # their checkpointed state, until the sets exist

    def due(self, t, step):
        return self.schedule.due(t, step) or self.snap.due(t, step) or self.lag.due(t, step)

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
                    rec[f"/sets/{s.name}/snapshots/image"] = g["image"]
            if self.file is not None:
                self.file.append(rec)
            self.snap.done(sim.t)
        if self.lag.due(sim.t, sim.step):
            rec = {}
            for s in ps.sets:
                g = ps.unwrapped_sample(s, self.lag_cfg.count)  # collective; rank 0 only
                if g is not None:
                    row = self._correlator(s).add(sim.t, g["v"], g["x"])
                    base = f"/sets/{s.name}/lagrangian"
                    rec[f"{base}/time"] = sim.t
                    rec.update({f"{base}/{k}": v for k, v in row.items()})
            if self.file is not None:
                self.file.append(rec)
            self.lag.done(sim.t)

    def _correlator(self, s):
        c = self.correlators.get(s.name)
        if c is None:
            c = self.correlators[s.name] = LagrangianCorrelator(min(self.lag_cfg.count, s.count),
                                                                self.lag_cfg.lags())
        return c

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
                                   tail=(m, 3), dims=[f"{snap}/time", f"{snap}/ids",
                                                      f"{snap}/component"]))
            fixed.append(Fixed(f"{snap}/ids", np.arange(s.first_id, s.first_id + m, dtype=np.int64), "1",
                               "ids of the particles in the snapshots (the same every time)",
                               scale="ids"))
            cols.append(Column(f"{snap}/image", "1", "periodic image counters: the unwrapped "
                               "position is position + image L", dtype=np.int32, tail=(m, 3),
                               dims=[f"{snap}/time", f"{snap}/ids", f"{snap}/component"]))
            fixed.append(Fixed(f"{snap}/component", np.arange(3, dtype=np.int64), "1",
                               "vector component: 0 x, 1 y, 2 z", scale="component"))
            if self.lag_cfg is not None and self.lag_cfg.every is not None:
                c, f, a = _lagrangian_datasets(s, self.lag_cfg,
                                               sim.particles.release_scales.get("time", sim.t))
                cols += c
                fixed += f
                gattrs[f"{base}/lagrangian"] = a
        scales = [f"/sets/{s.name}/series/time" for s in sim.particles.sets] + \
                 [f"/sets/{s.name}/snapshots/time" for s in sim.particles.sets]
        if self.lag_cfg is not None and self.lag_cfg.every is not None:
            scales += [f"/sets/{s.name}/lagrangian/time" for s in sim.particles.sets]
        return SampleFile(self.path, cols, fixed, attrs=file_attrs(sim.config.hash()),
                          group_attrs=gattrs, sample_scales=scales)

    def state(self):
        st = super().state()
        st["snapshots"] = self.snap.state()
        st["lagrangian"] = {"schedule": self.lag.state(),
                            **{name: c.state() for name, c in self.correlators.items()}}
        return st

    def load_state(self, st):
        super().load_state(st)
        self.snap.load_state(st["snapshots"])
        lag = st.get("lagrangian", {})
        if "schedule" in lag:
            self.lag.load_state(lag["schedule"])
        self._pending_correlators = {k: v for k, v in lag.items() if k != "schedule"}
        for name, c in self._pending_correlators.items():  # checked before anything is written
            if self.lag_cfg is None or self.lag_cfg.every is None or \
                    np.shape(c["v"])[0] != self.lag_cfg.lags() + 1:
                raise ValueError(f"the Lagrangian history of set {name!r} does not match "
                                 "stats.lagrangian")

    def open(self, sim, resume_samples=None):
        # the correlators of a restart: their history as the checkpoint holds it
        if sim.is_root:
            for name, st in self._pending_correlators.items():
                s = next(x for x in sim.particles.sets if x.name == name)
                self._correlator(s).load_state(st)
        self._pending_correlators = {}
        super().open(sim, resume_samples)


def _lagrangian_datasets(s, cfg, release):
    """Columns, fixed datasets and group attributes of /sets/<name>/lagrangian (the rows of
    particles.lagrangian.LagrangianCorrelator: samples x lags, vectors x components)."""
    base = f"/sets/{s.name}/lagrangian"
    time, lag, comp = f"{base}/time", f"{base}/lag", f"{base}/component"
    nl = cfg.lags() + 1
    described = {
        "count": ("1", "particles pooled at each lag (0 until the origin sample is held)"),
        "lag_time": ("T", "lag t - t_origin of each column (the actual sample times)"),
        "vv": ("L^2 T^-2", "sum over the particles of v(t) . v(t - lag)"),
        "v_start": ("L T^-1", "sum over the particles of v(t - lag), the origin velocities"),
        "v_end": ("L T^-1", "sum over the particles of v(t)"),
        "dx2": ("L^2", "sum over the particles of |X(t) - X(t - lag)|^2, X = position + image L "
                "the unwrapped position"),
        "dx": ("L", "sum over the particles of X(t) - X(t - lag)"),
    }
    cols = [Column(time, "T", "sample time", dims=[time])]
    for k, (shape, dtype) in ROW_FIELDS.items():
        u, d = described[k]
        dims = [time, lag] + ([comp] if shape else [])
        cols.append(Column(f"{base}/{k}", u, d, dtype=dtype, tail=(nl,) + shape, dims=dims))
    fixed = [Fixed(lag, cfg.every * np.arange(nl), "T", "nominal lag k every (lag_time holds "
                   "the actual one)", scale="lag"),
             Fixed(comp, np.arange(3, dtype=np.int64), "1", "vector component: 0 x, 1 y, 2 z",
                   scale="component")]
    m = min(cfg.count, s.count)
    start = (release + pair_estimators.TRANSIENT_TAU_P * _finite(s.tau_p)
             if cfg.start == "auto" else float(cfg.start))
    attrs = {"particles": m, "first_id": s.first_id, "every": cfg.every, "max_lag": cfg.max_lag,
             "window": "auto" if cfg.start == "auto" else "start", "window_start": start,
             "bytes_per_particle": 48 * nl}
    return cols, fixed, attrs


PAIR_COLUMNS = {
    "counts": ("1", "pair counts per separation bin", np.int64),
    "expected": ("1", "expected counts for uniformly distributed particles", np.float64),
    "rdf": ("1", "radial distribution function g(r) = counts / expected", np.float64),
    "wr_hist": ("1", "histogram of w_r = (v_j - v_i).r_hat per separation bin, on that bin's row "
                "of wr_edges (r-bins x w-bins)", np.int64),
    "wr_under": ("1", "pairs with w_r below the first w_r edge (also in the first w bin)", np.int64),
    "wr_over": ("1", "pairs with w_r above the last w_r edge (also in the last w bin)", np.int64),
    "wr_mean": ("L T^-1", "<w_r> per bin (NaN without pairs)", np.float64),
    "wr_sq": ("L^2 T^-2", "<w_r^2> per bin (NaN without pairs)", np.float64),
    "wr_abs": ("L T^-1", "<|w_r|> per bin (NaN without pairs)", np.float64),
    "wr_inward": ("L T^-1", "mean inward velocity <-min(w_r, 0)> per bin (NaN without pairs)",
                  np.float64),
    "wr_trans": ("L^2 T^-2", "transverse variance <(|dv|^2 - w_r^2)/2> per bin (NaN without pairs)",
                 np.float64),
    "kernel": ("L^3 T^-1", "collision kernel K(r) = 2 pi r^2 g(r) <|w_r|> (Wang, Wexler & Zhou "
               "2000), r the bin centre", np.float64),
    "eta": ("L", "Kolmogorov length (nu^3/eps)^(1/4) at the sample", np.float64),
    "tau_eta": ("T", "Kolmogorov time (nu/eps)^(1/2) at the sample", np.float64),
    "r_centres": ("L", "bin centres in simulation units at the sample", np.float64),
}
#: sums over the window in running/ (histograms and counts), and the pooled ratios written beside
RUNNING_SUMS = ("counts", "expected", "wr_hist", "wr_under", "wr_over")
RUNNING_RATIOS = ("rdf", "wr_mean", "wr_sq", "wr_abs", "wr_inward", "wr_trans", "kernel")
#: the w_r rows reach +-WR_SPAN sqrt(2) u' (plus any difference of settling velocities)
WR_SPAN = 8.0
#: at the release, separations in eta units are clipped to R_CLIP L (below L/2, leaving room for
#: eta to grow by 10 % during the run)
R_CLIP = 0.45


def clip_separations(edges_units: np.ndarray, eta: float, length: float, spacing: str):
    """Separation edges in eta units that fit the box at this eta: unchanged when r_max eta <
    R_CLIP L, else rebuilt with r_max = R_CLIP L / eta (log: r_min kept when it is below the new
    r_max, else r_max/100).  Returns (edges, message or None)."""
    limit = R_CLIP * length / eta
    r_max = float(edges_units[-1])
    if r_max < limit:
        return edges_units, None
    n = edges_units.size - 1
    if spacing == "log":
        r_min = float(edges_units[0]) if edges_units[0] < limit else limit / 100.0
        new = np.geomspace(r_min, limit, n + 1)
    else:
        new = np.linspace(float(edges_units[0]) if edges_units[0] < limit else 0.0, limit, n + 1)
    return new, (f"stats.pairs.r_max = {r_max:g} eta is {r_max * eta:.4g} in box units, beyond "
                 f"{R_CLIP} L = {R_CLIP * length:.4g} (half the box is the limit); clipped to "
                 f"{limit:.4g} eta")


class PairHook(_LazyFileHook):
    """Pair statistics of every set and, with `cross`, of every two sets, appended to
    /pairs/<a>__<b> in pairs.h5; /pairs/<group>/running holds the pooled averages over the
    averaging window (estimators.pairs).

    At the first sample (the release) the bins are fixed for the run: separations in eta units
    clipped to the box, and for each group one row of sinh-spaced w_r edges per separation bin
    (pairs_kernel.separation_wr_edges), with its core at the rms of w_r that tracers would have
    there (Batchelor's interpolation of D_LL from the measured eps, nu and u') and its far end at
    WR_SPAN sqrt(2) u'."""

    name = "pairs"

    def __init__(self, cfg, path: str, set_names, length: float, seed: int, predicted=None):
        """`cfg`: the section stats.pairs; the names of the particle sets, the box side, the
        run's seed (for the subsample draws) and the scales predicted from the config (a
        fallback for the w_r bins when the flow is at rest at the release)."""
        super().__init__(cfg.every, path)
        self.c = cfg
        self.length = length
        self.predicted = dict(predicted or {})
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
        self.wr_edges = None  # group -> (r-bins x (wr_bins + 1)), fixed at the first sample
        self.floor = {}  # group -> earliest window start (release + a few tau_p)
        self.rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence([seed, 0x5A11])))
        self.running = {}  # group -> estimators.pairs.RunningSums over the window
        self.start = {}  # group -> window start time (NaN: auto, not decided yet)
        self.transient = {}  # group -> [times, small-r g] since the release (auto)
        self.capped = False

    def _ready(self):
        return self.wr_edges is not None

    # -- bins fixed at the first sample ---------------------------------------------------------
    def _fix_bins(self, sim, eps, energy, eta):
        ps = sim.particles
        if self.c.units == "eta":
            self.edges_units, msg = clip_separations(self.edges_units, eta, self.length,
                                                     self.c.spacing)
            if msg:
                sim.log.write(f"warning: {msg}")
        if self.c.subsample_above is not None and self.c.subsample_above < self.edges_units[-1]:
            # snap once, in the configured units, so the subsampled bins never change
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                self.k_sub, _ = pairs_kernel.snap_to_edge(self.edges_units, self.c.subsample_above)
        unit = eta if self.c.units == "eta" else 1.0
        centres = pairs_kernel.bin_centres(self.edges_units * unit)
        u_rms = float(np.sqrt(2.0 * energy / 3.0))
        nu = sim.nu
        if not (eps > 0 and u_rms > 0):
            # a flow at rest: the scales the config predicts, else the particles' own velocities
            eps = self.predicted.get("target_dissipation") or 0.0
            u_rms = self.predicted.get("u_rms_estimate") or 0.0
            if not (eps > 0 and u_rms > 0):
                v = np.concatenate([s.v for s in ps.sets])
                tot = sim.layout.sum(np.array([float(np.sum(v * v)), 3.0 * v.shape[0]]))
                u_rms = float(np.sqrt(tot[0] / tot[1])) if tot[1] > 0 and tot[0] > 0 else 1.0
                eps = u_rms**3 / self.length  # any dissipation: only the shape of the rows
        core = pairs_kernel.tracer_wr_rms(centres, eps, nu, u_rms)
        sets = {s.name: s for s in ps.sets}
        self.wr_edges = {}
        for a, b in self.groups:
            sa, sb = sets[a], sets[b]
            settle = 0.0 if a == b else float(np.linalg.norm(
                _finite(sa.tau_p) * sa.gravity - _finite(sb.tau_p) * sb.gravity))
            w_max = WR_SPAN * np.sqrt(2.0) * u_rms + settle
            self.wr_edges[f"/pairs/{a}__{b}"] = pairs_kernel.separation_wr_edges(
                core, w_max, self.c.wr_bins)
            tau_p = max(_finite(sa.tau_p), _finite(sb.tau_p))
            release = ps.release_scales.get("time", sim.t)
            self.floor[f"/pairs/{a}__{b}"] = release + pair_estimators.TRANSIENT_TAU_P * tau_p

    # -- one sample -----------------------------------------------------------------------------
    def sample(self, sim):
        ps = sim.particles
        if ps is None or not ps.released:
            return
        sp = sim.spectral_stats()  # collective
        eps = sp["dissipation"]
        eta = (sim.nu**3 / eps) ** 0.25 if eps > 0 else float("inf")
        tau_eta = float(np.sqrt(sim.nu / eps)) if eps > 0 else float("inf")
        if self.c.units == "eta" and not np.isfinite(eta):
            raise ConfigError(f"stats.pairs.units: 'eta', but the flow has no dissipation at "
                              f"t = {sim.t:.6g} (eta is undefined); release the particles later "
                              "(particles.release) or use units: box")
        if self.wr_edges is None:
            self._fix_bins(sim, eps, sp["energy"], eta)
        unit = eta if self.c.units == "eta" else 1.0
        r_edges = self.edges_units * unit
        if r_edges[-1] >= 0.5 * self.length:
            # eta grew since the release: the last edge stops short of L/2 for this sample
            r_edges = r_edges.copy()
            r_edges[-1] = 0.5 * self.length * (1.0 - 1e-9)
            if r_edges[-2] >= r_edges[-1]:
                raise ConfigError(f"stats.pairs.r_max: at t = {sim.t:.6g} the separation bins "
                                  f"reach beyond half the box (eta = {eta:.4g}); lower r_max")
            if not self.capped:
                sim.log.write(f"warning: at t={sim.t:.6g} eta = {eta:.4g} puts the last "
                              "separation edge beyond L/2; it is capped there for such samples "
                              "(r_centres records each sample's centres)")
                self.capped = True
        sets = {s.name: s for s in ps.sets}
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
            g = f"/pairs/{a}__{b}"
            sub = None
            if r_sub is not None:
                sub = subsets[a] if same else (subsets[a], subsets[b])
            smp = migration.distributed_pair_statistics(
                sim.layout, ps.blockmap, self.length, r_edges, self.wr_edges[g], sa.x, sa.v,
                None if same else sb.x, None if same else sb.v, n_a_global=sa.count,
                n_b_global=None if same else sb.count, ids_a=sa.ids, ids_b=None if same else sb.ids,
                r_sub=r_sub, subsample_ids=sub)
            values = pairs_kernel.pairs_record(smp)
            values.update(eta=eta, tau_eta=tau_eta, r_centres=centres, time=sim.t,
                          subsampled=values["subsampled"].astype(np.int8))
            for k in ("time", "subsampled", *PAIR_COLUMNS):
                rec[f"{g}/{k}"] = values[k]
            self._window_sample(g, sim.t, values, eta, tau_eta)
        if self.file is not None:
            self.file.append(rec)
            for g in self.start:
                self._write_running(g)

    # -- the averaging window -------------------------------------------------------------------
    def _window_sample(self, g, t, values, eta, tau_eta):
        """Add a sample to running/ when it lies in the window; with start: auto, first decide
        the window (once) from the small-r g series, reading back its earlier samples."""
        row = {k: values[k] for k in ("wr_hist", "wr_under", "wr_over")}
        row.update(pair_estimators.pair_sums(values, values["r_centres"], eta, tau_eta))
        start = self.c.start
        if start != "auto":
            self.start[g] = float(start)
            if t >= start - 1e-9 * max(1.0, abs(start)):
                self.running.setdefault(g, pair_estimators.RunningSums()).add(row)
            return
        if np.isfinite(self.start.get(g, np.nan)):
            self.running[g].add(row)
            return
        self.start[g] = np.nan
        series = self.transient.setdefault(g, [[], []])
        r_eta = values["r_centres"] / eta if self.c.units == "box" else \
            pairs_kernel.bin_centres(self.edges_units)
        series[0].append(t)
        series[1].append(float(pair_estimators.transient_series(
            values["counts"][None], values["expected"][None], r_eta)[0]))
        win = pair_estimators.detect_window(series[0], series[1], self.floor[g])
        if not win.accepted:
            return
        # decided: the window's earlier samples are in the file (rank 0 writes it and is the
        # only rank whose running/ counts), read back, and this one is added
        self.start[g] = win.start_time
        self.transient.pop(g)
        acc = pair_estimators.RunningSums()
        if self.file is not None:
            for old in self._read_samples(g, win.start_time):
                acc.add(old)
        acc.add(row)
        self.running[g] = acc

    def _read_samples(self, g, start):
        """The rows already in the file at t >= start, as sums (estimators.pairs.pair_sums)."""
        f = self.file.f
        t = f[f"{g}/time"][...]
        keep = np.nonzero(t >= start - 1e-9 * max(1.0, abs(start)))[0]
        if not keep.size:
            return
        names = ("counts", "expected", "wr_hist", "wr_under", "wr_over", "r_centres", "eta",
                 "tau_eta", *pair_estimators.RATIOS)
        block = {k: f[f"{g}/{k}"][keep[0]:keep[-1] + 1] for k in names if k in PAIR_COLUMNS}
        for i in range(keep.size):
            rec = {k: v[i] for k, v in block.items()}
            sums = pair_estimators.pair_sums(rec, rec["r_centres"], rec["eta"], rec["tau_eta"])
            sums.update({k: rec[k] for k in ("wr_hist", "wr_under", "wr_over")})
            yield sums

    def _write_running(self, g):
        self.file.write_fixed(f"{g}/running/start_time", self.start[g])
        acc = self.running.get(g)
        if acc is None:
            return
        means = acc.means()
        for k in RUNNING_SUMS:
            self.file.write_fixed(f"{g}/running/{k}", acc.totals[k])
        for k in RUNNING_RATIOS:
            self.file.write_fixed(f"{g}/running/{k}", means[k])
        self.file.write_fixed(f"{g}/running/samples", acc.n)

    # -- the file -------------------------------------------------------------------------------
    def _build(self, sim):
        nb = len(self.edges_units) - 1
        nw = self.c.wr_bins
        cols, fixed, gattrs = [], [], {}
        scales = []
        units = "eta (Kolmogorov lengths at each sample)" if self.c.units == "eta" else "L"
        st = {s.name: s for s in sim.particles.sets}
        for a, b in self.groups:
            g = f"/pairs/{a}__{b}"
            scales.append(f"{g}/time")
            time, r, wbin, wedge = f"{g}/time", f"{g}/r", f"{g}/w_bin", f"{g}/w_edge"
            cols.append(Column(time, "T", "sample time", dims=[time]))
            for k, (u, d, dt) in PAIR_COLUMNS.items():
                if k in ("eta", "tau_eta"):
                    tail, dims = (), [time]
                elif k == "wr_hist":
                    tail, dims = (nb, nw), [time, r, wbin]
                else:
                    tail, dims = (nb,), [time, r]
                cols.append(Column(f"{g}/{k}", u, d, dtype=dt, tail=tail, dims=dims))
            cols.append(Column(f"{g}/subsampled", "1", "1 where the bin used the particle subsample",
                               dtype=np.int8, tail=(nb,), dims=[time, r]))
            fixed += [
                Fixed(r, pairs_kernel.bin_centres(self.edges_units), units,
                      "separation bin centres (geometric for log bins)", scale="r"),
                Fixed(f"{g}/r_edges", self.edges_units, units, "separation bin edges",
                      scale="r_edges"),
                Fixed(wbin, np.arange(nw, dtype=np.int64), "1", "index of the w_r bin",
                      scale="w_bin"),
                Fixed(wedge, np.arange(nw + 1, dtype=np.int64), "1", "index of the w_r edge",
                      scale="w_edge"),
                Fixed(f"{g}/wr_edges", self.wr_edges[g], "L T^-1",
                      "w_r bin edges, one row per separation bin, fixed at the release: "
                      "w = a sinh((m - n/2) du) with a the predicted rms of w_r for tracers in "
                      f"the bin and the ends at +-{WR_SPAN:g} sqrt(2) u' (sinh_wr_edges)",
                      dims=[r, wedge])]
            for k in RUNNING_SUMS + RUNNING_RATIOS:
                shape = {"wr_hist": (nb, nw)}.get(k, (nb,))
                dt = np.int64 if k in ("counts", "wr_hist", "wr_under", "wr_over") else np.float64
                what = ("sum over the samples of the window" if k in RUNNING_SUMS
                        else "pooled over the samples of the window (ratio of sums)")
                fixed.append(Fixed(f"{g}/running/{k}", np.zeros(shape, dt), PAIR_COLUMNS[k][0],
                                   f"{PAIR_COLUMNS[k][1]}: {what}",
                                   dims=[r, wbin] if k == "wr_hist" else [r]))
            fixed += [Fixed(f"{g}/running/samples", np.int64(0), "1",
                            "samples in the averaging window so far"),
                      Fixed(f"{g}/running/start_time", np.float64(np.nan), "T",
                            "start of the averaging window (NaN: start auto, not detected yet)")]
            sa, sb = st[a], st[b]
            gattrs[g] = {"set_a": a, "set_b": b, "n_a": sa.count, "n_b": sb.count,
                         "stokes_a": float(sa.stokes), "stokes_b": float(sb.stokes),
                         "tau_p_a": float(sa.tau_p), "tau_p_b": float(sb.tau_p),
                         "r_units": self.c.units, "spacing": self.c.spacing,
                         "r_max_requested": float(self.c.r_max),
                         "window": "auto" if self.c.start == "auto" else "start",
                         "window_floor": float(self.floor[g]),
                         "subsample_above": float(self.edges_units[self.k_sub]) if self.k_sub is not None else 0.0}
            if sa.physical is not None and sb.physical is not None:
                # sets given by radius: the physical Kolmogorov scales, for results in m and s
                gattrs[g].update(physical_eta=sa.physical["eta"],
                                 physical_tau_eta=sa.physical["tau_eta"])
        return SampleFile(self.path, cols, fixed, attrs=file_attrs(sim.config.hash()),
                          group_attrs=gattrs, sample_scales=scales)

    # -- checkpoints ----------------------------------------------------------------------------
    def state(self):
        st = super().state()
        st["rng"] = rng_state_array(self.rng)
        if self.wr_edges is not None:
            st["bins"] = {"edges_units": self.edges_units,
                          "k_sub": np.int64(-1 if self.k_sub is None else self.k_sub),
                          "capped": np.int8(self.capped),
                          "wr_edges": {state_key(g): e for g, e in self.wr_edges.items()},
                          "floor": {state_key(g): np.float64(v) for g, v in self.floor.items()}}
        st["window"] = {state_key(g): {"start": np.float64(self.start.get(g, np.nan)),
                                       "n": np.int64(acc.n),
                                       "totals": {k: np.asarray(v) for k, v in acc.totals.items()}}
                        for g, acc in self.running.items()}
        st["transient"] = {state_key(g): np.asarray(v, dtype=np.float64)
                           for g, v in self.transient.items()}
        return st

    def load_state(self, st):
        super().load_state(st)
        restore_rng_state(self.rng, st["rng"])
        if "bins" in st:
            b = st["bins"]
            self.edges_units = np.asarray(b["edges_units"], float)
            k = int(b["k_sub"])
            self.k_sub = None if k < 0 else k
            self.capped = bool(b["capped"])
            self.wr_edges = {state_path(g): np.asarray(e, float) for g, e in b["wr_edges"].items()}
            self.floor = {state_path(g): float(v) for g, v in b["floor"].items()}
        self.running, self.start = {}, {}
        for g, w in st.get("window", {}).items():
            g = state_path(g)
            self.running[g] = pair_estimators.RunningSums(w["totals"], int(w["n"]))
            self.start[g] = float(w["start"])
        self.transient = {state_path(g): [list(v[0]), list(v[1])]
                          for g, v in st.get("transient", {}).items()}
        for g in self.transient:
            self.start.setdefault(g, np.nan)


def _finite(x) -> float:
    """x as a float, 0 when it is None, NaN or infinite (tau_p of a set in a flow at rest)."""
    try:
        x = float(x)
    except (TypeError, ValueError):
        return 0.0
    return x if np.isfinite(x) else 0.0
