"""Memory the solver allocates, computed from shapes alone (for `check` and `estimate`) and
listed from a live `Simulation` (so the two can be compared in tests)."""
from __future__ import annotations

import numpy as np

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
           "physical_velocity": 3 * phys * REAL,
           "physical_vorticity": 3 * phys * REAL}
    if cfg.fluid.dealias == "phase-shift":
        inv["phase_shift_copy"] = 3 * spec * COMPLEX
    if ranks > 1:
        from eddybox.solver.fluid.mpi_layout import transpose_buffer_points

        inv["transpose_buffers"] = transpose_buffer_points(n, ranks, layout) * COMPLEX
    p = cfg.particles
    if p.sets:
        from eddybox.particles.migration import ghost_field_bytes
        from eddybox.particles.system import bytes_per_particle

        count = sum(s.count for s in p.sets) if particles_per_rank is None else particles_per_rank
        inv["particles"] = bytes_per_particle() * count
        order = max(s.interpolation or p.interpolation for s in p.sets)
        g = ghost_field_bytes(n, order, ranks, layout, cfg.parallel.grid)
        if g:
            inv["ghosted_velocity"] = g
        pr = cfg.stats.pairs
        if pr.every is not None:
            from eddybox.particles.hooks import pair_histogram_bytes

            k = len(p.sets)
            groups = k + (k * (k - 1) // 2 if pr.cross else 0)
            inv["pair_histograms"] = pair_histogram_bytes(groups, pr.bins, pr.wr_bins)
    return inv


def live_inventory(sim) -> dict:
    """The same names, measured from the arrays of a built Simulation."""
    inv = {"velocity_hat": sim.uh.nbytes,
           "scheme_work": sum(a.nbytes for a in vars(sim.scheme).values() if isinstance(a, np.ndarray)
                              and a.ndim == 4),
           "fft_scratch": sim.layout.scratch.nbytes,
           "physical_velocity": sim.nl.u.nbytes,
           "physical_vorticity": sim.nl.w.nbytes}
    if hasattr(sim.nl, "_copy"):
        inv["phase_shift_copy"] = sim.nl._copy.nbytes
    if hasattr(sim.layout, "buffer_bytes"):
        inv["transpose_buffers"] = sim.layout.buffer_bytes()
    if sim.particles is not None:
        inv.update(sim.particles.inventory())
    for h in sim.hooks:
        inv.update(getattr(h, "inventory", dict)())
    return inv


def human_bytes(b: float) -> str:
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if abs(b) < 1024 or unit == "TiB":
            return f"{b:.1f} {unit}" if unit != "B" else f"{int(b)} B"
        b /= 1024.0
