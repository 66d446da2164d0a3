"""The one place that picks the data layout of a run: serial on one process, else the MPI
slab or pencil decomposition (`mpi_layout`). Both present the same interface
(`serial_layout.SerialLayout`)."""
from __future__ import annotations

from eddybox.solver.fluid.mpi_layout import make_distributed_layout
from eddybox.solver.fluid.serial_layout import SerialLayout


def make_layout(n: int, length: float, kind: str = "auto", grid=None, comm=None,
                threads: int | None = None):
    """Build the layout for this process. Without MPI (or on one rank) this is serial."""
    size = 1 if comm is None else comm.Get_size()
    if size == 1:
        return SerialLayout(n, length, threads=threads)
    return make_distributed_layout(n, length, kind, grid, comm, threads=threads)
