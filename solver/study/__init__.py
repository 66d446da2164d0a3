"""Study tools: everything done with runs rather than inside one. Readers of run folders,
`check`, `inspect`, `sweep`, `report`, `estimate`, `bench` (with the particle benchmarks) and
the demo. They sit on the run machinery; only the command line imports them.

From Python, the names a user reads runs with are here, imported on first use (so that
`eddybox check` and `run` do not load them):

    import eddybox.solver.study as eb
    run = eb.load_run("runs/demo")   # config, fluid series and estimates, spectra, pair table
    g, pdfs = eb.read_pairs("runs/demo/pairs.h5", "droplets__droplets", separations=[2.0])

(README.md, "From Python").
"""

#: public name -> module of eddybox.solver.study that defines it
_PUBLIC = {"load_run": "run_results", "fluid_estimates": "run_results",
           "read_fluid_series": "readers", "read_spectra": "readers", "read_pairs": "readers",
           "read_pair_group": "readers", "list_pair_groups": "readers", "time_average": "readers",
           "wr_pdf": "readers", "pair_table": "readers",
           "collision_table": "particle_readers", "set_table": "particle_readers",
           "lagrangian_average": "particle_readers", "read_lagrangian": "particle_readers",
           "read_collision_group": "particle_readers"}

__all__ = sorted(_PUBLIC)


def __getattr__(name):
    if name not in _PUBLIC:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    import importlib

    return getattr(importlib.import_module(f"{__name__}.{_PUBLIC[name]}"), name)


def __dir__():
    return sorted(set(globals()) | set(_PUBLIC))
