"""Batch job scripts for the production run that `eddybox estimate` costs: the scheduler's
resource lines from the estimate (with a stated margin), the `mpiexec` line, `time.walltime`
set safely below the job's limit, and a restart chain: a job that stops with exit 75 (a
checkpoint was written before the limit) submits the same script again, which continues from
the folder's newest checkpoint, until the run is done.

Schedulers are a registry (`SCHEDULERS`, filled by `@scheduler`); each one gives its directive
lines and its submit command. The submit command is called through a shell function `submit`
that the environment may replace (`EDDYBOX_SUBMIT`), so the chain can be tested without a
scheduler.
"""
from __future__ import annotations

import math
import os
import shlex
import sys
from dataclasses import dataclass

from eddybox.solver.errors import ConfigError

SCHEDULERS: dict[str, "Scheduler"] = {}


@dataclass(frozen=True)
class Job:
    """What the script asks for and runs."""

    name: str
    config: str          # absolute path of the run's config
    out: str             # absolute path of the run folder
    ranks: int
    threads: int         # threads per rank
    nodes: int
    limit_seconds: int   # the job's wall-time limit
    budget_seconds: int  # time.walltime of each invocation (below the limit)
    estimate_seconds: float
    margin: float
    summary: str         # the estimate's figures, one comment line each
    sets: tuple = ()     # KEY=VALUE overrides the estimate made (N, nu, particle counts)


class Scheduler:
    name = ""
    submit = ""

    def directives(self, job: Job, script_path: str) -> list[str]:
        raise NotImplementedError


def scheduler(name):
    def deco(cls):
        cls.name = name
        SCHEDULERS[name] = cls()
        return cls

    return deco


def hms(seconds: float) -> str:
    s = int(math.ceil(seconds))
    return f"{s // 3600:02d}:{s % 3600 // 60:02d}:{s % 60:02d}"


@scheduler("slurm")
class Slurm(Scheduler):
    submit = "sbatch"

    def directives(self, job, script_path):
        return [f"#SBATCH --job-name={job.name}",
                f"#SBATCH --nodes={job.nodes}",
                f"#SBATCH --ntasks={job.ranks}",
                f"#SBATCH --cpus-per-task={job.threads}",
                f"#SBATCH --time={hms(job.limit_seconds)}",
                f"#SBATCH --output={job.out}.job-%j.log"]


@scheduler("pbs")
class Pbs(Scheduler):
    submit = "qsub"

    def directives(self, job, script_path):
        per_node = -(-job.ranks // job.nodes)
        return [f"#PBS -N {job.name[:15]}",
                f"#PBS -l select={job.nodes}:ncpus={per_node * job.threads}:mpiprocs={per_node}",
                f"#PBS -l walltime={hms(job.limit_seconds)}",
                "#PBS -j oe",
                f"#PBS -o {job.out}.job.log"]


def plan_job(config_path, out, name, estimate: dict, cores_per_node: int, margin: float,
             max_walltime: float | None, job_walltime: float | None = None, sets=None) -> Job:
    """Resources and time limits of one job of the chain from an `estimate()` result.

    limit  = the estimated wall time x (1 + margin), plus 10 minutes for start-up and the
             final checkpoint, capped at `max_walltime` (the queue's limit; the chain resumes
             what one job cannot finish); `job_walltime` overrides it.
    budget = limit - safety, safety = 10 % of the limit, at least 2 minutes but at most half
             the limit: what eddybox may use before it checkpoints and exits 75."""
    if cores_per_node < 1:
        raise ConfigError(f"--cores-per-node: expected a positive integer, got {cores_per_node}")
    if not (math.isfinite(margin) and 0.0 <= margin <= 10.0):
        raise ConfigError(f"--margin: expected a number between 0 and 10, got {margin}")
    ranks, threads = int(estimate["ranks"]), int(estimate.get("threads_per_rank", 1))
    nodes = max(1, -(-ranks * threads // cores_per_node))
    if job_walltime is not None:
        limit = float(job_walltime)
    else:
        limit = estimate["wall_seconds"] * (1.0 + margin) + 600.0
        if max_walltime is not None:
            limit = min(limit, float(max_walltime))
    safety = min(max(0.1 * limit, 120.0), 0.5 * limit)
    lines = [f"estimate: {estimate['points']}^3 on {ranks} rank(s) x {threads} thread(s), "
             f"{nodes} node(s) of {cores_per_node} cores",
             f"estimate: {estimate['steps']} steps x {estimate['seconds_per_step']:.4g} s = "
             f"{estimate['wall_seconds'] / 3600:.3g} h, {estimate['core_hours']:.4g} core-hours, "
             f"{estimate['memory_per_rank'] / 2**30:.3g} GiB per rank at the peak"
             + (f" (rank 0 {estimate['memory_rank0'] / 2**30:.3g} GiB)"
                if estimate.get("memory_rank0", 0) > estimate["memory_per_rank"] else ""),
             f"job limit {hms(limit)} = estimate x {1 + margin:g} + 10 min"
             + (f", capped at {hms(max_walltime)}" if max_walltime and job_walltime is None else ""),
             f"time.walltime {int(limit - safety)} s = limit - {int(safety)} s (start-up, final "
             "checkpoint, MPI shutdown)"]
    return Job(name=name, config=os.path.abspath(config_path), out=os.path.abspath(out),
               ranks=ranks, threads=threads, nodes=nodes, limit_seconds=int(math.ceil(limit)),
               budget_seconds=max(1, int(limit - safety)), estimate_seconds=estimate["wall_seconds"],
               margin=margin, summary="\n".join(lines), sets=override_args(sets or {}))


def override_args(changes: dict) -> tuple:
    """`KEY=VALUE` arguments of `--set` for dotted keys and their values (YAML on one line)."""
    import yaml

    return tuple(f"{k}={yaml.safe_dump(v, default_flow_style=True, width=float('inf')).strip()}"
                 .removesuffix("\n...") for k, v in changes.items())


def job_script(job: Job, kind: str, script_path: str, python=None) -> str:
    """The text of the batch script (bash)."""
    if kind not in SCHEDULERS:
        raise ConfigError(f"--scheduler: {kind!r} is not supported; choose one of "
                          + ", ".join(SCHEDULERS))
    sch = SCHEDULERS[kind]
    python = python or sys.executable
    q = shlex.quote
    comments = "\n".join(f"# {line}" for line in job.summary.splitlines())
    # the estimate's own N, nu and particle counts, where they differ from the config's
    sets = "".join(f"--set {q(kv)} \\\n    " for kv in job.sets)
    return f"""#!/bin/bash
{chr(10).join(sch.directives(job, script_path))}
# Written by `eddybox estimate --job-script`; a research estimate of the cost, not a promise.
{comments}
#
# The chain: each job runs eddybox with time.walltime below the job's limit; a job stopped by
# that budget (exit 75, a checkpoint written) submits this script again, and the next job
# continues from the newest checkpoint. Exit 0 ends the chain; any other code stops it, and
# so does a signal to the job.
set -u
# a signal to the job itself (scancel, qdel, the queue's own limit) stops the chain: eddybox
# checkpoints and exits 75, but the job does not submit itself again
cancelled=""
trap 'cancelled=1' TERM INT USR1
SCRIPT={q(os.path.abspath(script_path))}
CONFIG={q(job.config)}
OUT={q(job.out)}
PYTHON={q(python)}
MPIEXEC="${{MPIEXEC:-mpiexec}}"
BUDGET={job.budget_seconds}

submit() {{
    # the scheduler's submit command; EDDYBOX_SUBMIT replaces it (tests, other queues)
    ${{EDDYBOX_SUBMIT:-{sch.submit}}} "$SCRIPT"
}}

if ls "$OUT"/checkpoints/checkpoint_*.h5 >/dev/null 2>&1; then
    START=(--restart latest)
elif [ -d "$OUT" ]; then
    START=(--overwrite)   # a job stopped before its first checkpoint left nothing to resume
else
    START=()
fi
"$MPIEXEC" -n {job.ranks} "$PYTHON" -m eddybox.solver.cli run "$CONFIG" --out "$OUT" ${{START[@]+"${{START[@]}}"}} \\
    {sets}--set time.walltime="$BUDGET" --quiet
code=$?
echo "eddybox exited with $code"
if [ -n "$cancelled" ]; then
    echo "the job was signalled: not submitting the next one (submit $SCRIPT to continue)"
elif [ "$code" -eq 75 ]; then
    submit
fi
exit "$code"
"""


def write_job_script(path, job: Job, kind: str) -> str:
    text = job_script(job, kind, path)
    d = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(d):
        raise ConfigError(f"--job-script {path}: the folder {d} does not exist")
    if os.path.exists(path):
        raise ConfigError(f"--job-script {path}: exists; give a new file name")
    try:
        with open(path, "w") as fh:
            fh.write(text)
        os.chmod(path, 0o755)
    except OSError as exc:
        raise ConfigError(f"--job-script {path}: cannot write ({exc.strerror})") from None
    return path
