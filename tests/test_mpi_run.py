"""The same config under mpiexec gives the serial answers (spawned from pytest)."""
import os
import shutil
import subprocess
import sys

import h5py
import numpy as np
import pytest
import yaml

pytest.importorskip("mpi4py")
MPIEXEC = os.path.join(os.path.dirname(sys.executable), "mpiexec")
if not os.path.exists(MPIEXEC):  # pragma: no cover
    MPIEXEC = shutil.which("mpiexec")
pytestmark = pytest.mark.skipif(MPIEXEC is None, reason="no mpiexec")

CFG = {"name": "mpi-run", "seed": 8, "grid": {"points": 16},
       "fluid": {"viscosity": 0.03, "initial": {"kind": "spectrum", "energy": 0.5, "peak": 2}},
       "forcing": {"kind": "ou", "band": 2.0, "timescale": 0.5, "dissipation": 0.1},
       "time": {"scheme": "rk4", "cfl": 0.6, "end": 0.8},
       "particles": {"release": 0.2, "interpolation": 6,
                     "sets": [{"name": "heavy", "stokes": 1.0, "count": 600},
                              {"name": "tracers", "tau_p": 0.0, "count": 600}]},
       "stats": {"fluid": {"every": 0.05}, "spectra": {"every": 0.2},
                 "pairs": {"every": 0.2, "r_max": 1.2, "bins": 6, "spacing": "linear", "units": "box",
                           "wr_bins": 11, "cross": True},
                 "particles": {"every": 0.4, "max_count": 100},
                 "collisions": {"every": 0.1, "radius": 0.3, "units": "box", "cross": True},
                 "lagrangian": {"every": 0.1, "max_lag": 0.3, "count": 50}},
       "checkpoint": {"every": 0.3, "keep": 5}}


def _run(tmp, ranks, out, *extra, check=True):
    path = tmp / "cfg.yaml"
    if not path.exists():
        path.write_text(yaml.safe_dump(CFG))
    cmd = [sys.executable, "-m", "eddybox.solver.cli", "run", str(path), "--out", str(out), "--quiet", *extra]
    if ranks > 1:
        cmd = [MPIEXEC, "-n", str(ranks)] + cmd
    env = dict(os.environ, EDDYBOX_THREADS="1")
    r = subprocess.run(cmd, capture_output=True, text=True, timeout=600, env=env)
    if check:
        assert r.returncode == 0, r.stderr[-3000:]
    return r


def _series(out):
    with h5py.File(os.path.join(out, "fluid.h5"), "r") as f:
        return {k: f["series"][k][...] for k in ("time", "energy", "dissipation", "skewness")}


def _particles(out):
    with h5py.File(os.path.join(out, "particles.h5"), "r") as f:
        return {n: f[f"sets/{n}/snapshots/position"][...] for n in ("heavy", "tracers")}


def _pairs(out):
    with h5py.File(os.path.join(out, "pairs.h5"), "r") as f:
        return {g: (f[f"pairs/{g}/counts"][...], f[f"pairs/{g}/wr_hist"][...]) for g in f["pairs"]}


def _contacts(out):
    with h5py.File(os.path.join(out, "collisions.h5"), "r") as f:
        return {g: f[f"collisions/{g}/collisions"][...] for g in f["collisions"]}


def _lagrangian(out):
    with h5py.File(os.path.join(out, "particles.h5"), "r") as f:
        return {n: (f[f"sets/{n}/lagrangian/vv"][...], f[f"sets/{n}/lagrangian/dx2"][...])
                for n in ("heavy", "tracers")}


@pytest.fixture(scope="module")
def serial(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("mpiserial")
    _run(tmp, 1, tmp / "serial")
    return tmp, tmp / "serial"


def _assert_same(a, b):
    sa, sb = _series(a), _series(b)
    assert np.array_equal(sa["time"].shape, sb["time"].shape)
    for k in sa:
        np.testing.assert_allclose(sb[k], sa[k], rtol=1e-10, atol=1e-14)
    pa, pb = _particles(a), _particles(b)
    for k in pa:
        d = (pb[k] - pa[k] + np.pi) % (2 * np.pi) - np.pi
        assert np.abs(d).max() < 1e-10
    qa, qb = _pairs(a), _pairs(b)
    assert qa.keys() == qb.keys()
    for g in qa:
        assert np.array_equal(qa[g][0], qb[g][0]) and np.array_equal(qa[g][1], qb[g][1]), g
    # detected collisions exactly, as the pair counts (contacts in every step, over the ranks)
    ca, cb = _contacts(a), _contacts(b)
    assert ca.keys() == cb.keys() and sum(v.sum() for v in ca.values()) > 20
    for g in ca:
        assert np.array_equal(ca[g], cb[g]), g
    la, lb = _lagrangian(a), _lagrangian(b)
    for n in la:  # sums over particles gathered by id: the positions agree to round-off
        for x, y in zip(la[n], lb[n]):
            np.testing.assert_allclose(y, x, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("ranks,extra", [
    (2, ["--set", "parallel.layout=slab"]),
    (2, ["--set", "parallel.layout=pencil", "--set", "parallel.grid=[1,2]"]),
    (2, ["--set", "parallel.layout=pencil", "--set", "parallel.grid=[2,1]"]),
    (4, ["--set", "parallel.layout=pencil", "--set", "parallel.grid=[2,2]"]),
], ids=["slab2", "pencil1x2", "pencil2x1", "pencil2x2"])
def test_parallel_run_equals_serial(serial, tmp_path, ranks, extra):
    tmp, ref = serial
    out = tmp_path / "par"
    _run(tmp, ranks, out, *extra)
    _assert_same(ref, out)


def test_checkpoint_on_two_ranks_restarts_on_one_and_four(serial, tmp_path):
    tmp, ref = serial
    first = tmp_path / "two"
    _run(tmp, 2, first, "--set", "parallel.layout=slab", "--set", "time.max_steps=12")
    for ranks in (1, 4):
        out = tmp_path / f"cont{ranks}"
        shutil.copytree(first, out)
        _run(tmp, ranks, out, "--restart", "latest", "--set", "time.max_steps=null")
        _assert_same(ref, out)


def test_impossible_rank_request_fails_cleanly_on_every_rank(serial, tmp_path):
    tmp, _ = serial
    r = _run(tmp, 2, tmp_path / "bad", "--set", "parallel.grid=[3,1]", "--set", "parallel.layout=pencil",
             check=False)
    assert r.returncode == 2
    assert "parallel.grid" in r.stderr and "Traceback" not in r.stderr
    assert r.stderr.count("error") == 1  # one message, from rank 0
    assert not (tmp_path / "bad").exists()


def test_stage_shift_run_is_layout_independent(serial, tmp_path):
    # the random grid shifts come from (seed, step), the same on every rank: a pencil 2x2
    # run of stage-shift dealiasing gives the serial answers
    tmp, _ = serial
    extra = ["--set", "fluid.dealias=stage-shift", "--set", "time.end=0.4"]
    _run(tmp, 1, tmp_path / "one", *extra)
    _run(tmp, 4, tmp_path / "four", *extra, "--set", "parallel.layout=pencil",
         "--set", "parallel.grid=[2,2]")
    _assert_same(tmp_path / "one", tmp_path / "four")
