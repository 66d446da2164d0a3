"""Statistics hooks: small objects with `due(t, step)` and `sample(sim)`, each owning its
output file. Their schedules are part of the checkpointed state (`state` / `load_state`)."""
from __future__ import annotations

import math
import os

import h5py
import numpy as np

from eddybox.solver.errors import OutputError
from eddybox.solver.fluid import fluid_stats
from eddybox.solver.fluid.field_file import checksum
from eddybox.solver.run.output import (
    Column,
    Fixed,
    SampleFile,
    discard_temporary,
    file_attrs,
    release_after_failure,
    write_error,
    write_xdmf,
)


def state_key(path: str) -> str:
    """An HDF5 dataset path as one checkpoint key ('/' would nest groups)."""
    return path.replace("/", "|")


def state_path(key: str) -> str:
    return key.replace("|", "/")


class Schedule:
    """Due at t = 0, every, 2 every, ... (the first step at or after each); `every` = 0 means
    every step, None never."""

    def __init__(self, every, start=0.0):
        self.every = every
        self.next = start

    def due(self, t, step) -> bool:
        if self.every is None:
            return False
        return self.every == 0 or t >= self.next - 1e-9 * max(self.every, 1e-300)

    def done(self, t):
        if self.every:
            self.next = (math.floor(t / self.every + 1e-9) + 1) * self.every

    def state(self):
        return {"next": np.float64(self.next)}

    def load_state(self, st):
        self.next = float(st["next"])


class Hook:
    name = "hook"

    def __init__(self, every):
        self.schedule = Schedule(every)

    def due(self, t, step):
        return self.schedule.due(t, step)

    def sample(self, sim):
        raise NotImplementedError

    def run(self, sim):
        self.sample(sim)
        self.schedule.done(sim.t)

    def open(self, sim, resume_samples=None):
        """Create the hook's file, or continue it after a restart (`resume_samples`: the
        samples the checkpoint recorded)."""

    def verify_resume(self, sim, resume_samples):
        """Before a restart changes any file: check, read-only, that `open(sim,
        resume_samples)` can continue the hook's file (OutputError naming it otherwise)."""

    def samples_written(self) -> int:
        return 0

    def state(self):
        return self.schedule.state()

    def load_state(self, st):
        self.schedule.load_state(st)

    def close(self):
        pass


class FluidHook(Hook):
    """fluid.h5: /series/<name>, one value per sample (see fluid_stats.SERIES), every
    `stats.fluid.every`; /spectra/energy and /spectra/dissipation (samples x shells) with
    /spectra/k and /spectra/time, every `stats.spectra.every`."""

    name = "fluid"

    def __init__(self, every, spectra_every, path):
        super().__init__(every)
        self.spectra = Schedule(spectra_every)
        self.path = path
        self.file = None
        self._counts = None

    def _describe(self, sim):
        # the fluid series, then those the forcing adds (e.g. the OU variance)
        self.names = {**fluid_stats.SERIES, **sim.forcing.series_columns}
        cols = [Column(f"/series/{k}", u, d, dtype=np.int64 if k == "step" else np.float64,
                       dims=["/series/time"]) for k, (u, d) in self.names.items()]
        n_sh = fluid_stats.shell_count(sim.layout)
        k = np.arange(n_sh) * sim.layout.k0
        cols += [Column("/spectra/time", "T", "time of each spectrum", dims=["/spectra/time"]),
                 Column("/spectra/energy", "L^3 T^-2",
                        "shell-summed energy spectrum E(k): energy of the modes with |k|/k0 in "
                        "[s-1/2, s+1/2), per unit wavenumber (divided by k0)",
                        tail=(n_sh,), dims=["/spectra/time", "/spectra/k"]),
                 Column("/spectra/dissipation", "L^2 T^-3",
                        "dissipation spectrum 2 nu k^2 E(k) (times k0 it sums to eps)",
                        tail=(n_sh,), dims=["/spectra/time", "/spectra/k"])]
        fixed = [Fixed("/spectra/k", k, "L^-1", "shell centre wavenumber s k0", scale="k")]
        return SampleFile(self.path, cols, fixed, attrs=file_attrs(sim.config.hash()),
                          sample_scales=["/series/time", "/spectra/time"])

    def open(self, sim, resume_samples=None):
        if not sim.is_root:
            return
        self.file = self._describe(sim)
        if resume_samples is None:
            self.file.create()
        else:
            self.file.reopen(self._counts or resume_samples)

    def verify_resume(self, sim, resume_samples):
        keep = self._counts or resume_samples
        if os.path.exists(self.path):
            self._describe(sim).verify_existing(keep)
        elif max(keep.values(), default=0) if isinstance(keep, dict) else keep:
            raise OutputError(f"{self.path}: missing, but the checkpoint recorded samples in it; "
                              "restore it, or start the run again with --overwrite")

    def due(self, t, step):
        return self.schedule.due(t, step) or self.spectra.due(t, step)

    def run(self, sim):
        if self.schedule.due(sim.t, sim.step):
            rec = sim.fluid_record()  # collective
            if self.file is not None:
                self.file.append({f"/series/{k}": rec[k] for k in self.names})
            self.schedule.done(sim.t)
        if self.spectra.due(sim.t, sim.step):
            st = sim.spectral_stats()  # collective
            if self.file is not None:
                k0 = sim.layout.k0
                k = np.arange(len(st["spectrum"])) * k0
                e = st["spectrum"] / k0
                self.file.append({"/spectra/time": sim.t, "/spectra/energy": e,
                                  "/spectra/dissipation": 2.0 * sim.nu * k**2 * e})
            self.spectra.done(sim.t)

    def samples_written(self):
        return self.file.n if self.file else 0

    def state(self):
        st = super().state()
        st["spectra"] = self.spectra.state()
        if self.file is not None:
            st["counts"] = {state_key(p): np.int64(n) for p, n in self.file.counts.items()}
        return st

    def load_state(self, st):
        super().load_state(st)
        self.spectra.load_state(st["spectra"])
        self._counts = {state_path(k): int(v) for k, v in st.get("counts", {}).items()}

    def close(self):
        if self.file:
            self.file.close()


class FieldsHook(Hook):
    """Velocity snapshots fields/field_<step>.h5 with an XDMF sidecar for ParaView.
    Datasets ux, uy, uz are stored in (z, y, x) index order (x fastest), the order XDMF
    expects for a 3DCoRectMesh; `velocity_hat` holds the global Fourier coefficients for
    restarting from the field (fluid.initial.kind: file)."""

    name = "fields"

    def __init__(self, every, folder):
        super().__init__(every)
        self.folder = folder
        self.count = 0

    def sample(self, sim):
        u = sim.layout.gather_physical(sim.nl.to_physical(sim.uh))
        uh = sim.layout.gather_spectral(sim.uh)
        if not sim.is_root:
            return
        name = f"field_{sim.step:08d}.h5"
        path = os.path.join(self.folder, name)
        tmp = path + ".tmp"
        f = None
        try:
            os.makedirs(self.folder, exist_ok=True)
            f = h5py.File(tmp, "w")
            for k, v in file_attrs(sim.config.hash()).items():
                f.attrs[k] = v
            f.attrs["time"], f.attrs["step"] = sim.t, sim.step
            for c, comp in enumerate("xyz"):
                d = f.create_dataset(f"u{comp}", data=np.ascontiguousarray(u[c].transpose(2, 1, 0)))
                d.attrs["units"] = "L T^-1"
                d.attrs["description"] = f"velocity component {comp}; index order (z, y, x)"
            d = f.create_dataset("velocity_hat", data=uh)
            d.attrs["units"] = "L T^-1"
            d.attrs["description"] = ("normalised Fourier coefficients (3, kx, ky, kz>=0) of the "
                                      "velocity, u(x) = sum_k u_k exp(i k.x)")
            d.attrs["length"] = sim.layout.length
            d.attrs["crc32"] = checksum(uh)
            f.close()
            f = None
            os.replace(tmp, path)
        except (OSError, RuntimeError) as exc:  # h5py reports a full disk either way
            release_after_failure(f)
            discard_temporary(tmp)
            raise write_error(path, exc) from None
        write_xdmf(name, path[:-3] + ".xdmf", sim.layout.n, sim.layout.length, sim.t,
                   [(f"u{c}", f"/u{c}") for c in "xyz"])
        self.count += 1
