"""Launching an MPI worker script from pytest: `mpiexec -n P python script.py CASES...`, whose
rank 0 prints one line `RESULT <json>`. A hang fails the test instead of the suite."""
import json
import os
import signal
import subprocess
import sys

import pytest

MPIEXEC = os.path.join(os.path.dirname(sys.executable), "mpiexec")
TIMEOUT = 120  # seconds per mpiexec launch


def run_worker(script, ranks, args, timeout=TIMEOUT):
    pytest.importorskip("mpi4py")
    if not os.path.exists(MPIEXEC):
        pytest.skip(f"no mpiexec beside {sys.executable}")
    env = dict(os.environ, EDDYBOX_THREADS="1", EDDYBOX_FFTW_EFFORT="FFTW_ESTIMATE")
    proc = subprocess.Popen([MPIEXEC, "-n", str(ranks), sys.executable, script] + list(args),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env,
                            start_new_session=True)
    try:
        out, err = proc.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)  # the group holds only this mpiexec and its ranks
        proc.communicate()
        pytest.fail(f"mpiexec -n {ranks} did not finish within {timeout} s")
    lines = [ln for ln in out.splitlines() if ln.startswith("RESULT ")]
    assert proc.returncode == 0 and lines, f"worker failed ({proc.returncode}):\n{out}\n{err}"
    return json.loads(lines[-1][len("RESULT "):])


def cached_results(script, cases):
    """A function ranks -> results of one launch per rank count (cached)."""
    cache = {}

    def get(ranks):
        if ranks not in cache:
            cache[ranks] = run_worker(script, ranks, cases[ranks])
        return cache[ranks]

    return get
