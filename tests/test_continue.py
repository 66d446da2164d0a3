"""Continue a run from its folder alone; the resume hint, followed literally, reproduces the
run's settings; a run folder's config.yaml is a valid input config; the job script's restart
chain carries a run to its end across wall-time stops."""
from __future__ import annotations

import os
import re
import shlex
import signal
import subprocess
import sys
import time

import h5py
import numpy as np
import pytest
import yaml

from eddybox.solver.cli import main

BASE = {"name": "cont", "seed": 5, "grid": {"points": 16},
        "fluid": {"viscosity": 0.03, "initial": {"kind": "spectrum", "energy": 0.5, "peak": 2}},
        "forcing": {"kind": "ou", "band": 2.0, "timescale": 0.5, "dissipation": 0.1},
        "time": {"end": 6.0, "max_dt": 0.05},
        "stats": {"fluid": {"every": 0.1}, "spectra": {"every": None}},
        "checkpoint": {"every": 0.5}}


@pytest.fixture
def config(tmp_path):
    path = tmp_path / "cont.yaml"
    path.write_text(yaml.safe_dump(BASE))
    return path


def _times(out):
    with h5py.File(os.path.join(out, "fluid.h5"), "r", swmr=True) as f:
        return f["series/time"][...]


def test_resume_from_the_folder_alone_with_the_runs_own_settings(config, tmp_path, capsys):
    out = tmp_path / "r"
    assert main(["run", str(config), "--out", str(out), "--quiet", "--set", "time.end=2.0",
                 "--set", "time.max_steps=10"]) == 0
    capsys.readouterr()
    # no config argument: the folder's config.yaml (time.end 2.0 from the first --set)
    assert main(["run", "--out", str(out), "--restart", "latest", "--quiet",
                 "--set", "time.max_steps=null"]) == 0
    t = _times(out)
    assert t[-1] == pytest.approx(2.0) and np.all(np.diff(t) > 0)
    saved = yaml.safe_load((out / "config.yaml").read_text())
    assert saved["time"]["end"] == 2.0 and saved["time"]["max_steps"] is None
    # extending is a restart-mutable change; the folder's config.yaml records it
    assert main(["run", "--out", str(out), "--restart", "latest", "--quiet", "--set", "time.end=2.5"]) == 0
    assert _times(out)[-1] == pytest.approx(2.5)
    assert yaml.safe_load((out / "config.yaml").read_text())["time"]["end"] == 2.5
    # a physics key may not change on a restart; the message lists what may
    code = main(["run", "--out", str(out), "--restart", "latest", "--set", "fluid.viscosity=0.02"])
    err = capsys.readouterr().err
    assert code == 2 and "fluid.viscosity" in err and "time.end" in err


def test_folder_without_config_and_missing_arguments(tmp_path, capsys):
    (tmp_path / "empty").mkdir()
    assert main(["run", "--out", str(tmp_path / "empty"), "--restart", "latest"]) == 2
    assert "no config.yaml" in capsys.readouterr().err
    assert main(["run", "--out", str(tmp_path / "empty")]) == 2
    assert "usage" in capsys.readouterr().err


def test_run_folder_config_is_an_input_config(config, tmp_path):
    out = tmp_path / "a"
    assert main(["run", str(config), "--out", str(out), "--quiet", "--set", "time.end=0.3"]) == 0
    saved = out / "config.yaml"
    assert "derived" in yaml.safe_load(saved.read_text())
    # the derived block is ignored on input (it is recomputed for the new run)
    assert main(["check", str(saved)]) == 0
    assert main(["run", str(saved), "--out", str(tmp_path / "b"), "--quiet"]) == 0
    assert np.array_equal(_times(out), _times(tmp_path / "b"))


def test_printed_resume_hint_followed_literally_reaches_the_set_end_time(config, tmp_path):
    out = tmp_path / "g"
    env = dict(os.environ, EDDYBOX_THREADS="1")
    p = subprocess.Popen([sys.executable, "-m", "eddybox.solver.cli", "run", str(config), "--set",
                          "time.end=20", "--set", "time.max_dt=0.01", "--out", str(out)],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    deadline = time.monotonic() + 120
    while not (out / "checkpoints").is_dir() or not list((out / "checkpoints").glob("checkpoint_*.h5")):
        assert p.poll() is None and time.monotonic() < deadline, p.communicate()
        time.sleep(0.1)
    p.send_signal(signal.SIGINT)
    stdout, stderr = p.communicate(timeout=120)
    assert p.returncode == 75, stderr
    hint = re.search(r"resume with: (eddybox .*)", (out / "log.txt").read_text()).group(1)
    argv = shlex.split(hint)
    assert argv[0] == "eddybox"
    # followed literally (with --set time.max_steps to keep the test short: it is restart-mutable)
    steps = int(h5py.File(sorted((out / "checkpoints").glob("*.h5"))[-1], "r").attrs["step"])
    assert main(argv[1:] + ["--quiet", "--set", f"time.max_steps={steps + 3}"]) == 0
    saved = yaml.safe_load((out / "config.yaml").read_text())
    assert saved["time"]["end"] == 20.0 and saved["time"]["max_dt"] == 0.01


def test_job_script_chain_runs_to_the_end_across_wall_time_stops(config, tmp_path, capsys):
    if not os.path.exists("/bin/bash"):
        pytest.skip("no bash")
    cfg = dict(BASE, time={"end": 0.2, "max_dt": 0.05})  # exactly 4 steps
    path = tmp_path / "chain.yaml"
    path.write_text(yaml.safe_dump(cfg))
    cal = tmp_path / "cal.json"
    cal.write_text('{"created": "t", "threads": 1, "fluid_model": {"a": 1e-9, "b": 1e-8}}')
    script = tmp_path / "job.sh"
    out = tmp_path / "chain"
    # a job limit of 2 s leaves a time.walltime budget of 1 s: below eddybox's own safety margin
    # (>= 1 s), so every job stops after exactly one step, whatever the machine's speed
    assert main(["estimate", str(path), "--points", "16", "--ranks", "1", "--calibration", str(cal),
                 "--job-script", str(script), "--job-walltime", "0:00:02", "--out", str(out)]) == 0
    capsys.readouterr()
    queue = tmp_path / "queue"
    # the scheduler's submit command is a shell function that queues the script
    stand_in = f'sbatch() {{ echo "$1" >> {shlex.quote(str(queue))}; }}; export -f sbatch; '
    mpiexec = os.path.join(os.path.dirname(sys.executable), "mpiexec")
    env = dict(os.environ, EDDYBOX_THREADS="1", MPIEXEC=mpiexec if os.path.exists(mpiexec) else "env")
    codes = []
    pending = [str(script)]
    while pending and len(codes) < 10:
        job = pending.pop(0)
        r = subprocess.run(["bash", "-c", stand_in + f"bash {shlex.quote(job)}"], env=env,
                           capture_output=True, text=True, timeout=300)
        codes.append(r.returncode)
        if queue.exists():
            pending += queue.read_text().split()
            queue.unlink()
    assert codes == [75, 75, 75, 0], codes
    t = _times(out)
    assert t[-1] == pytest.approx(0.2) and np.all(np.diff(t) > 0)


def test_job_script_does_not_resubmit_after_a_signal(config, tmp_path, capsys):
    cal = tmp_path / "cal.json"
    cal.write_text('{"created": "t", "threads": 1, "fluid_model": {"a": 1e-9, "b": 1e-8}}')
    path = tmp_path / "long.yaml"
    path.write_text(yaml.safe_dump(dict(BASE, time={"end": 1e4, "max_dt": 0.001})))
    script, out, queue = tmp_path / "job.sh", tmp_path / "long", tmp_path / "queue"
    assert main(["estimate", str(path), "--points", "16", "--ranks", "1", "--calibration", str(cal),
                 "--job-script", str(script), "--job-walltime", "1:00:00", "--out", str(out)]) == 0
    capsys.readouterr()
    stand_in = f'sbatch() {{ echo "$1" >> {shlex.quote(str(queue))}; }}; export -f sbatch; '
    env = dict(os.environ, EDDYBOX_THREADS="1",
               MPIEXEC=os.path.join(os.path.dirname(sys.executable), "mpiexec"))
    p = subprocess.Popen(["bash", "-c", stand_in + f"exec bash {shlex.quote(str(script))}"], env=env,
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                         start_new_session=True)
    deadline = time.monotonic() + 120
    while not list((out / "checkpoints").glob("checkpoint_*.h5")) if (out / "checkpoints").is_dir() else True:
        assert p.poll() is None and time.monotonic() < deadline, p.communicate()
        time.sleep(0.1)
    os.killpg(p.pid, signal.SIGTERM)  # what a scheduler does to a cancelled job: every process
    stdout, _ = p.communicate(timeout=120)
    assert p.returncode == 75 and "not submitting" in stdout and not queue.exists()


def test_spin_up_once_study_many(config, tmp_path, capsys):
    spin = tmp_path / "spin"
    assert main(["run", str(config), "--out", str(spin), "--quiet", "--set", "time.end=1.0",
                 "--set", "forcing.calibrate=0.5"]) == 0
    newest = sorted((spin / "checkpoints").glob("checkpoint_*.h5"))[-1]
    study = dict(BASE, fluid={"viscosity": 0.03, "initial": {"kind": "file", "path": str(spin)}},
                 time={"end": 0.3, "max_dt": 0.05},
                 particles={"release": 0.0, "sets": [{"name": "st", "stokes": [0.5, 2.0], "count": 200}]})
    path = tmp_path / "study.yaml"
    path.write_text(yaml.safe_dump(study))
    out = tmp_path / "study"
    assert main(["run", str(path), "--out", str(out), "--quiet"]) == 0
    src = yaml.safe_load((out / "config.yaml").read_text())["derived"]["initial_source"]
    assert src["file"] == str(newest) and src["run_folder"] == str(spin)
    with h5py.File(newest) as f:
        assert src["step"] == int(f.attrs["step"]) and src["config_hash"] == f.attrs["config_hash"]
    spin_derived = yaml.safe_load((spin / "config.yaml").read_text())["derived"]
    assert src["forcing_calibrated_variance"] == spin_derived["forcing_calibration"]["variance"]
    # the study starts from the spin-up's last field: the same energy at t = 0 (Parseval)
    with h5py.File(spin / "fluid.h5") as a, h5py.File(out / "fluid.h5") as b:
        assert b["series/energy"][0] == pytest.approx(a["series/energy"][-1], rel=1e-12)
    log = (out / "log.txt").read_text()
    assert f"initial field from {newest}" in log and "set forcing.variance" in log
    # a folder with no intact checkpoint is refused, naming the key
    (tmp_path / "nothing").mkdir()
    path.write_text(yaml.safe_dump(dict(study, fluid={"viscosity": 0.03, "initial": {
        "kind": "file", "path": str(tmp_path / "nothing")}})))
    capsys.readouterr()
    assert main(["run", str(path), "--out", str(tmp_path / "x"), "--quiet"]) == 2
    assert "fluid.initial.path" in capsys.readouterr().err


def test_inspect_a_checkpoint_gives_a_human_summary(config, tmp_path, capsys):
    out = tmp_path / "i"
    cfg = dict(BASE, time={"end": 0.3, "max_dt": 0.05},
               particles={"release": 0.0, "sets": [{"name": "st", "stokes": [2.0, 0.5], "count": 300}]})
    path = tmp_path / "i.yaml"
    path.write_text(yaml.safe_dump(cfg))
    assert main(["run", str(path), "--out", str(out), "--quiet"]) == 0
    ck = sorted((out / "checkpoints").glob("*.h5"))[-1]
    capsys.readouterr()
    assert main(["inspect", str(ck)]) == 0
    text = capsys.readouterr().out
    assert "checkpoint at t = 0.3, step 6" in text and "16^3" in text
    assert "forcing ou: variance sigma^2 =" in text and "checksums: every dataset verifies" in text
    rows = [ln.split() for ln in text.splitlines() if ln.startswith("    st")]
    assert [r[0] for r in rows] == ["st2", "st0.5"] and all(r[1] == "300" for r in rows)
    assert len(text.splitlines()) < 30
    assert main(["inspect", "--datasets", str(ck)]) == 0
    assert "state/forcing/b" in capsys.readouterr().out
