"""`eddybox estimate --job-script`: a batch script for the production run with a restart chain."""
from __future__ import annotations

import re
import shutil
import subprocess

import pytest
import yaml

from eddybox.solver.cli import main
from eddybox.solver.study import jobscript

CAL = {"created": "test", "threads": 2, "fluid_model": {"a": 3e-10, "b": 4e-9},
       "umax_over_urms": 6.0, "memory_overhead_bytes": 1.5e8}


@pytest.fixture
def config(tmp_path):
    path = tmp_path / "prod.yaml"
    path.write_text(yaml.safe_dump({"name": "prod", "grid": {"points": 64}, "fluid": {"viscosity": 0.01},
                                    "forcing": {"kind": "ou", "band": 2.0, "dissipation": 0.1},
                                    "time": {"end": 20.0}}))
    cal = tmp_path / "cal.json"
    cal.write_text(__import__("json").dumps(CAL))
    return path, cal


@pytest.mark.parametrize("kind", ["slurm", "pbs"])
def test_script_holds_the_estimate_and_passes_bash_n(config, tmp_path, capsys, kind):
    path, cal = config
    script = tmp_path / f"job-{kind}.sh"
    assert main(["estimate", str(path), "--points", "512", "--ranks", "256", "--calibration", str(cal),
                 "--job-script", str(script), "--scheduler", kind, "--cores-per-node", "64",
                 "--out", str(tmp_path / "run")]) == 0
    out = capsys.readouterr().out
    text = script.read_text()
    if shutil.which("bash"):
        assert subprocess.run(["bash", "-n", str(script)]).returncode == 0
    # the estimate's own figures, printed and in the script
    steps = re.search(r"steps to t = \S+\s+(\d+)", out).group(1)
    assert f"estimate: {steps} steps" in text and "core-hours" in text
    # 256 ranks x 2 threads on 64-core nodes: 8 nodes
    if kind == "slurm":
        assert "#SBATCH --nodes=8" in text and "#SBATCH --ntasks=256" in text
        limit = re.search(r"#SBATCH --time=(\d+):(\d+):(\d+)", text).groups()
    else:
        assert "#PBS -l select=8:ncpus=64:mpiprocs=32" in text
        limit = re.search(r"#PBS -l walltime=(\d+):(\d+):(\d+)", text).groups()
    limit = int(limit[0]) * 3600 + int(limit[1]) * 60 + int(limit[2])
    budget = int(re.search(r"^BUDGET=(\d+)$", text, re.M).group(1))
    assert 0 < budget < limit  # time.walltime safely below the job's limit
    assert '-n 256 "$PYTHON" -m eddybox.solver.cli run' in text
    assert 'if [ "$code" -eq 75 ]; then' in text
    assert "--set grid.points=512 " in text  # the job runs the size that was estimated


def test_script_runs_the_config_the_estimate_was_made_for(tmp_path, capsys):
    # --re-lambda and --particles change nu, N and the set counts: the job's --set arguments,
    # read back as the run would read them, give the estimate's config
    import shlex

    from eddybox.solver.run import config as cfgmod

    path = tmp_path / "prod.yaml"
    path.write_text(yaml.safe_dump({
        "name": "prod", "grid": {"points": 32}, "fluid": {"viscosity": 0.01},
        "forcing": {"kind": "ou", "band": 2.0, "dissipation": 0.1}, "time": {"end": 20.0},
        "particles": {"release": 1.0, "sets": [{"name": "st", "stokes": [0.5, 2], "count": 1000},
                                               {"name": "tr", "tau_p": 0.0, "count": 2000}]}}))
    cal = tmp_path / "cal.json"
    cal.write_text(__import__("json").dumps(CAL))
    script = tmp_path / "job.sh"
    assert main(["estimate", str(path), "--re-lambda", "120", "--particles", "4e6", "--ranks", "64",
                 "--calibration", str(cal), "--job-script", str(script)]) == 0
    out = capsys.readouterr().out
    n = int(re.search(r"at (\d+)\^3 on 64 rank", out).group(1))
    nu = float(re.search(r"viscosity nu\s+(\S+)", out).group(1))
    words = shlex.split(script.read_text().split("eddybox.solver.cli run")[1].split("--quiet")[0]
                        .replace("\\\n", " "))
    sets = [words[i + 1] for i, w in enumerate(words) if w == "--set" and "walltime" not in words[i + 1]]
    cfg = cfgmod.load(str(path), sets)
    assert cfg.grid.points == n and cfg.fluid.viscosity == pytest.approx(nu, rel=1e-3)
    assert [s.count for s in cfg.particles.sets] == [1000000, 1000000, 2000000]
    assert [s.name for s in cfg.particles.sets] == ["st0.5", "st2", "tr"]


def test_plan_job_margin_and_caps():
    e = {"points": 128, "ranks": 16, "threads_per_rank": 1, "steps": 1000, "seconds_per_step": 36.0,
         "wall_seconds": 36000.0, "core_hours": 160.0, "memory_per_rank": 2**30}
    job = jobscript.plan_job("c.yaml", "out", "x", e, 8, 0.25, None)
    assert job.nodes == 2 and job.limit_seconds == int(36000 * 1.25 + 600)
    assert job.budget_seconds == int(job.limit_seconds * 0.9)
    capped = jobscript.plan_job("c.yaml", "out", "x", e, 8, 0.25, 3600.0)
    assert capped.limit_seconds == 3600 and capped.budget_seconds == 3240
    tiny = jobscript.plan_job("c.yaml", "out", "x", e, 8, 0.25, None, job_walltime=8.0)
    assert tiny.limit_seconds == 8 and tiny.budget_seconds == 4


@pytest.mark.parametrize("argv,needle", [
    (["--scheduler", "lsf"], "--scheduler"),
    (["--cores-per-node", "0"], "--cores-per-node"),
    (["--margin", "-1"], "--margin"),
    (["--max-walltime", "soon"], "--max-walltime"),
])
def test_bad_job_options(config, tmp_path, capsys, argv, needle):
    path, cal = config
    script = tmp_path / "job.sh"
    code = main(["estimate", str(path), "--points", "64", "--ranks", "2", "--calibration", str(cal),
                 "--job-script", str(script), *argv])
    cap = capsys.readouterr()
    assert code == 2 and needle in cap.err and "Traceback" not in cap.err
    assert len(cap.err.strip().splitlines()) == 1 and cap.out == ""  # refused before estimating
    assert not script.exists()
