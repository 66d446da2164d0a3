"""The `Simulation`: builds layout, transforms, state, forcing, particles, hooks and writers
from a validated config, and runs the time loop.

    loop: RK stages (nonlinear term + forcing) -> forcing.end_step -> particles ->
          hooks that are due -> checkpoint when due -> stop checks

Usable from Python:
    sim = Simulation(config.load("run.yaml"), output="runs/x", overwrite=True)
    status = sim.run()      # 0 done, 75 stopped early after a checkpoint

The output folder is taken only after every check that needs no time step has passed (see
`Simulation`); `run_folder` says which folders may be replaced and holds the run's lock.
"""
from __future__ import annotations

import os
import time as _time

import numpy as np
import yaml

from eddybox.forcing import make_forcing
from eddybox.solver.errors import (
    EXIT_DONE,
    EXIT_STOPPED,
    CheckpointError,
    ConfigError,
    DiskWriteError,
    InitialFieldError,
    NumericalInstability,
    OutputError,
    OutputWriteError,
)
from eddybox.solver.fluid import fft, fluid_stats
from eddybox.solver.fluid import spectral_ops as ops
from eddybox.solver.fluid.initial import build_initial
from eddybox.solver.fluid.layout import make_layout
from eddybox.solver.fluid.navier_stokes import NonlinearTerm
from eddybox.solver.fluid.timestepping import SCHEMES
from eddybox.solver.run import checkpoint as ckpt
from eddybox.solver.run import spin_up
from eddybox.solver.run import run_folder, scales, stops
from eddybox.solver.run.config import differing_keys, restart_mutable_keys
from eddybox.solver.run.config_warnings import config_warnings
from eddybox.solver.run.hooks import FieldsHook, FluidHook, Schedule
from eddybox.solver.run.inventory import check_memory, ranks_on_this_machine
from eddybox.solver.run.output import write_error
from eddybox.solver.run.progress import Progress, RunLog

#: the measured CFL number may exceed the scheme's limit by this factor before the run stops
CFL_ALARM = 1.25


class Simulation:
    """A run, built in four phases so that nothing in the output folder is created, removed or
    changed before every check that needs no time step has passed:

    1. checks that need neither arrays nor writes: the output folder (a run in it needs
       --overwrite or --restart; --overwrite only replaces a folder eddybox made and that
       holds nothing else), its lock, and the memory the run will allocate;
    2. everything built in memory: layout, state, forcing, particles (seeded when released at
       t = 0), hooks; on a restart the checkpoint is read and verified, its state loaded, and
       every output file it continues checked read-only;
    3. the folder is taken: created and marked, locked, emptied for --overwrite, and on a
       restart later checkpoints are set aside and temporary files of killed writes removed;
    4. the log, the output files and config.yaml are written.

    A refusal in phases 1-2 (and a lost race for the lock in 3) is a ConfigError (exit 2)
    raised on every rank together. `max_memory` (bytes) replaces this machine's memory in the
    check; `started` (time.monotonic()) is when this invocation began, the origin of
    `time.walltime`."""

    def __init__(self, config, output=None, overwrite=False, restart=None, comm=None,
                 quiet=False, stream=None, max_memory=None, started=None):
        self.config = config
        self.comm = comm
        self.out = str(output or config.output)
        self.started = _time.monotonic() if started is None else started
        self.is_root = comm is None or comm.Get_rank() == 0
        self.lock = None
        self.hooks = []
        self.particles = None
        self.log = RunLog(None, quiet or not self.is_root, stream=stream, hold=self.is_root)
        try:
            self._build(overwrite, restart, max_memory)
        except BaseException:
            self.close()
            raise

    def _build(self, overwrite, restart, max_memory):
        config = self.config
        c = config.root
        comm = self.comm
        # 1. checks that change nothing
        self._check_stop()
        self._root_decides(lambda: run_folder.check_output(self.out, overwrite, restart is not None))
        ranks = 1 if comm is None else comm.Get_size()
        kind = "serial"
        if ranks > 1:
            from eddybox.solver.fluid.mpi_layout import resolve_grid

            kind, _ = resolve_grid(c.grid.points, ranks, c.parallel.layout, c.parallel.grid)
        here = ranks_on_this_machine(comm)
        self._root_decides(lambda: check_memory(config, max_memory, ranks, kind, here,
                                                fft.thread_count(here)))
        self._check_stop()  # a stop signal takes effect between the phases of the start-up

        # 2. everything in memory
        self.layout = make_layout(c.grid.points, c.grid.length, c.parallel.layout, c.parallel.grid,
                                  comm)
        fft.configure_threads(self.layout.threads)
        self.nu = c.fluid.viscosity
        self.dx = c.grid.length / c.grid.points
        self.frozen = c.fluid.frozen
        self.nl = NonlinearTerm(self.layout, c.fluid.dealias, seed=c.seed)
        self.scheme = SCHEMES[c.time.scheme](self.layout, self.nl, self.nu)
        self.uh = self.scheme.alloc()
        # times given in large-eddy turnovers ('0.5 T_E') resolved once, from the config alone
        resolved, self.eddy_times = scales.resolve_eddy_times(config)
        self.forcing = make_forcing(resolved.forcing, self.layout, c.seed)
        self._check_stop()
        self.t, self.step, self.dt, self.cfl = 0.0, 0, 0.0, 0.0
        self._frozen_umax = None
        self.restart_from = None
        self.initial_source = None
        self.wall_offset = 0.0
        self.last_checkpoint = None
        self.log.write(f"eddybox run: {config.summary()}")
        for warning in config_warnings(config):  # every warning `eddybox check` prints
            self.log.write(f"warning: {warning}")
        self.log.write(f"  {self.layout.summary()}; {self.forcing.summary()}; "
                       f"{self.nl.summary()}; output {self.out}")

        ck = restart_path = None
        if restart is not None:
            restart_path, ck = self._read_restart(restart)
            self._check_compatible(restart_path, ck[1])
        else:
            initial = c.fluid.initial
            if initial.kind == "file":
                # a spin-up's run folder stands for its newest intact checkpoint
                path = spin_up.resolve_initial_file(initial.path)
                initial = config.with_changes({"fluid.initial.path": path}).fluid.initial
                self.initial_source = spin_up.provenance(path)
                self.log.write(f"initial field from {path} (t={self.initial_source.get('time', '?')}, "
                               f"step {self.initial_source.get('step', '?')})")
                note = spin_up.forcing_note(self.initial_source, self.forcing)
                if note:
                    self.log.write(note)
            try:
                build_initial(initial, self.layout, self.nl, c.seed, self.uh)
            except InitialFieldError as exc:
                raise ConfigError(f"fluid.initial.path: {exc}") from None

        self._check_stop()
        st = c.stats
        self.hooks = [FluidHook(st.fluid.every, st.spectra.every, os.path.join(self.out, "fluid.h5")),
                      FieldsHook(st.fields.every, os.path.join(self.out, "fields"))]
        if c.particles.sets:
            from eddybox.particles.hooks import PairHook, ParticleHook
            from eddybox.particles.system import ParticleSystem

            self.particles = ParticleSystem(c.particles, c.grid, c.seed, self.layout)
            series_every = st.particles.series_every
            self.hooks.append(ParticleHook(st.particles, os.path.join(self.out, "particles.h5"),
                                           st.fluid.every if series_every is None else series_every,
                                           st.lagrangian))
            if st.pairs.every is not None:
                self.hooks.append(PairHook(st.pairs, os.path.join(self.out, "pairs.h5"),
                                           [s.name for s in c.particles.sets], c.grid.length, c.seed,
                                           scales.predicted(config)))
            if st.collisions.every is not None:
                from eddybox.particles.collisions import CollisionHook

                hook = CollisionHook(st.collisions, os.path.join(self.out, "collisions.h5"),
                                     c.particles, c.grid.length)
                self.particles.after_step.append(hook.detect)  # contacts in every step
                self.hooks.append(hook)
        every = c.checkpoint.every
        self.checkpoint_schedule = Schedule(every, start=every or 0.0)

        derived = None
        if restart_path is not None:
            resume = self._load(ck, restart_path)
            self._root_decides(lambda: [h.verify_resume(self, n) for h, n in zip(self.hooks, resume)])
        else:
            resume = [None] * len(self.hooks)
            self._check_particles_can_start()
            if self.particles is not None and self.particles.release <= 0.0:
                self.particles.seed(self)
            derived = scales.derived_block(config, self)  # collective: every rank takes part

        self._check_stop()
        # 3. take the folder, 4. the log and the output files (a stop waits until both are done)
        self.lock = self._root_decides(lambda: self._take_folder(overwrite, restart_path))
        try:
            self._root_decides(lambda: self._open_outputs(resume, derived), failure="write")
        except DiskWriteError as exc:
            raise OutputWriteError(self.write_failure(exc)) from None

    def _signal_on_any_rank(self):
        """The stop signal received by this rank or any other (collective), or None."""
        sig = stops.received()
        if self.comm is not None and self.comm.Get_size() > 1:
            sig = next((s for s in self.comm.allgather(sig) if s), None)
        return sig

    def _check_stop(self):
        """Between the steps of the start-up: every rank stops together when one has a signal."""
        sig = self._signal_on_any_rank()
        if sig:
            stops.check(sig)

    def _root_decides(self, fn, failure="usage"):
        """Run `fn` on rank 0 only and share its verdict, so that every rank stops together
        with one message: a refusal (ConfigError, CheckpointError, OutputError) raises
        ConfigError on every rank; an OSError does too, or DiskWriteError with
        failure="write" (the output files are being written)."""
        verdict = result = None
        if self.is_root:
            try:
                result = fn()
            except (ConfigError, CheckpointError, OutputError) as exc:
                verdict = ("usage", str(exc))
            except OSError as exc:
                verdict = (failure, str(exc) if isinstance(exc, DiskWriteError) else
                           f"{getattr(exc, 'filename', None) or self.out}: {exc.strerror or exc}")
        if self.comm is not None and self.comm.Get_size() > 1:
            verdict = self.comm.bcast(verdict, root=0)
        if verdict is not None:
            kind, msg = verdict
            raise ConfigError(msg) if kind == "usage" else DiskWriteError(msg)
        return result

    def _check_particles_can_start(self):
        """Sets given by a Stokes number (or radius) need tau_eta at the release; a flow at rest
        that nothing sets moving never has one. Refused here, not at the release."""
        c = self.config.root
        if self.particles is None:
            return
        need = [i for i, s in enumerate(c.particles.sets) if s.tau_p is None]
        if not need or self.energy() > 0.0:  # collective
            return
        if not self.frozen and self.forcing.moves_fluid_at_rest:
            return
        i = need[0]
        key = "stokes" if c.particles.sets[i].stokes is not None else "radius"
        why = ("the field is frozen" if self.frozen else
               f"forcing {c.forcing.kind!r} does not set a fluid at rest moving")
        raise ConfigError(f"particles.sets[{i}].{key}: the flow starts at rest "
                          f"(fluid.initial {c.fluid.initial.summary()}) and {why}, so there is no "
                          "Kolmogorov time to turn it into a response time; give tau_p instead, "
                          "or start from a moving flow")

    def _take_folder(self, overwrite, restart_path):
        lock, notes = run_folder.take(self.out, overwrite, restart_path is not None)
        try:
            if restart_path is not None:
                notes += run_folder.set_aside_after(self.out, self.step)
                notes += run_folder.remove_temporaries(self.out)
        except BaseException:
            lock.release()
            raise
        for note in notes:
            self.log.write(note)
        return lock

    def _open_outputs(self, resume, derived):
        """Phase 4 (rank 0 writes; the hooks' own `open` does nothing on other ranks)."""
        self.log.attach(os.path.join(self.out, "log.txt"))
        for h, n in zip(self.hooks, resume):
            h.open(self, n)
        if derived is not None:
            try:
                with open(os.path.join(self.out, "config.yaml"), "w") as fh:
                    fh.write(self.config.to_yaml(derived))
            except OSError as exc:
                raise write_error(os.path.join(self.out, "config.yaml"), exc) from None
        else:
            # a restart may change how long the run goes and how often it saves: the folder's
            # config.yaml says what it runs with now, so that `--out DIR --restart latest`
            # alone continues it with these settings
            self._rewrite_config_yaml()

    def _update_derived(self):
        """Rewrite the forcing's entries of the derived block in config.yaml (a calibration
        has ended), atomically: a reader sees the old file or the new one."""
        self._rewrite_config_yaml(self.forcing.derived())

    def _rewrite_config_yaml(self, derived_updates=None):
        """config.yaml with this invocation's settings and the old derived block (updated),
        replaced atomically (rank 0)."""
        if not self.is_root:
            return
        path = os.path.join(self.out, "config.yaml")
        try:
            with open(path) as fh:
                old = yaml.safe_load(fh) or {}
        except (OSError, yaml.YAMLError):
            return  # the run's own copy is gone or damaged: nothing to update
        derived = old.get("derived") if isinstance(old, dict) else None
        derived = dict(derived) if isinstance(derived, dict) else {}
        derived.update(derived_updates or {})
        data = yaml.safe_load(self.config.to_yaml(derived))
        tmp = path + f".tmp{os.getpid()}"
        try:
            with open(tmp, "w") as fh:
                fh.write(yaml.safe_dump(data, sort_keys=False))
            os.replace(tmp, path)
        except OSError as exc:
            raise write_error(path, exc) from None

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
        rec.update(self.forcing.series())
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
            notes = self.forcing.drain_notes()
            if notes:
                for note in notes:
                    self.log.write(note)
                self._update_derived()
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
        """Write a checkpoint of the current state (collective). A state that is not finite is
        never written: NumericalInstability instead, the last checkpoint stays the last good one."""
        t0 = _time.monotonic()
        if not np.isfinite(self.energy()):  # collective: NaN or inf anywhere in the field
            raise NumericalInstability(f"the velocity field is no longer finite at t={self.t:.6g} "
                                       f"(step {self.step}); no checkpoint written")
        self._check_finite()
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

    def _read_restart(self, restart):
        """(path, (velocity_hat, attrs, state)) of the checkpoint to continue from, verified.
        `latest` passes over damaged checkpoints (noted in the log) to the newest intact one."""
        if restart != "latest":
            return str(restart), ckpt.read_checkpoint(str(restart))
        folder = os.path.join(self.out, "checkpoints")
        path, ck, skipped = ckpt.latest_intact(folder)
        for bad, why in skipped:
            self.log.write(f"--restart latest: passed over {bad}: {why}")
        if path is None:
            raise ConfigError(f"--restart latest: no readable checkpoint in {folder}"
                              + (f" ({len(skipped)} damaged: {skipped[0][1]})" if skipped else ""))
        return path, ck

    def _check_compatible(self, path, attrs):
        from eddybox.solver.run.config import validate

        try:
            old = validate(yaml.safe_load(attrs["config"]))
        except (ConfigError, KeyError, TypeError, AttributeError, yaml.YAMLError) as exc:
            raise ConfigError(f"{path}: checkpoint carries no usable config ({exc})") from None
        if old.physics_hash() != self.config.physics_hash():
            keys = differing_keys(old.physics(), self.config.physics())
            raise ConfigError(f"--restart {path}: the checkpoint was written with a different "
                              f"config; differing keys: {', '.join(keys)} (only "
                              f"{', '.join(restart_mutable_keys())} may change)")

    def _load(self, ck, path) -> list:
        """Load the checkpoint's state into the objects built from the config (no file is
        touched); return the samples each hook's file holds at the checkpoint."""
        uh, attrs, state = ck
        if uh.shape != (3, self.layout.n, self.layout.n, self.layout.n // 2 + 1):
            raise ConfigError(f"--restart {path}: grid {uh.shape[1]}^3 does not match grid.points "
                              f"{self.layout.n}")
        part = "attributes"
        try:
            self.t, self.step = float(attrs["time"]), int(attrs["step"])
            self.dt, self.cfl = float(attrs["dt"]), float(attrs["cfl"])
            self.wall_offset = float(attrs.get("wall_time", 0.0))
            if not all(np.isfinite(v) for v in (self.t, self.dt, self.cfl, self.wall_offset)):
                raise ValueError("time, dt, cfl or wall_time is not finite")
            part = "forcing"
            self.forcing.load_state(state["forcing"])
            part = "checkpoint_schedule"
            self.checkpoint_schedule.load_state(state["checkpoint_schedule"])
            if self.particles is not None:
                part = "particles"
                self.particles.load_state(self, state["particles"])
            resume = []
            for h in self.hooks:
                part = f"hooks/{h.name}"
                hs = state["hooks"].get(h.name)
                if hs is None:
                    raise ConfigError(f"--restart {path}: checkpoint has no state for {h.name}")
                h.load_state(hs)
                resume.append(int(hs["samples_written"]))
        except (KeyError, ValueError, TypeError, IndexError, AttributeError) as exc:
            raise CheckpointError(f"{path}: the state of {part} cannot be used ({exc}); choose "
                                  "another checkpoint with --restart FILE") from None
        self.layout.scatter_spectral(uh, self.uh)
        self.restart_from = path
        return resume

    # ------------------------------------------------------------------ the loop
    def _finished(self):
        c = self.config.time
        if self.t >= c.end - 1e-12 * max(1.0, abs(c.end)):
            return "end time reached"
        if c.max_steps is not None and self.step >= c.max_steps:
            return "max_steps reached"
        return None

    def run(self) -> int:
        """Run to the end; return EXIT_DONE, or EXIT_STOPPED after a signal or the wall-time
        budget (a checkpoint is written first). NumericalInstability propagates; a failed
        write raises OutputWriteError naming the last good checkpoint."""
        self._t_start = _time.monotonic()
        own_handlers = stops.start_polling()
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
                # a run that has just reached its end is done, whatever stop is pending
                stop = None if self._finished() else self._stop_requested(walltime, step_times)
                if stop:
                    path = self.write_checkpoint()
                    progress.close()
                    self.log.write(f"stopped early ({stop}) at t={self.t:.6g}, step {self.step}; "
                                   f"checkpoint {path}")
                    self.log.write(f"resume with: {self.resume_command()}")
                    return EXIT_STOPPED
            self.write_checkpoint()
            progress.close()
            self.log.write(f"done: {reason} at t={self.t:.6g} after {self.step} steps, "
                           f"{self.wall_time():.1f} s wall time")
            return EXIT_DONE
        except NumericalInstability as exc:
            progress.close()
            msg = (f"numerical instability: {exc}. Try a smaller time.cfl (now "
                   f"{self.config.time.cfl}), more grid.points (now "
                   f"{self.layout.n}) or a larger fluid.viscosity (now {self.nu}). "
                   f"Last good checkpoint: {self.last_good_checkpoint() or 'none'}")
            self._log_quietly(msg)
            raise NumericalInstability(msg) from None
        except OSError as exc:
            # disk full, permissions, a vanished folder: stop with the last good checkpoint
            progress.close()
            msg = self.write_failure(exc)
            self._log_quietly(msg)
            raise OutputWriteError(msg) from None
        finally:
            if own_handlers:
                stops.uninstall()
            self.close()

    def resume_command(self) -> str:
        """The command that continues this run with its settings as they are now: the run
        folder's config.yaml holds them, overrides included."""
        return f"eddybox run --out {self.out} --restart latest"

    def last_good_checkpoint(self):
        """The newest checkpoint of the output folder that verifies (rank 0), or None."""
        if not self.is_root:
            return None
        return ckpt.latest_checkpoint(os.path.join(self.out, "checkpoints"))

    def write_failure(self, exc) -> str:
        """The one line for a failed write: what failed, where the run stopped, how to go on."""
        last = self.last_good_checkpoint()
        then = (f"then resume with: {self.resume_command()}" if last else
                f"then start again with: eddybox run {self.config.source} --out {self.out} "
                "--overwrite (nothing to resume)")
        return (f"writing output failed: {exc}. The run stopped at t={self.t:.6g} (step "
                f"{self.step}); last good checkpoint: {last or 'none'}. Free space or fix the "
                f"folder, {then}")

    def _log_quietly(self, msg):
        try:
            self.log.write(msg)
        except OSError:  # the log's own disk may be the full one
            pass

    def _check_finite(self):
        if self.particles is not None and not self.particles.finite():
            raise NumericalInstability(f"particle positions or velocities are no longer finite at "
                                       f"t={self.t:.6g} (step {self.step})")

    def _stop_requested(self, walltime, step_times):
        sig = self._signal_on_any_rank()
        if sig:
            return f"signal {sig}"
        if walltime is not None:
            # the budget of this invocation: from its start (imports and set-up included), not
            # the run's whole life across restarts
            recent = max(step_times[-5:])
            margin = 2.0 * recent + 2.0 * getattr(self, "_t_checkpoint", recent) + 1.0
            used = _time.monotonic() - self.started
            if self.layout.bcast(used + margin >= walltime):
                return f"wall-time budget {walltime:g} s (margin {margin:.1f} s)"
        return None

    def close(self):
        """Close every file and release the folder's lock (idempotent)."""
        for h in self.hooks:
            try:
                h.close()
            except OSError:
                pass  # a failed write was reported already
        if self.log:
            try:
                self.log.close()
            except OSError:
                pass
        if self.lock is not None:
            self.lock.release()
            self.lock = None
