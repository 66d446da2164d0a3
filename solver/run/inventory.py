"""Memory the solver allocates, computed from shapes alone (for `check` and `estimate`) and
listed from a live `Simulation` (so the two can be compared in tests), and the refusal of a run
that cannot fit in this machine's memory (`check_memory`, for `check` and `run`, before
anything is allocated, created or removed)."""
from __future__ import annotations

import math
import os
import re

import numpy as np

from eddybox.solver.errors import ConfigError
from eddybox.solver.fluid.navier_stokes import DEALIASING
from eddybox.solver.fluid.timestepping import SCHEMES

COMPLEX, REAL = 16, 8


def local_shapes(n: int, ranks: int = 1, layout: str = "serial", grid=None):
    """Largest local physical and Fourier block sizes (points) per rank."""
    if ranks == 1:
        return n**3, n * n * (n // 2 + 1)
    from eddybox.solver.fluid.mpi_layout import Decomposition, resolve_grid

    kind, pg = resolve_grid(n, ranks, layout, grid)
    if kind == "serial":
        return n**3, n * n * (n // 2 + 1)
    g = Decomposition(n, pg, 0)
    return int(np.prod(g.phys_shape)), int(np.prod(g.spec_shape))


def predicted_inventory(cfg, ranks: int = 1, layout: str = "serial",
                        particles_per_rank: int | None = None) -> dict:
    """name -> bytes per rank of every large array the solver allocates for the validated
    config `cfg`."""
    n = cfg.grid.points
    phys, spec = local_shapes(n, ranks, layout)
    scheme = SCHEMES[cfg.time.scheme]
    inv = {"velocity_hat": 3 * spec * COMPLEX,
           "scheme_work": 3 * scheme.extra_arrays * spec * COMPLEX,
           "fft_scratch": spec * COMPLEX,
           "fft_real_buffer": phys * REAL,
           "physical_velocity": 3 * phys * REAL,
           "physical_vorticity": 3 * phys * REAL}
    extra = DEALIASING[cfg.fluid.dealias].extra_arrays
    if extra:
        inv["phase_shift_copy"] = extra * spec * COMPLEX
    if ranks > 1:
        from eddybox.solver.fluid.mpi_layout import transpose_buffer_points

        inv["transpose_buffers"] = transpose_buffer_points(n, ranks, layout) * COMPLEX
    p = cfg.particles
    if p.sets:
        from eddybox.particles.migration import ghost_field_bytes
        from eddybox.particles.system import bytes_per_particle, interpolation_copy_bytes

        count = sum(s.count for s in p.sets) if particles_per_rank is None else particles_per_rank
        inv["particles"] = bytes_per_particle() * count
        order = max(s.interpolation or p.interpolation for s in p.sets)
        g = ghost_field_bytes(n, order, ranks, layout, cfg.parallel.grid)
        if g:
            inv["ghosted_velocity"] = g
        inv["interpolation_copy"] = interpolation_copy_bytes(n, order, ranks, layout,
                                                             cfg.parallel.grid)
        inv.update(lagrangian_inventory(cfg))
    return inv


def lagrangian_inventory(cfg) -> dict:
    """The ring buffers of stats.lagrangian (particles.lagrangian): (max_lag/every + 1)
    velocities and positions of `count` particles per set, held on rank 0 (counted here for
    every rank, the safe side of the memory check)."""
    lg = cfg.stats.lagrangian
    if lg.every is None or not cfg.particles.sets:
        return {}
    from eddybox.particles.lagrangian import history_bytes

    return {"lagrangian_history": sum(history_bytes(min(lg.count, s.count), lg.lags())
                                      for s in cfg.particles.sets)}


def live_inventory(sim) -> dict:
    """The same names, measured from the arrays of a built Simulation."""
    inv = {"velocity_hat": sim.uh.nbytes,
           "scheme_work": sum(a.nbytes for a in vars(sim.scheme).values() if isinstance(a, np.ndarray)
                              and a.ndim == 4),
           "fft_scratch": sim.layout.scratch.nbytes,
           "fft_real_buffer": (sim.layout._rbuf if hasattr(sim.layout, "_rbuf") else sim.layout._real).nbytes,
           "physical_velocity": sim.nl.u.nbytes,
           "physical_vorticity": sim.nl.w.nbytes}
    if hasattr(sim.nl, "_copy"):
        inv["phase_shift_copy"] = sim.nl._copy.nbytes
    if hasattr(sim.layout, "buffer_bytes"):
        inv["transpose_buffers"] = sim.layout.buffer_bytes()
    if sim.particles is not None:
        inv.update(sim.particles.inventory())
        held = [c.nbytes for h in sim.hooks for c in getattr(h, "correlators", {}).values()]
        if held:  # the Lagrangian ring buffers, made at the first sample after the release
            inv["lagrangian_history"] = sum(held)
    return inv


def human_bytes(b: float) -> str:
    for unit in ("B", "KiB", "MiB", "GiB", "TiB", "PiB", "EiB"):
        if abs(b) < 1024 or unit == "EiB":
            return f"{b:.1f} {unit}" if unit != "B" else f"{int(b)} B"
        b /= 1024.0


#: memory of the interpreter with numpy, scipy, numba, pyFFTW and h5py loaded, before any
#: array of the run (VmHWM of a 16^3 run without particles, measured with
#: /proc/self/status on this project's test machine: about 190 MiB; rounded up)
PROCESS_BYTES = 256 * 2**20
#: chunks of the pair kernel's private histograms (eddybox.particles.pairs: at least 32, or
#: one per numba thread when there are more)
PAIR_CHUNKS = 32


def temporary_arrays(cfg, ranks: int = 1, layout: str = "serial", threads: int = 1,
                     root: bool = True) -> dict:
    """name -> bytes per rank of the largest short-lived arrays of a run, beyond
    `predicted_inventory`: the initial field's construction (`fluid.initial`'s builder; for
    `kind: file` the global field every rank reads), on rank 0 (`root`) the global field it
    gathers for every checkpoint and the global fields of a field snapshot, the positions every
    rank draws when a set is seeded, and the histograms of one pair-statistics sample (the
    kernel's private copies per chunk, their sum, the record and the running sums of every
    group). They are never alive together: a run's peak holds the largest."""
    from eddybox.solver.fluid.initial import INITIAL_TEMPORARY

    n = cfg.grid.points
    phys, spec = local_shapes(n, ranks, layout)
    full = 3 * n * n * (n // 2 + 1) * COMPLEX
    tmp = {"initial_field": INITIAL_TEMPORARY[cfg.fluid.initial.kind](n, spec, phys)}
    if root:
        tmp["checkpoint_gather"] = full
        if cfg.stats.fields.every is not None:
            tmp["field_snapshot"] = full + 3 * n**3 * REAL  # velocity_hat and u, both global
    p = cfg.particles
    if p.sets:
        tmp["particle_seeding"] = max(s.count for s in p.sets) * (3 * REAL + 8 + 1)
        pr = cfg.stats.pairs
        if pr.every is not None:
            sets = len(p.sets)
            groups = sets + (sets * (sets - 1) // 2 if pr.cross else 0)
            h = pr.bins * pr.wr_bins * 8
            # the kernel's chunks, their sum and the sample's histogram; per group the running
            # sum, the record, (first sample) the zeros the file is created with, and its rows
            # of w_r edges (one per separation bin)
            tmp["pair_histograms"] = (h * (max(PAIR_CHUNKS, threads) + 3) + 3 * groups * h
                                      + groups * pr.bins * (pr.wr_bins + 1) * 8)
        if cfg.stats.collisions.every is not None:
            # one step's detection of the largest set: its displacements, the cell-sorted
            # positions and displacements with the cell of each particle (particles.pairs)
            tmp["collision_detection"] = max(s.count for s in p.sets) * (3 * REAL + 6 * REAL + 8)
    return tmp


#: the config key to lower for each item of the inventory
_KEYS = {"particles": "particles.sets[{set}].count", "particle_seeding": "particles.sets[{set}].count",
         "pair_histograms": "stats.pairs.bins", "lagrangian_history": "stats.lagrangian.count",
         "collision_detection": "particles.sets[{set}].count"}


def memory_needed(cfg, ranks: int = 1, layout: str = "serial", threads: int = 1,
                  root: bool = True, process_bytes: float = PROCESS_BYTES) -> dict:
    """name -> bytes of one rank at the run's peak: every lasting array, the largest temporary
    one (start-up included; rank 0, `root`, also gathers the global field for checkpoints), and
    the process itself (`process_bytes`: the interpreter, libraries and compiled kernels)."""
    total = sum(s.count for s in cfg.particles.sets)
    inv = predicted_inventory(cfg, ranks, layout, particles_per_rank=-(-total // ranks)
                              if cfg.particles.sets else None)
    tmp = temporary_arrays(cfg, ranks, layout, threads, root)
    largest = max(tmp, key=tmp.get)
    return dict(inv, **{largest: tmp[largest]}, process=process_bytes)


def machine_memory() -> int:
    """Bytes of memory this process may use: the physical memory, or a smaller cgroup limit
    (batch systems confine jobs with one)."""
    try:
        limit = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):  # pragma: no cover - not Linux
        limit = 2**62
    for path in ("/sys/fs/cgroup/memory.max", "/sys/fs/cgroup/memory/memory.limit_in_bytes"):
        try:
            with open(path) as fh:
                text = fh.read().strip()
        except OSError:
            continue
        if text.isdigit() and 0 < int(text) < limit:
            limit = int(text)
    return limit


_UNITS = {"": 1, "b": 1, "k": 2**10, "kib": 2**10, "m": 2**20, "mib": 2**20, "g": 2**30,
          "gib": 2**30, "t": 2**40, "tib": 2**40, "p": 2**50, "pib": 2**50, "kb": 10**3,
          "mb": 10**6, "gb": 10**9, "tb": 10**12, "pb": 10**15}


def parse_size(text, option="--max-memory") -> int:
    """Bytes from '64GiB', '64G' (powers of 1024), '64GB' (powers of 1000) or plain bytes."""
    m = re.fullmatch(r"\s*([0-9]*\.?[0-9]+(?:[eE][+-]?[0-9]+)?)\s*([A-Za-z]*)\s*", str(text))
    unit = m.group(2).lower() if m else None
    if not m or unit not in _UNITS:
        raise ConfigError(f"{option}: expected a size such as 64GiB, 512MiB or 2TB, got {text!r}")
    value = float(m.group(1)) * _UNITS[unit]
    if not math.isfinite(value) or not 2**20 <= value <= 2**60:
        raise ConfigError(f"{option}: expected a size from 1 MiB to 1024 PiB, got {text!r}")
    return int(value)


def check_memory(cfg, limit: int | None = None, ranks: int = 1, layout: str = "serial",
                 ranks_here: int = 1, threads: int = 1):
    """ConfigError naming the key to lower when the run would need more memory than `limit`
    bytes (default `machine_memory()`): `ranks_here` ranks on this machine, each needing
    `memory_needed`."""
    need = memory_needed(cfg, ranks, layout, threads)
    total = sum(need.values())
    if ranks_here > 1:  # rank 0 and ranks_here - 1 others, which gather nothing
        total += (ranks_here - 1) * sum(memory_needed(cfg, ranks, layout, threads, root=False).values())
    given = limit is not None
    limit = machine_memory() if limit is None else limit
    if total <= limit:
        return
    if given and limit < PROCESS_BYTES * ranks_here:
        raise ConfigError(f"--max-memory: {human_bytes(limit)} is less than eddybox itself needs "
                          f"({human_bytes(PROCESS_BYTES)} per process before any array)")
    biggest = max((k for k in need if k != "process"), key=need.get)
    sets = cfg.particles.sets
    key = _KEYS.get(biggest, "grid.points").format(
        set=max(range(len(sets)), key=lambda i: sets[i].count) if sets else 0)
    if biggest == "pair_histograms":
        key = "stats.pairs.bins / stats.pairs.wr_bins"
    where = (f"{ranks_here} ranks on this machine need" if ranks_here > 1 else "the run needs")
    have = f"--max-memory {human_bytes(limit)}" if given else f"this machine's {human_bytes(limit)}"
    raise ConfigError(f"{key}: {where} {human_bytes(total)} of memory, more than {have} "
                      f"(largest part: {biggest} {human_bytes(need[biggest])} per process); "
                      f"lower {key}, or give --max-memory SIZE on a machine with more memory")


def ranks_on_this_machine(comm) -> int:
    """MPI ranks sharing this machine's memory with this one (collective; 1 without MPI)."""
    if comm is None or comm.Get_size() == 1:
        return 1
    from mpi4py import MPI

    node = comm.Split_type(MPI.COMM_TYPE_SHARED)
    try:
        return node.Get_size()
    finally:
        node.Free()
