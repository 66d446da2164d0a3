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
