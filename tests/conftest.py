"""Shared fixtures. Tests run the numba kernels and FFTs on one thread so that results are
deterministic and MPI tests (several ranks on 2 cores) do not oversubscribe the machine."""
import atexit
import os
import shutil
import tempfile

os.environ.setdefault("EDDYBOX_THREADS", "1")
os.environ.setdefault("EDDYBOX_FFTW_EFFORT", "FFTW_ESTIMATE")
# a cache of the session's own (FFTW wisdom, the cost-model calibration `check` measures): the
# tests neither read the user's calibration nor write into the user's cache
os.environ["XDG_CACHE_HOME"] = tempfile.mkdtemp(prefix="eddybox-test-cache-")
atexit.register(shutil.rmtree, os.environ["XDG_CACHE_HOME"], True)

import pytest  # noqa: E402

from eddybox.solver.run.config import validate  # noqa: E402


def make_config(tmp_path, **sections):
    """A small valid config; keyword arguments replace whole top-level sections."""
    raw = {"name": "t", "output": str(tmp_path / "run"), "seed": 7,
           "grid": {"points": 16},
           "fluid": {"viscosity": 0.05, "initial": {"kind": "taylor-green"}},
           "time": {"scheme": "rk4", "cfl": 0.5, "end": 0.2},
           "stats": {"fluid": {"every": None}, "spectra": {"every": None}},
           "forcing": {"kind": "none"}}
    for k, v in sections.items():
        raw[k] = v
    return validate(raw)


@pytest.fixture
def config_factory(tmp_path):
    return lambda **kw: make_config(tmp_path, **kw)


#: the shared 48^3 tracer run (tests/test_pair_tracers.py, tests/test_tracer_collisions.py)
TRACER_RELEASE = 4.0


@pytest.fixture(scope="session")
def tracers48(tmp_path_factory):
    """Fluid tracers in stationary forced turbulence at 48^3 (Re_lambda ~ 30), one run shared by
    the modules that need it: forced from t = 0, 40000 tracers released at t = 4 (the energy
    is stationary by t ~ 4-6, see tests/test_fluid_core.py) and followed to t = 20 (8 T_L):
    pair statistics every 0.4 (separations from 0.35 eta to 0.49 L in box units, beyond 5 eta
    on a subsample), contacts at R = 0.75 eta in every step (sampled every 0.1), Lagrangian
    statistics of 4000 of them every 0.1 to lags of 6 (3 T_L). About 40 s on one core.
    Returns the run folder."""
    from eddybox.solver.run.simulation import Simulation

    tmp = tmp_path_factory.mktemp("tracers48")
    release = TRACER_RELEASE
    cfg = make_config(
        tmp, name="tracers48", seed=3, grid={"points": 48},
        fluid={"viscosity": 0.015, "initial": {"kind": "spectrum", "energy": 0.3, "peak": 2}},
        forcing={"kind": "ou", "band": 2.0, "timescale": 0.3, "dissipation": 0.1},
        time={"scheme": "rk4", "cfl": 0.7, "end": 20.0},
        particles={"release": release, "interpolation": 6,
                   "sets": [{"name": "tracers", "tau_p": 0.0, "count": 40000}]},
        stats={"fluid": {"every": 0.1}, "spectra": {"every": None},
               "pairs": {"every": 0.4, "r_max": 3.1, "r_min": 0.025, "bins": 24, "units": "box",
                         "spacing": "log", "subsample_above": 0.4, "subsample_count": 4000,
                         "start": release},
               "collisions": {"every": 0.1, "radius": 0.75, "units": "eta", "start": release},
               "lagrangian": {"every": 0.1, "max_lag": 6.0, "count": 4000, "start": release}})
    sim = Simulation(cfg, overwrite=True, quiet=True)
    assert sim.run() == 0
    return sim.out
