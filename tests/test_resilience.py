"""Runs that survive: bitwise restart, signals, wall time, SIGKILL, blow-ups, write failures."""
import os
import signal
import subprocess
import sys
import time

import h5py
import numpy as np
import pytest
import yaml

from eddybox.solver.cli import main

OUTPUT_FILES = ("fluid.h5", "particles.h5", "pairs.h5", "collisions.h5")

FULL = {"name": "resilient", "seed": 13, "grid": {"points": 16},
        "fluid": {"viscosity": 0.03, "initial": {"kind": "spectrum", "energy": 0.5, "peak": 2}},
        "forcing": {"kind": "ou", "band": 2.0, "timescale": 0.5, "dissipation": 0.1},
        "time": {"scheme": "rk4", "cfl": 0.6, "end": 1.5},
        "particles": {"release": 0.05, "interpolation": 4,
                      "sets": [{"name": "heavy", "stokes": 1.0, "count": 400},
                               {"name": "tracers", "tau_p": 0.0, "count": 400}]},
        "stats": {"fluid": {"every": 0.05}, "spectra": {"every": 0.2},
                  "pairs": {"every": 0.05, "r_max": 1.0, "bins": 6, "spacing": "linear", "units": "box",
                            "wr_bins": 11, "cross": True, "subsample_above": 0.6, "subsample_count": 200},
                  "particles": {"every": 0.3, "max_count": 50}, "fields": {"every": 0.5},
                  "collisions": {"every": 0.1, "radius": 0.3, "units": "box", "cross": True},
                  "lagrangian": {"every": 0.05, "max_lag": 0.3, "count": 40}},
        "checkpoint": {"every": 0.25, "keep": 3}}

FLUID_ONLY = {"name": "resilient-fluid", "seed": 2, "grid": {"points": 16},
              "fluid": {"viscosity": 0.03, "initial": {"kind": "spectrum", "energy": 0.5, "peak": 2}},
              "forcing": {"kind": "reinject", "band": 2.0, "mode": "energy"},
              "time": {"scheme": "rk3", "cfl": 0.6, "end": 1.0},
              "stats": {"fluid": {"every": 0.05}, "spectra": {"every": 0.25}},
              "checkpoint": {"every": 0.3, "keep": 2}}


def _write(tmp_path, cfg, name="run.yaml"):
    p = tmp_path / name
    p.write_text(yaml.safe_dump(cfg))
    return p


def _datasets(path):
    out = {}
    with h5py.File(path, "r", swmr=True) as f:
        def visit(name, obj):
            if isinstance(obj, h5py.Dataset) and not name.endswith("wall_time"):
                out[name] = obj[...]
        f.visititems(visit)
    return out


def assert_same_outputs(a, b):
    """Every output dataset of run folder a equals b bit for bit (numpy.array_equal)."""
    compared = 0
    for name in OUTPUT_FILES:
        pa, pb = os.path.join(a, name), os.path.join(b, name)
        assert os.path.exists(pa) == os.path.exists(pb), name
        if not os.path.exists(pa):
            continue
        da, db = _datasets(pa), _datasets(pb)
        assert da.keys() == db.keys(), name
        for k in da:
            assert da[k].shape == db[k].shape, (name, k)
            assert np.array_equal(da[k], db[k], equal_nan=True), (name, k)
            compared += 1
    assert compared > 0


def _cli(*args):
    return subprocess.Popen([sys.executable, "-m", "eddybox.solver.cli", *map(str, args)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """Uninterrupted runs of both configs."""
    tmp = tmp_path_factory.mktemp("reference")
    out = {}
    for cfg in (FULL, FLUID_ONLY):
        path = _write(tmp, cfg, cfg["name"] + ".yaml")
        assert main(["run", str(path), "--out", str(tmp / cfg["name"]), "--quiet"]) == 0
        out[cfg["name"]] = (path, tmp / cfg["name"])
    return out


@pytest.mark.parametrize("name,stop_at", [("resilient", 17), ("resilient-fluid", 9)])
def test_bitwise_restart_after_max_steps(reference, tmp_path, name, stop_at):
    path, ref_dir = reference[name]
    out = tmp_path / "b"
    assert main(["run", str(path), "--out", str(out), "--quiet", "--set", f"time.max_steps={stop_at}"]) == 0
    assert main(["run", str(path), "--out", str(out), "--quiet", "--restart", "latest",
                 "--set", "time.max_steps=null"]) == 0
    assert_same_outputs(ref_dir, out)
    with h5py.File(out / "fluid.h5") as f:
        steps = f["series/step"][...]
    assert np.all(np.diff(steps) > 0)  # no duplicated samples after the restart
    if name == "resilient":  # the pair window (start: auto) was decided during the run
        with h5py.File(out / "pairs.h5") as f:
            assert np.isfinite(f["pairs/tracers__tracers/running/start_time"][()])


def test_restart_refuses_changed_physics(reference, tmp_path, capsys):
    path, ref_dir = reference["resilient-fluid"]
    out = tmp_path / "c"
    assert main(["run", str(path), "--out", str(out), "--quiet", "--set", "time.max_steps=5"]) == 0
    code = main(["run", str(path), "--out", str(out), "--restart", "latest", "--set", "grid.points=24",
                 "--set", "fluid.viscosity=0.02"])
    msg = capsys.readouterr().err
    assert code == 2 and "grid.points" in msg and "fluid.viscosity" in msg and "Traceback" not in msg
    # extending the run is allowed
    assert main(["run", str(path), "--out", str(out), "--quiet", "--restart", "latest",
                 "--set", "time.end=1.2"]) == 0


def _wait_for_samples(path, n, timeout=120):
    t0 = time.time()
    while time.time() - t0 < timeout:
        try:
            with h5py.File(path, "r", swmr=True) as f:
                if f["series/time"].shape[0] >= n:
                    return
        except (OSError, KeyError):
            pass
        time.sleep(0.05)
    raise AssertionError(f"{path} did not reach {n} samples")


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT])
def test_signal_checkpoints_and_resume_equals_uninterrupted(reference, tmp_path, sig):
    path, ref_dir = reference["resilient"]
    out = tmp_path / "s"
    p = _cli("run", path, "--out", out, "--quiet")
    _wait_for_samples(out / "fluid.h5", 8)
    p.send_signal(sig)
    _, err = p.communicate(timeout=120)
    assert p.returncode == 75, err
    log = (out / "log.txt").read_text()
    assert "--restart latest" in log and f"signal {signal.Signals(sig).name}" in log
    assert list((out / "checkpoints").glob("checkpoint_*.h5"))
    assert main(["run", str(path), "--out", str(out), "--quiet", "--restart", "latest"]) == 0
    assert_same_outputs(ref_dir, out)


def test_walltime_budget_stops_with_75(tmp_path):
    cfg = dict(FLUID_ONLY, time={"scheme": "rk3", "cfl": 0.6, "end": 1e6, "walltime": "00:00:03"})
    path = _write(tmp_path, cfg)
    t0 = time.time()
    p = _cli("run", path, "--out", tmp_path / "w", "--quiet")
    _, err = p.communicate(timeout=120)
    assert p.returncode == 75, err
    assert "wall-time budget" in (tmp_path / "w" / "log.txt").read_text()
    assert list((tmp_path / "w" / "checkpoints").glob("checkpoint_*.h5"))
    assert time.time() - t0 < 60


def _all_readable(folder):
    for name in OUTPUT_FILES:
        p = os.path.join(folder, name)
        if os.path.exists(p):
            _datasets(p)  # every dataset of every file reads (SWMR reader after a kill)


def test_sigkill_at_random_moments(reference, tmp_path):
    path, ref_dir = reference["resilient"]
    out = tmp_path / "k"
    rng = np.random.default_rng(2026)
    restart = []
    for i in range(10):
        p = _cli("run", path, "--out", out, "--quiet", *restart)
        if not restart:
            # the first kill comes after the first checkpoint, so that there is one to resume
            t0 = time.time()
            while not list((out / "checkpoints").glob("checkpoint_*.h5")) if (out / "checkpoints").exists() else True:
                assert time.time() - t0 < 120 and p.poll() is None
                time.sleep(0.02)
        time.sleep(rng.uniform(0.2, 2.5))
        if p.poll() is not None:  # finished before the kill: start over from a checkpoint
            assert p.returncode == 0, p.communicate()[1]
        else:
            p.kill()
            p.communicate()
        _all_readable(out)
        restart = ["--restart", "latest"]
    p = _cli("run", path, "--out", out, "--quiet", "--restart", "latest")
    _, err = p.communicate(timeout=300)
    assert p.returncode == 0, err
    _all_readable(out)
    assert_same_outputs(ref_dir, out)


def test_instability_exit_3_keeps_checkpoint(tmp_path, capsys):
    # RK4 is stable up to 2.83 on the imaginary axis; with spherical truncation the largest
    # advective eigenvalue is sqrt(2) 2 pi/3 per unit CFL, so cfl = 2.8 is valid but too large
    # (linear stability of RK schemes, e.g. Canuto et al. 1988 sec. 4.7; common practice)
    cfg = {"name": "unstable", "grid": {"points": 16}, "seed": 1,
           "fluid": {"viscosity": 0.001, "initial": {"kind": "spectrum", "energy": 1.0, "peak": 4},
                     "dealias": "phase-shift"},
           "forcing": {"kind": "ou", "band": 2.0, "timescale": 1.0, "dissipation": 1.0},
           "time": {"scheme": "rk4", "cfl": 2.8, "end": 30.0},
           "stats": {"fluid": {"every": 0.1}}, "checkpoint": {"every": 0.5}}
    path = _write(tmp_path, cfg)
    code = main(["run", str(path), "--out", str(tmp_path / "u"), "--quiet"])
    err = capsys.readouterr().err
    assert code == 3
    assert "time.cfl" in err and "grid.points" in err and "viscosity" in err and "Traceback" not in err
    ck = sorted((tmp_path / "u" / "checkpoints").glob("checkpoint_*.h5"))
    assert ck
    with h5py.File(ck[-1]) as f:
        assert np.all(np.isfinite(f["velocity_hat"][...]))
    _all_readable(tmp_path / "u")


def test_write_failure_stops_cleanly_previous_checkpoint_intact(tmp_path, capsys, monkeypatch):
    import errno

    import eddybox.solver.run.checkpoint as ck

    real = ck.h5py.File
    calls = {"n": 0}

    def failing(name, mode="r", *a, **kw):
        if mode == "w" and ".tmp" in str(name):
            calls["n"] += 1
            if calls["n"] == 2:
                raise OSError(errno.ENOSPC, "No space left on device", str(name))
        return real(name, mode, *a, **kw)

    monkeypatch.setattr(ck.h5py, "File", failing)
    path = _write(tmp_path, FLUID_ONLY)
    code = main(["run", str(path), "--out", str(tmp_path / "f"), "--quiet"])
    monkeypatch.setattr(ck.h5py, "File", real)
    err = capsys.readouterr().err
    assert code == 1 and "No space left" in err and "Traceback" not in err
    files = sorted(os.listdir(tmp_path / "f" / "checkpoints"))
    assert len(files) == 1 and files[0].startswith("checkpoint_") and files[0].endswith(".h5")
    with h5py.File(tmp_path / "f" / "checkpoints" / files[0]) as f:
        assert f["velocity_hat"].shape == (3, 16, 16, 9)
    _all_readable(tmp_path / "f")


def test_repair_makes_killed_files_plainly_readable(reference, tmp_path, capsys):
    path, ref_dir = reference["resilient"]
    out = tmp_path / "r"
    # a late end time, so the run is surely still going when it is killed
    p = _cli("run", path, "--out", out, "--quiet", "--set", "time.end=50")
    _wait_for_samples(out / "fluid.h5", 12)
    time.sleep(0.3)
    p.kill()
    p.communicate()
    before = {n: _datasets(out / n) for n in OUTPUT_FILES if (out / n).exists()}
    with pytest.raises(OSError):
        h5py.File(out / "fluid.h5", "r")  # HDF5 refuses a plain open after a killed SWMR writer
    assert main(["inspect", str(out), "--repair"]) == 0
    assert "repaired" in capsys.readouterr().out
    for n, data in before.items():
        with h5py.File(out / n, "r") as f:  # plain readers work again, data unchanged
            for k, v in data.items():
                assert np.array_equal(f[k][...], v, equal_nan=True), (n, k)
    xr = pytest.importorskip("xarray")
    pytest.importorskip("h5netcdf")
    with xr.open_dataset(out / "fluid.h5", engine="h5netcdf", group="series", phony_dims="access") as ds:
        assert ds["energy"].dims == ("time",)
    # and the run still resumes from its checkpoint (for two more steps)
    with h5py.File(sorted((out / "checkpoints").glob("*.h5"))[-1]) as f:
        step = int(f.attrs["step"])
    assert main(["run", str(path), "--out", str(out), "--quiet", "--restart", "latest",
                 "--set", "time.end=50", "--set", f"time.max_steps={step + 2}"]) == 0
