"""Never lose a user's data: one regression test per failure found by trying eddybox as a
careless user and as a failing cluster job would (tests/test_adversarial.py holds the catalogue
of single refusals and injected write failures). Here: what needs a real process (a live run's
lock, signals, a real full disk, MPI) or several runs in a row (restarts)."""
import os
import shutil
import signal
import subprocess
import sys
import time

import h5py
import numpy as np
import pytest
import yaml

from eddybox.solver.cli import main

FLUID = {"name": "safe", "seed": 3, "grid": {"points": 16},
         "fluid": {"viscosity": 0.03, "initial": {"kind": "spectrum", "energy": 0.5, "peak": 2}},
         "forcing": {"kind": "ou", "band": 2.0, "timescale": 0.5, "dissipation": 0.1},
         "time": {"scheme": "rk3", "cfl": 0.6, "end": 1.0},
         "stats": {"fluid": {"every": 0.05}, "spectra": {"every": 0.25}},
         "checkpoint": {"every": 0.1, "keep": 20}}
#: a run that goes on until it is stopped (at most 1000 steps a second at 16^3)
ENDLESS = ["--set", "time.end=1e6", "--set", "time.max_dt=0.001"]


def _write(tmp_path, cfg=FLUID, name="run.yaml"):
    path = tmp_path / name
    path.write_text(yaml.safe_dump(cfg))
    return path


def _cli(*args, **kw):
    env = dict(os.environ, EDDYBOX_THREADS="1", EDDYBOX_FFTW_EFFORT="FFTW_ESTIMATE")
    return subprocess.Popen([sys.executable, "-m", "eddybox.solver.cli", *map(str, args)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env, **kw)


def _series(path):
    with h5py.File(path, "r", swmr=True) as f:
        return {k: f["series"][k][...] for k in f["series"] if k != "wall_time"}


def _wait(predicate, proc, timeout=120):
    t0 = time.monotonic()
    while not predicate():
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() - t0 < timeout, "timed out"
        time.sleep(0.02)


def _catches(pid, sig) -> bool:
    """True once process `pid` has a handler for `sig` (SigCgt in /proc/<pid>/status)."""
    try:
        with open(f"/proc/{pid}/status") as fh:
            mask = next(int(ln.split()[1], 16) for ln in fh if ln.startswith("SigCgt:"))
    except (OSError, StopIteration):
        return False
    return bool(mask & (1 << (sig - 1)))


def _one_line(text):
    lines = [ln for ln in text.strip().splitlines() if ln.strip()]
    assert len(lines) == 1 and "Traceback" not in text, text
    return lines[0]


# --- grid.length 1e-300: the cause of "double free or corruption" -------------------------------
def test_shell_spectrum_kernel_ignores_non_finite_wavenumbers():
    # At grid.length 1e-300, k0 = 2 pi / L = 6e300 and k^2 overflows to inf; int() of an
    # infinite shell index is undefined in compiled code and gave a huge negative index, so
    # the kernel wrote far outside `shells` (heap corruption, exit 134). The shell index is
    # now compared as a float first; modes with a non-finite |k| fall in no shell.
    from eddybox.solver.fluid.spectral_ops import spectral_moments

    n = 4
    uh = np.ones((3, n, n, n // 2 + 1), complex)
    k = np.array([0.0, 1.0, np.inf, np.nan])
    guard = np.full(16, 7.0)
    shells = guard[4:10]  # a view: a stray write would show in the guard cells around it
    spectral_moments(uh, k, k, k[:3], np.ones(3), 1.0, shells.size, shells, np.zeros(3))
    assert np.all(guard[:4] == 7.0) and np.all(guard[10:] == 7.0)
    assert np.all(np.isfinite(shells)) and shells.sum() > 0


def test_box_below_the_config_bounds_fails_cleanly(tmp_path):
    # the Simulation built directly below grid.length's bound (1e-6), as the crash showed it
    script = tmp_path / "tiny_box.py"
    script.write_text(f"""
import sys
from eddybox.solver.errors import NumericalInstability
from eddybox.solver.run import config
config.GridConfig.length.lo = 0.0
cfg = config.validate({{"grid": {{"points": 16, "length": 1e-300}}, "time": {{"end": 0.1}},
                       "stats": {{"fluid": {{"every": None}}, "spectra": {{"every": None}}}}}})
from eddybox.solver.run.simulation import Simulation
try:
    Simulation(cfg, output={str(tmp_path / 'tiny')!r}, quiet=True).run()
except NumericalInstability:
    print("clean stop")
""")
    r = subprocess.run([sys.executable, "-W", "ignore", str(script)], capture_output=True, text=True,
                       env=dict(os.environ, EDDYBOX_THREADS="1"), timeout=120)
    assert r.returncode == 0 and "clean stop" in r.stdout, (r.returncode, r.stderr[-2000:])


# --- a live run's lock -------------------------------------------------------------------------------
def test_live_run_holds_its_folder(tmp_path, capsys):
    path = _write(tmp_path)
    out = tmp_path / "live"
    p = _cli("run", path, "--out", out, "--quiet", *ENDLESS)
    try:
        _wait(lambda: (out / "checkpoints").is_dir() and any((out / "checkpoints").glob("*.h5")), p)
        before = {f: f.read_bytes() for f in (out / "checkpoints").glob("*.h5")}
        for argv in (["run", path, "--out", out], ["run", path, "--out", out, "--overwrite"],
                     ["run", path, "--out", out, "--restart", "latest"],
                     ["inspect", out, "--repair"], ["inspect", out / "fluid.h5", "--repair"]):
            assert main([str(a) for a in argv]) == 2
            line = _one_line(capsys.readouterr().err)
            assert f"PID {p.pid}" in line and "kill -TERM" in line, line
        for f, data in before.items():
            assert f.read_bytes() == data
        assert main(["inspect", str(out)]) == 0
        text = capsys.readouterr().out
        assert f"running (PID {p.pid}" in text and "killed" not in text
    finally:
        p.send_signal(signal.SIGTERM)
        _, err = p.communicate(timeout=120)
    assert p.returncode == 75, err
    # its samples are all there: nothing else wrote to its files
    s = _series(out / "fluid.h5")
    assert np.all(np.diff(s["step"]) > 0)
    assert main(["inspect", str(out)]) == 0 and "running" not in capsys.readouterr().out


# --- restarts ------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("reference")
    path = _write(tmp)
    assert main(["run", str(path), "--out", str(tmp / "ref"), "--quiet"]) == 0
    return path, tmp / "ref"


def _restart(path, out, *extra):
    return main(["run", str(path), "--out", str(out), "--quiet", "--restart", *extra])


def test_restart_from_an_older_checkpoint_sets_the_later_ones_aside(reference, tmp_path):
    path, ref = reference
    out = tmp_path / "b"
    shutil.copytree(ref, out)
    cks = sorted((out / "checkpoints").glob("checkpoint_*.h5"))
    with h5py.File(cks[5]) as f:
        mid = int(f.attrs["step"])
    # back to the third checkpoint, to run only as far as the sixth this time
    assert _restart(path, out, str(cks[2]), "--set", f"time.max_steps={mid}") == 0
    log = (out / "log.txt").read_text()
    assert "moved" in log and "set-aside" in log
    aside = list((out / "checkpoints").glob("set-aside-*/checkpoint_*.h5"))
    assert {p.name for p in aside} == {p.name for p in cks[3:]}  # kept, out of the way
    # a later --restart latest continues this run, not the abandoned future (which ended at
    # t = 1: before, latest took it and reported "done" with the samples cut short)
    assert _restart(path, out, "latest", "--set", "time.max_steps=null") == 0
    assert f"continuing from {out / 'checkpoints' / cks[5].name}" in (out / "log.txt").read_text()
    a, b = _series(ref / "fluid.h5"), _series(out / "fluid.h5")
    assert a.keys() == b.keys()
    for k in a:  # bit for bit the uninterrupted run, every sample once
        assert np.array_equal(a[k], b[k]), k


def test_latest_passes_over_a_damaged_checkpoint(reference, tmp_path, capsys):
    path, ref = reference
    out = tmp_path / "c"
    assert main(["run", str(path), "--out", str(out), "--quiet", "--set", "time.max_steps=12"]) == 0
    cks = sorted((out / "checkpoints").glob("checkpoint_*.h5"))
    with h5py.File(cks[-1], "r") as f:
        off, size = f["velocity_hat"].id.get_offset(), f["velocity_hat"].id.get_storage_size()
    with open(cks[-1], "r+b") as fh:  # one flipped bit in the velocity field
        fh.seek(off + size // 3)
        b = fh.read(1)
        fh.seek(off + size // 3)
        fh.write(bytes([b[0] ^ 0x01]))
    # the damaged file itself is refused, naming it
    assert _restart(path, out, str(cks[-1]), "--set", "time.max_steps=null") == 2
    assert cks[-1].name in _one_line(capsys.readouterr().err)
    # latest passes over it (and says so) and the run ends as the uninterrupted one
    (out / "checkpoints" / (cks[-2].name + ".tmp12345")).write_bytes(b"half a checkpoint")
    assert _restart(path, out, "latest", "--set", "time.max_steps=null") == 0
    log = (out / "log.txt").read_text()
    assert f"passed over {cks[-1]}" in log and "checksum" in log
    assert "removed 1 temporary file" in log
    assert not list((out / "checkpoints").glob("*.tmp*"))
    a, b = _series(ref / "fluid.h5"), _series(out / "fluid.h5")
    for k in a:
        assert np.array_equal(a[k], b[k]), k


def test_non_finite_state_is_never_checkpointed(tmp_path):
    from eddybox.solver.errors import NumericalInstability
    from eddybox.solver.run import config
    from eddybox.solver.run.checkpoint import latest_checkpoint
    from eddybox.solver.run.simulation import Simulation

    cfg = config.load(_write(tmp_path))
    sim = Simulation(cfg, output=tmp_path / "n", quiet=True)
    try:
        first = sim.write_checkpoint()
        sim.uh[0, 1, 1, 1] = np.nan
        with pytest.raises(NumericalInstability, match="no checkpoint written"):
            sim.write_checkpoint()
    finally:
        sim.close()
    assert [p.name for p in (tmp_path / "n" / "checkpoints").iterdir()] == [os.path.basename(first)]
    assert latest_checkpoint(str(tmp_path / "n" / "checkpoints")) == first


def test_walltime_is_the_budget_of_each_invocation(tmp_path):
    cfg = dict(FLUID, time={"scheme": "rk3", "cfl": 0.6, "end": 1e6, "max_dt": 0.002,
                            "walltime": 2.0}, checkpoint={"every": None, "keep": 2})
    path = _write(tmp_path, cfg)
    out = tmp_path / "w"
    steps = [0]
    for i in range(3):  # a chain of three jobs, each with the same budget
        extra = ["--restart", "latest"] if i else []
        assert main(["run", str(path), "--out", str(out), "--quiet", *extra]) == 75
        ck = sorted((out / "checkpoints").glob("checkpoint_*.h5"))[-1]
        with h5py.File(ck) as f:
            steps.append(int(f.attrs["step"]))
    progress = np.diff(steps)
    # each link makes real progress; before, every restart stopped after one step
    assert np.all(progress > 10) and progress[2] > 0.3 * progress[0], steps


# --- signals at any moment ----------------------------------------------------------------------------
@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT, signal.SIGUSR1])
def test_signal_during_start_up(tmp_path, sig):
    path = _write(tmp_path)
    p = _cli("run", path, "--out", tmp_path / "s", *ENDLESS)
    # eddybox catches the three signals from the first lines of its own code (SIGUSR1 last);
    # before that the interpreter is still starting, and its own SIGINT handler is in place
    _wait(lambda: _catches(p.pid, signal.SIGUSR1), p)
    p.send_signal(sig)
    out, err = p.communicate(timeout=120)
    assert p.returncode == 76, err
    line = _one_line(out + err)
    assert f"stopped by {signal.Signals(sig).name}" in line and "nothing to resume" in line
    assert not (tmp_path / "s" / "checkpoints").exists()


def test_burst_of_signals_in_start_up_and_in_the_loop(tmp_path):
    path = _write(tmp_path)
    out = tmp_path / "burst"
    sigs = (signal.SIGTERM, signal.SIGINT, signal.SIGUSR1)
    for stage in ("start-up", "loop"):
        p = _cli("run", path, "--out", out, "--quiet", *ENDLESS,
                 *(["--restart", "latest"] if stage == "loop" else []))
        if stage == "loop":  # a restart: there is a checkpoint to resume from
            _wait(lambda: (out / "log.txt").read_text().count("continuing from") == 1, p)
        else:
            _wait(lambda: _catches(p.pid, signal.SIGUSR1), p)
        for i in range(40):
            try:
                p.send_signal(sigs[i % 3])
            except ProcessLookupError:
                break
            time.sleep(0.003)
        o, e = p.communicate(timeout=120)
        expected = 76 if stage == "start-up" else 75
        assert p.returncode == expected, (stage, p.returncode, e)
        if stage == "start-up":
            _one_line(o + e)
            # make a checkpoint for the second stage
            assert main(["run", str(path), "--out", str(out), "--quiet", "--overwrite", *ENDLESS,
                         "--set", "time.max_steps=3"]) == 0
        else:
            assert not (o + e).strip() and "stopped early (signal" in (out / "log.txt").read_text()


def test_signal_while_a_restart_starts_up_exits_75(tmp_path):
    path = _write(tmp_path)
    out = tmp_path / "r"
    assert main(["run", str(path), "--out", str(out), "--quiet", *ENDLESS,
                 "--set", "time.max_steps=3"]) == 0
    p = _cli("run", path, "--out", out, "--restart", "latest", *ENDLESS)
    _wait(lambda: _catches(p.pid, signal.SIGUSR1), p)
    p.send_signal(signal.SIGTERM)
    o, e = p.communicate(timeout=120)
    assert p.returncode == 75, e
    line = _one_line(o + e)
    assert "stopped by SIGTERM" in line and "--restart latest" in line


# --- a full disk ----------------------------------------------------------------------------------------
@pytest.fixture
def small_disk(tmp_path):
    mnt = tmp_path / "disk"
    mnt.mkdir()
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=1600k", "tmpfs", str(mnt)],
                       capture_output=True, text=True)
    if r.returncode != 0:
        pytest.skip(f"cannot mount a small tmpfs here ({r.stderr.strip()})")
    try:
        yield mnt
    finally:
        subprocess.run(["umount", "-l", str(mnt)], capture_output=True)


def test_full_disk_stops_with_one_line_and_resumes_after(tmp_path, small_disk):
    cfg = dict(FLUID, time={"scheme": "rk3", "cfl": 0.6, "end": 1.0},
               particles={"release": 0.2, "interpolation": 4,
                          "sets": [{"name": "heavy", "stokes": 1.0, "count": 400},
                                   {"name": "tracers", "tau_p": 0.0, "count": 400}]},
               stats={"fluid": {"every": 0.05}, "spectra": {"every": 0.2},
                      "pairs": {"every": 0.1, "r_max": 1.0, "bins": 6, "spacing": "linear",
                                "units": "box", "wr_bins": 11, "cross": True},
                      "particles": {"every": 0.3, "max_count": 50}, "fields": {"every": 0.5}},
               checkpoint={"every": 0.1, "keep": 3})
    path = _write(tmp_path, cfg)
    out = small_disk / "run"
    p = _cli("run", path, "--out", out, "--quiet")
    o, e = p.communicate(timeout=120)
    assert p.returncode == 1, (p.returncode, e[-3000:])  # not 139: no segmentation fault
    line = _one_line(o + e)
    assert "No space left on device" in line and "last good checkpoint: " in line
    last = line.split("last good checkpoint: ")[1].split(". ")[0]
    assert last.endswith(".h5") and "--restart latest" in line
    # with space again, the run resumes from it and ends
    subprocess.run(["mount", "-o", "remount,size=16m", str(small_disk)], check=True)
    p = _cli("run", path, "--out", out, "--quiet", "--restart", "latest")
    o, e = p.communicate(timeout=120)
    assert p.returncode == 0, e
    assert f"continuing from {last}" in (out / "log.txt").read_text()


# --- MPI: the lock and a refusal on two ranks --------------------------------------------------------
MPIEXEC = os.path.join(os.path.dirname(sys.executable), "mpiexec")


def _mpi(*args, timeout=120):
    pytest.importorskip("mpi4py")
    if not os.path.exists(MPIEXEC):
        pytest.skip("no mpiexec")
    env = dict(os.environ, EDDYBOX_THREADS="1", EDDYBOX_FFTW_EFFORT="FFTW_ESTIMATE")
    return subprocess.run([MPIEXEC, "-n", "2", sys.executable, "-m", "eddybox.solver.cli",
                           *map(str, args)], capture_output=True, text=True, env=env,
                          timeout=timeout)


def test_mpi_lock_and_refusals_give_one_message(reference, tmp_path):
    from eddybox.solver.run.run_folder import RunLock

    path, ref = reference
    out = tmp_path / "m"
    shutil.copytree(ref, out)
    lock = RunLock(out).acquire()  # this process plays the running run
    try:
        r = _mpi("run", path, "--out", out, "--restart", "latest", "--set", "time.end=2")
    finally:
        lock.release()
    assert r.returncode == 2, r.stderr
    line = _one_line(r.stdout + r.stderr)
    assert f"PID {os.getpid()}" in line
    before = {p: p.read_bytes() for p in out.rglob("*") if p.is_file()}
    r = _mpi("run", path, "--out", out, "--overwrite", "--set", "particles.sets=[{name: a, "
             "stokes: 1.0, count: 10000000000}]", "--set", "particles.release=0.5")
    assert r.returncode == 2, r.stderr
    line = _one_line(r.stdout + r.stderr)
    assert "particles.sets[0].count" in line and "TiB" in line
    assert {p: p.read_bytes() for p in out.rglob("*") if p.is_file()} == before
