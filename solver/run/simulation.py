"""The `Simulation`: builds layout, transforms, state, forcing, particles, hooks and writers
from a validated config, and runs the time loop.

    loop: RK stages (nonlinear term + forcing) -> forcing.end_step -> particles ->
          hooks that are due -> checkpoint when due -> stop checks

Usable from Python:
    sim = Simulation(config.load("run.yaml"), output="runs/x", overwrite=True)
    status = sim.run()      # 0 done, 75 stopped early after a checkpoint
"""
from __future__ import annotations

import os
import shutil
import signal
import time as _time

import numpy as np
import yaml

from eddybox.forcing import make_forcing
from eddybox.solver.errors import (
    EXIT_DONE,
    EXIT_STOPPED,
    ConfigError,
    InitialFieldError,
    NumericalInstability,
    OutputWriteError,
)
from eddybox.solver.fluid import fft, fluid_stats
from eddybox.solver.fluid import spectral_ops as ops
from eddybox.solver.fluid.initial import build_initial
from eddybox.solver.fluid.layout import make_layout
from eddybox.solver.fluid.navier_stokes import NonlinearTerm
from eddybox.solver.fluid.timestepping import SCHEMES, spectral_cfl_bound
from eddybox.solver.run import checkpoint as ckpt
from eddybox.solver.run import scales
from eddybox.solver.run.config import differing_keys, restart_mutable_keys
from eddybox.solver.run.hooks import FieldsHook, FluidHook, Schedule
from eddybox.solver.run.progress import Progress, RunLog

#: the measured CFL number may exceed the scheme's limit by this factor before the run stops
CFL_ALARM = 1.25


def prepare_output(out, overwrite: bool, restart: bool):
    """Refuse to mix runs: an existing non-empty folder needs --overwrite or --restart."""
    out = str(out)
    if os.path.exists(out) and not os.path.isdir(out):
        raise ConfigError(f"{out}: output path exists and is not a folder")
    exists = os.path.isdir(out) and any(os.scandir(out))
    if restart:
        if not exists:
            raise ConfigError(f"--restart: output folder {out} has no run to continue")
        return
    if exists and not overwrite:
        raise ConfigError(f"{out}: output folder exists and is not empty; use --overwrite to "
                          "replace it or --restart latest to continue it")
    if exists:
        shutil.rmtree(out)
    os.makedirs(out, exist_ok=True)


class Simulation:
    def __init__(self, config, output=None, overwrite=False, restart=None, comm=None,
                 quiet=False, stream=None):
        self.config = config
        c = config.root
        self.comm = comm
        self.out = str(output or config.output)
        self.layout = make_layout(c.grid.points, c.grid.length, c.parallel.layout, c.parallel.grid,
                                  comm)
        self.is_root = self.layout.rank == 0
        fft.configure_threads(self.layout.threads)
        self.nu = c.fluid.viscosity
        self.dx = c.grid.length / c.grid.points
        self.frozen = c.fluid.frozen
        self.nl = NonlinearTerm(self.layout, c.fluid.dealias)
        self.scheme = SCHEMES[c.time.scheme](self.layout, self.nl, self.nu)
        self.uh = self.scheme.alloc()
        self.forcing = make_forcing(c.forcing, self.layout, c.seed)
        self.t, self.step, self.dt, self.cfl = 0.0, 0, 0.0, 0.0
        self._frozen_umax = None
        self._stop_signal = None
        self.restart_from = None
        self.wall_offset = 0.0

        restart_path = None
        if restart is not None:
            restart_path = self._resolve_restart(restart)
            ck = ckpt.read_checkpoint(restart_path)
            self._check_compatible(restart_path, ck[1])
        else:
            try:
                build_initial(c.fluid.initial, self.layout, self.nl, c.seed, self.uh)
            except InitialFieldError as exc:
                raise ConfigError(f"fluid.initial.path: {exc}") from None
        # the folder check runs on rank 0; its verdict reaches every rank, so all stop together
        error = None
        if self.is_root:
            try:
                prepare_output(self.out, overwrite, restart is not None)
            except ConfigError as exc:
                error = str(exc)
        error = self.layout.bcast(error)
        if error:
            raise ConfigError(error)
        self.log = RunLog(os.path.join(self.out, "log.txt") if self.is_root else None, quiet or not self.is_root,
                          stream=stream)
        self.log.write(f"eddybox run: {config.summary()}")
        bound = spectral_cfl_bound(SCHEMES[c.time.scheme])
        if c.time.cfl > bound:
            self.log.write(f"warning: time.cfl = {c.time.cfl} is above {bound:.2f}, the "
                           "stability bound for pseudo-spectral advection; the run may become unstable")
        self.log.write(f"  {self.layout.summary()}; {self.forcing.summary()}; dealias "
                       f"{c.fluid.dealias}; output {self.out}")

        st = c.stats
        self.hooks = [FluidHook(st.fluid.every, st.spectra.every, os.path.join(self.out, "fluid.h5")),
                      FieldsHook(st.fields.every, os.path.join(self.out, "fields"))]
        self.particles = None
        if c.particles.sets:
            from eddybox.particles.hooks import PairHook, ParticleHook
            from eddybox.particles.system import ParticleSystem

            self.particles = ParticleSystem(c.particles, c.grid, c.seed, self.layout)
            series_every = st.particles.series_every
            self.hooks.append(ParticleHook(st.particles, os.path.join(self.out, "particles.h5"),
                                           st.fluid.every if series_every is None else series_every))
            if st.pairs.every is not None:
                self.hooks.append(PairHook(st.pairs, os.path.join(self.out, "pairs.h5"),
                                           [s.name for s in c.particles.sets], c.grid.length, c.seed,
                                           scales.predicted(config)))
        every = c.checkpoint.every
        self.checkpoint_schedule = Schedule(every, start=every or 0.0)

        if restart_path is not None:
            self._load(ck, restart_path)
        else:
            if self.particles is not None and self.particles.release <= 0.0:
                self.particles.seed(self)
            for h in self.hooks:
                h.open(self, None)
            derived = scales.derived_block(config, self)  # collective: every rank takes part
            if self.is_root:
                with open(os.path.join(self.out, "config.yaml"), "w") as fh:
                    fh.write(config.to_yaml(derived))

    # ------------------------------------------------------------------ state and statistics
    def energy(self) -> float:
        return self.layout.sum(float(ops.energy_sum(self.uh, self.layout.wz)))

    def spectral_stats(self):
        return fluid_stats.spectral_statistics(self.uh, self.layout, self.nu)

    def fluid_record(self) -> dict:
        sp = self.spectral_stats()
        der = fluid_stats.derivative_statistics(self.uh, self.layout, self.nl.w[0])
        rec = {"time": self.t, "step": self.step, "dt": self.dt, "energy": sp["energy"],
               "dissipation": sp["dissipation"], "injection": self.forcing.power,
               "cfl": self.cfl, "energy_x": sp["components"][0], "energy_y": sp["components"][1],
               "energy_z": sp["components"][2], "wall_time": self.wall_time()}
        rec.update(fluid_stats.derived_scales(sp["energy"], sp["dissipation"], sp["inv_k"], self.nu,
                                              self.nl.kmax()))
        rec.update(der)
        return rec

    def wall_time(self) -> float:
        return self.wall_offset + (_time.monotonic() - self._t_start if hasattr(self, "_t_start") else 0.0)

    # ------------------------------------------------------------------ time stepping
    def _choose_dt(self, umax: float) -> float:
        c = self.config.time
        if not np.isfinite(umax):
            raise NumericalInstability(
                f"the velocity field is no longer finite at t={self.t:.6g} (step {self.step})")
        limit = SCHEMES[c.scheme].cfl_limit
        if self.dt > 0 and umax * self.dt / self.dx > CFL_ALARM * limit:
            # the last step's dt against the new velocity: a jump this large within one step
            # only comes from an instability (or a blow-up of the forcing)
            raise NumericalInstability(
                f"CFL number {umax * self.dt / self.dx:.3g} of the last step exceeded the limit "
                f"{limit} of scheme {c.scheme} by more than {100 * (CFL_ALARM - 1):.0f}% at "
                f"t={self.t:.6g} (step {self.step}; max |u|+|v|+|w| = {umax:.4g}, dt = {self.dt:.4g})")
        dt = c.cfl * self.dx / umax if umax > 1e-300 else (c.max_dt or c.cfl * self.dx)
        if c.max_dt is not None:
            dt = min(dt, c.max_dt)
        if self.t + dt > c.end:
            dt = max(c.end - self.t, 1e-300)  # land on the end time exactly
        self.cfl = dt * umax / self.dx
        return dt

    def advance(self):
        """One time step of the fluid (unless frozen) and of the particles."""
        if self.frozen:
            if self._frozen_umax is None:
                u = self.nl.to_physical(self.uh)
                self._frozen_umax = float(self.layout.max(np.abs(u).sum(axis=0).max()))
            dt = self._choose_dt(self._frozen_umax)
        else:
            dt = self.scheme.step(self.uh, self.forcing, self._choose_dt, self)
            self.forcing.end_step(self, dt)
        self.dt = dt
        if self.particles is not None:
            self.particles.advance(self, dt)
        self.t += dt
        self.step += 1

    def _run_due_hooks(self):
        for h in self.hooks:
            if h.due(self.t, self.step):
                h.run(self)

    # ------------------------------------------------------------------ checkpoints
    def state(self) -> dict:
        st = {"forcing": self.forcing.state(), "checkpoint_schedule": self.checkpoint_schedule.state(),
              "hooks": {}}
        for h in self.hooks:
            hs = h.state()
            hs["samples_written"] = np.int64(h.samples_written())
            st["hooks"][h.name] = hs
        if self.particles is not None:
            st["particles"] = self.particles.state(self)
        return st

    def write_checkpoint(self) -> str | None:
        t0 = _time.monotonic()
        uh = self.layout.gather_spectral(self.uh)
        state = self.state()
        path = None
        if self.is_root:
            attrs = {"time": self.t, "step": self.step, "dt": self.dt, "cfl": self.cfl,
                     "physics_hash": self.config.physics_hash(), "wall_time": self.wall_time(),
                     "config": yaml.safe_dump(self.config.data, sort_keys=False),
                     "layout": self.layout.kind}
            path = ckpt.write_checkpoint(os.path.join(self.out, "checkpoints"), self.step, uh, attrs,
                                         state, self.config.hash(), self.layout.length,
                                         self.config.checkpoint.keep)
        self.layout.barrier()
        self._t_checkpoint = max(getattr(self, "_t_checkpoint", 0.0), _time.monotonic() - t0)
        self.last_checkpoint = path
        return path

    def _resolve_restart(self, restart):
        if restart == "latest":
            folder = os.path.join(self.out, "checkpoints")
            path = ckpt.latest_checkpoint(folder)
            if path is None:
                raise ConfigError(f"--restart latest: no readable checkpoint in {folder}")
            return path
        return str(restart)

    def _check_compatible(self, path, attrs):
        from eddybox.solver.run.config import validate

        try:
            old = validate(yaml.safe_load(attrs["config"]))
        except (ConfigError, KeyError, yaml.YAMLError) as exc:
            raise ConfigError(f"{path}: checkpoint carries no usable config ({exc})") from None
        if old.physics_hash() != self.config.physics_hash():
            keys = differing_keys(old.physics(), self.config.physics())
            raise ConfigError(f"--restart {path}: the checkpoint was written with a different "
                              f"config; differing keys: {', '.join(keys)} (only "
                              f"{', '.join(restart_mutable_keys())} may change)")

    def _load(self, ck, path):
        uh, attrs, state = ck
        if uh.shape != (3, self.layout.n, self.layout.n, self.layout.n // 2 + 1):
            raise ConfigError(f"--restart {path}: grid {uh.shape[1]}^3 does not match grid.points "
                              f"{self.layout.n}")
        self.layout.scatter_spectral(uh, self.uh)
        self.t, self.step = float(attrs["time"]), int(attrs["step"])
        self.dt, self.cfl = float(attrs["dt"]), float(attrs["cfl"])
        self.wall_offset = float(attrs.get("wall_time", 0.0))
        self.forcing.load_state(state["forcing"])
        self.checkpoint_schedule.load_state(state["checkpoint_schedule"])
        if self.particles is not None:
            self.particles.load_state(self, state["particles"])
        for h in self.hooks:
            hs = state["hooks"].get(h.name)
            if hs is None:
                raise ConfigError(f"--restart {path}: checkpoint has no state for {h.name}")
            h.load_state(hs)
            h.open(self, int(hs["samples_written"]))
        self.restart_from = path

    # ------------------------------------------------------------------ the loop
    def _on_signal(self, signum, frame):
        self._stop_signal = signal.Signals(signum).name

    def _install_signals(self):
        self._old_handlers = {}
        if hasattr(signal, "SIGUSR1"):
            sigs = (signal.SIGTERM, signal.SIGINT, signal.SIGUSR1)
        else:  # pragma: no cover
            sigs = (signal.SIGTERM, signal.SIGINT)
        try:
            for s in sigs:
                self._old_handlers[s] = signal.signal(s, self._on_signal)
        except ValueError:  # not in the main thread: leave the handlers alone
            self._old_handlers = {}

    def _restore_signals(self):
        for s, h in self._old_handlers.items():
            signal.signal(s, h)

    def _finished(self):
        c = self.config.time
        if self.t >= c.end - 1e-12 * max(1.0, abs(c.end)):
            return "end time reached"
        if c.max_steps is not None and self.step >= c.max_steps:
            return "max_steps reached"
        return None

    def run(self) -> int:
        """Run to the end; return EXIT_DONE, or EXIT_STOPPED after a signal or the wall-time
        budget (a checkpoint is written first). NumericalInstability propagates."""
        self._t_start = _time.monotonic()
        self._install_signals()
        progress = Progress(self.log, self.config.time.end, self)
        walltime = self.config.time.walltime
        step_times = []
        try:
            if self.restart_from is None:
                self._run_due_hooks()
            else:
                self.log.write(f"continuing from {self.restart_from} at t={self.t:.6g}, step {self.step}")
            while True:
                reason = self._finished()
                if reason:
                    break
                t0 = _time.monotonic()
                self.advance()
                self._check_finite()
                self._run_due_hooks()
                if self.checkpoint_schedule.due(self.t, self.step) and not self._finished():
                    self.write_checkpoint()
                    self.checkpoint_schedule.done(self.t)
                step_times.append(_time.monotonic() - t0)
                progress.update()
                stop = self._stop_requested(walltime, step_times)
                if stop:
                    path = self.write_checkpoint()
                    progress.close()
                    self.log.write(f"stopped early ({stop}) at t={self.t:.6g}, step {self.step}; "
                                   f"checkpoint {path}")
                    self.log.write(f"resume with: eddybox run {self.config.source} --out {self.out} "
                                   "--restart latest")
                    return EXIT_STOPPED
            self.write_checkpoint()
            progress.close()
            self.log.write(f"done: {reason} at t={self.t:.6g} after {self.step} steps, "
                           f"{self.wall_time():.1f} s wall time")
            return EXIT_DONE
        except NumericalInstability as exc:
            progress.close()
            last = ckpt.latest_checkpoint(os.path.join(self.out, "checkpoints"))
            msg = (f"numerical instability: {exc}. Try a smaller time.cfl (now "
                   f"{self.config.time.cfl}), more grid.points (now "
                   f"{self.layout.n}) or a larger fluid.viscosity (now {self.nu}). "
                   f"Last good checkpoint: {last or 'none'}")
            self.log.write(msg)
            raise NumericalInstability(msg) from None
        except OSError as exc:
            # disk full, permissions, a vanished folder: stop with the last good checkpoint
            progress.close()
            last = ckpt.latest_checkpoint(os.path.join(self.out, "checkpoints"))
            msg = (f"writing output failed: {exc}. The run stopped at t={self.t:.6g} (step "
                   f"{self.step}); last good checkpoint: {last or 'none'}. Free space or fix the "
                   "folder, then resume with --restart latest")
            try:
                self.log.write(msg)
            except OSError:
                pass
            raise OutputWriteError(msg) from None
        finally:
            self._restore_signals()
            self.close()

    def _check_finite(self):
        if self.particles is not None and not self.particles.finite():
            raise NumericalInstability(f"particle positions or velocities are no longer finite at "
                                       f"t={self.t:.6g} (step {self.step})")

    def _stop_requested(self, walltime, step_times):
        sig = self.layout.bcast(self._stop_signal)
        if sig:
            return f"signal {sig}"
        if walltime is not None:
            recent = max(step_times[-5:])
            margin = 2.0 * recent + 2.0 * getattr(self, "_t_checkpoint", recent) + 1.0
            if self.layout.bcast(self.wall_time() + margin >= walltime):
                return f"wall-time budget {walltime:g} s (margin {margin:.1f} s)"
        return None

    def close(self):
        for h in self.hooks:
            h.close()
        if self.log:
            self.log.close()
