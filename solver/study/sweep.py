"""`eddybox sweep`: one run per combination of varied config keys.

    eddybox sweep CONFIG --vary KEY=V1,V2,... [--vary ...] [--set ...] [--jobs J] [--out DIR]
                         [--reference KEY=VALUE ...] [--match dissipation]

Every combination (cartesian product) is validated before anything is written or launched.
Each run lives in DIR/<key=value__key=value> and is a separate process
(`python -m eddybox.solver.cli run CONFIG --set ... --out FOLDER --quiet`, terminal output in
DIR/.console/), so runs are isolated and `--jobs` of them go at once. Invoking the same
sweep again continues it:

    complete   log.txt ends with the 'done:' line and sweep_status.json records exit 0 for
               the same config hash                                   -> skipped
    interrupted  not complete, a readable checkpoint exists           -> --restart latest
    started    not complete, no checkpoint                            -> --overwrite

A folder holding a run of a different physical config is never overwritten: the sweep stops
with a config error naming the folder and the differing keys.

With --reference, one more run, DIR/reference (the config with those overrides), runs first; the
runs whose settings are relative to it ('x T_E' values, --match) start only after it has finished
and its stationary T_E and eps are measured and converged, with the resolved absolute values in
their configs (eddybox.solver.study.reference).
"""
from __future__ import annotations

import datetime
import hashlib
import itertools
import json
import math
import os
import re
import signal
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import yaml

from eddybox.solver.errors import EXIT_DONE, EXIT_NOTHING_TO_RESUME, EXIT_STOPPED, ConfigError
from eddybox.solver.estimators.significance import SIGNIFICANCE_LEVEL
from eddybox.solver.fluid.fft import available_cores
from eddybox.solver.run import config as cfgmod
from eddybox.solver.run.checkpoint import latest_checkpoint
from eddybox.solver.run.config import differing_keys
from eddybox.solver.run.output import write_json_atomic
from eddybox.solver.run.run_folder import RunLock, check_replaceable, refuse_if_locked
from eddybox.solver.study import reference as refmod
from eddybox.solver.study.comparison import NOT_CONVERGED, correlated, flag_family

STATUS_FILE = "sweep_status.json"
CONSOLE_DIR = ".console"
_SAFE = re.compile(r"[^A-Za-z0-9._=+\-]+")
_RUN_MARKERS = (".eddybox-run", "config.yaml", "log.txt", "fluid.h5", "checkpoints")


@dataclass
class SweepRun:
    """One combination: its folder, the child's overrides, and what happened to it."""

    name: str
    values: dict                     # varied key -> the value text as given
    overrides: list                  # every --set pair the child receives
    config: cfgmod.Config
    folder: Path
    action: str = "start"            # start | overwrite | resume | skip
    status: str = "not started"      # done | skipped | resumed | failed | not started
    code: int | None = None
    seconds: float = 0.0
    extra: dict = field(default_factory=dict)
    role: str = "plain"              # plain | reference | dependent (resolved from the reference)
    resolved: dict = field(default_factory=dict)  # key -> {given, value}, once resolved


# --- parsing and validation ----------------------------------------------------------------
def split_values(text: str) -> list[str]:
    """Split V1,V2,... at commas outside brackets, braces and quotes, so a value may itself be
    a YAML list or mapping (--vary particles.gravity=[0,0,-1],[0,0,-2])."""
    parts, depth, quote, cur = [], 0, None, []
    for ch in text:
        if quote:
            quote = None if ch == quote else quote
        elif ch in "'\"":
            quote = ch
        elif ch in "[{":
            depth += 1
        elif ch in "]}":
            depth -= 1
        elif ch == "," and depth == 0:
            parts.append("".join(cur).strip())
            cur = []
            continue
        cur.append(ch)
    parts.append("".join(cur).strip())
    return parts


def parse_vary(items: list[str], set_pairs: list[str] = ()) -> list[tuple[str, list[str]]]:
    """[(key, [value text, ...]), ...] from the --vary arguments; ConfigError names the bad one."""
    if not items:
        raise ConfigError("--vary: at least one KEY=V1,V2,... is required")
    set_keys = {p.split("=", 1)[0].strip() for p in set_pairs or () if "=" in p}
    out, seen = [], set()
    for item in items:
        if "=" not in item:
            raise ConfigError(f"--vary {item!r}: expected KEY=V1,V2,..., e.g. "
                              "--vary forcing.timescale=0.5,1.0")
        key, text = item.split("=", 1)
        key = key.strip()
        if not key or not re.fullmatch(r"[A-Za-z0-9_]+(\.[A-Za-z0-9_]+)*", key):
            raise ConfigError(f"--vary {item!r}: {key!r} is not a dotted config key "
                              "(e.g. forcing.timescale)")
        if key == "output":
            raise ConfigError(f"--vary {item!r}: the sweep chooses each run's output folder; "
                              "use --out for the parent folder")
        if key in seen:
            raise ConfigError(f"--vary {key}: given twice; list all its values in one --vary")
        if key in set_keys:
            raise ConfigError(f"--vary {key}: also given with --set; use one of them")
        seen.add(key)
        texts = split_values(text)
        parsed = []
        for t in texts:
            if not t:
                raise ConfigError(f"--vary {item!r}: empty value; expected KEY=V1,V2,... "
                                  "with no empty entries")
            try:
                parsed.append(yaml.safe_load(t))
            except yaml.YAMLError as exc:
                raise ConfigError(f"--vary {key}: the value {t!r} is not valid YAML "
                                  f"({getattr(exc, 'problem', exc)})") from None
        for i, v in enumerate(parsed):
            if v in parsed[:i]:
                raise ConfigError(f"--vary {key}: the value {texts[i]!r} is listed twice")
        out.append((key, texts))
    return out


def folder_name(values: dict) -> str:
    """'key=value__key=value' with anything but letters, digits and . _ = + - replaced."""
    parts = []
    for k, v in values.items():
        # unsafe runs become one '-', dropped at the ends ('[0,0,-1]' -> '0-0--1', '-1' kept)
        text = "-".join(p for p in _SAFE.split(str(v)) if p) or _digest({k: v})
        parts.append(re.sub("_{2,}", "_", f"{k}={text}"))
    name = "__".join(parts)
    if len(name) > 180:  # stay well inside the 255-byte limit of a path component
        name = name[:160].rstrip("_-") + "-" + _digest(values)
    return name


def _digest(values: dict) -> str:
    return hashlib.sha256(json.dumps(values, sort_keys=True).encode()).hexdigest()[:8]


def plan_runs(config_path, vary: list[str], set_pairs: list[str], out=None) -> tuple[Path, list[SweepRun]]:
    """Validate every combination and return (sweep folder, runs); nothing is written."""
    base_raw = cfgmod.apply_overrides(cfgmod.read_yaml(config_path), set_pairs)
    axes = parse_vary(vary, set_pairs)
    runs, names = [], {}
    for combo in itertools.product(*[[(k, t) for t in texts] for k, texts in axes]):
        values = dict(combo)
        pairs = [f"{k}={t}" for k, t in combo]
        label = ", ".join(pairs)
        raw = base_raw  # the base alone need not be valid: a --vary may supply a required key
        for k, t in combo:
            try:
                raw = cfgmod.apply_overrides(raw, [f"{k}={t}"])
            except ConfigError as exc:
                raise ConfigError(f"--vary {k}: {str(exc).split(': ', 1)[-1]}") from None
        try:
            cfg = cfgmod.validate(raw, str(config_path))
        except ConfigError as exc:
            keys = ", ".join(k for k, _ in axes)
            raise ConfigError(f"--vary {keys} (run {label}): {exc}") from None
        root = Path(out) if out else cfg.output  # output cannot be varied: the same for all
        name = folder_name(values)
        if name in names:  # two value texts that differ only in unsafe characters
            name = f"{name}-{_digest(values)}"
        names[name] = label
        runs.append(SweepRun(name=name, values=values, overrides=list(set_pairs) + pairs,
                             config=cfg, folder=root / name))
    return root, runs


def plan_study(config_path, vary, set_pairs, out=None, reference=(), match=()):
    """plan_runs plus the reference run (first, in DIR/reference) when ``reference`` lists its
    KEY=VALUE overrides; the runs whose settings depend on it are marked 'dependent' and checked
    with stand-in values, so nothing is refused only after the reference has run. Returns
    (folder, runs, notes for the user)."""
    root, runs = plan_runs(config_path, vary, set_pairs, out)
    match = refmod.parse_match(match, bool(reference))
    if not reference:
        return root, runs, []
    base = cfgmod.apply_overrides(cfgmod.read_yaml(config_path), set_pairs)
    for pair in reference:
        if "=" not in pair:
            raise ConfigError(f"--reference {pair!r}: expected KEY=VALUE, e.g. --reference "
                              "'forcing={kind: reinject, mode: power, dissipation: 0.1}'")
        if pair.split("=", 1)[0].strip() == "output":
            raise ConfigError("--reference output: the sweep puts the reference in "
                              f"{root / refmod.NAME}")
    try:
        cfg = cfgmod.validate(cfgmod.apply_overrides(base, list(reference)), str(config_path))
    except ConfigError as exc:
        raise ConfigError(f"--reference: {exc}") from None
    ref = SweepRun(name=refmod.NAME, values={k: "(reference)" for k in runs[0].values},
                   overrides=list(set_pairs) + list(reference), config=cfg,
                   folder=root / refmod.NAME, role="reference")
    notes = []
    for r in runs:
        if refmod.depends_on_reference(r.config, match):
            r.role = "dependent"
            note = refmod.check_resolvable(r.config, match, r.name)
            if note:
                notes.append(note)
    return root, [ref] + runs, list(dict.fromkeys(notes))


# --- state of existing folders -------------------------------------------------------------
def last_log_message(folder) -> str:
    """The last line of log.txt without its time stamp, or ''."""
    path = Path(folder) / "log.txt"
    try:
        lines = [ln for ln in path.read_text(errors="replace").splitlines() if ln.strip()]
    except OSError:
        return ""
    if not lines:
        return ""
    parts = lines[-1].split(" ", 2)  # 'YYYY-MM-DD HH:MM:SS message'
    return parts[2] if len(parts) == 3 else lines[-1]


def check_bookkeeping(root, names):
    """The sweep's own files in its folder (sweep_status.json, reference.json) are rewritten, so
    a file of that name must be one a sweep wrote (a JSON object): a user's file is refused,
    untouched, before anything runs."""
    for name in names:
        path = Path(root) / name
        if not path.exists():
            continue
        try:
            data = json.loads(path.read_text()) if path.is_file() else None
        except (OSError, ValueError, UnicodeDecodeError):
            data = None
        ours = isinstance(data, dict) and (name != STATUS_FILE or isinstance(data.get("runs"), dict))
        if not ours:
            raise ConfigError(f"{path}: exists and is not the sweep's own {name}; the sweep will "
                              "not overwrite it; move it or choose another --out")


def read_status(root) -> dict:
    try:
        data = json.loads((Path(root) / STATUS_FILE).read_text())
        return data if isinstance(data, dict) and isinstance(data.get("runs"), dict) else {"runs": {}}
    except (OSError, ValueError):
        return {"runs": {}}


def write_status(root, status: dict):
    """Atomic rewrite of sweep_status.json (temporary file + rename)."""
    write_json_atomic(Path(root) / STATUS_FILE, status, indent=1, sort_keys=True)


def _saved_config(folder):
    try:
        data = yaml.safe_load((Path(folder) / "config.yaml").read_text())
    except (OSError, yaml.YAMLError):
        return None
    return data if isinstance(data, dict) else None


def precheck_folder(folder) -> bool:
    """The checks that need no config: False for a missing or empty folder; ConfigError for a
    file, a locked folder or a folder that is not an eddybox run; True for a run folder."""
    if folder.exists() and not folder.is_dir():
        raise ConfigError(f"{folder}: exists and is not a folder; remove it or choose another --out")
    if not folder.is_dir() or not any(folder.iterdir()):
        return False
    refuse_if_locked(str(folder), "the sweep")
    if _saved_config(folder) is None and not any((folder / m).exists() for m in _RUN_MARKERS):
        raise ConfigError(f"{folder}: exists and is not an eddybox run folder; the sweep will not "
                          "overwrite it; remove it or choose another --out")
    return True


def decide_action(run: SweepRun, recorded: dict | None) -> str:
    """start | overwrite | resume | skip for one run folder (see the module docstring)."""
    folder = run.folder
    if not precheck_folder(folder):
        return "start"
    saved = _saved_config(folder)
    if saved is not None:
        derived = saved.pop("derived", None) or {}
        if derived.get("physics_hash") not in (None, run.config.physics_hash()):
            try:
                keys = differing_keys(cfgmod.validate(saved).physics(), run.config.physics())
            except ConfigError:
                keys = ["(unreadable config.yaml)"]
            raise ConfigError(f"{folder}: holds a run with a different config (differing keys: "
                              f"{', '.join(keys)}); the sweep will not overwrite it; remove it or "
                              "choose another --out")
        rec = recorded or {}
        if "exit" in rec:  # what this sweep saw when the run last ended
            done_hash = rec.get("config_hash") if rec["exit"] == 0 else None
        else:  # a run made outside the sweep, or a sweep killed before it could record
            done_hash = derived.get("config_hash")
        if last_log_message(folder).startswith("done:") and done_hash == run.config.hash():
            return "skip"
    if latest_checkpoint(str(folder / "checkpoints"), verify=False) is not None:
        return "resume"
    check_replaceable(str(folder))  # what `run --overwrite` would refuse, refused before any run
    return "overwrite"


# --- running -------------------------------------------------------------------------------
def threads_per_run() -> int:
    try:
        return max(1, int(os.environ.get("EDDYBOX_THREADS", "1")))
    except ValueError:
        return 1


def child_command(config_path, run: SweepRun) -> list[str]:
    """`eddybox run` for one run: its config and overrides; an interrupted run continues from
    its folder's own config.yaml, with the keys a restart may change set to the sweep's."""
    cli = [sys.executable, "-m", "eddybox.solver.cli", "run"]
    if run.action == "resume":
        cmd = cli + ["--out", str(run.folder), "--quiet", "--restart", "latest"]
        for key in cfgmod.restart_mutable_keys():
            if key not in ("name", "output"):
                cmd += ["--set", f"{key}={json.dumps(run.config.get(key))}"]
        return cmd
    cmd = cli + [os.path.abspath(config_path)]
    for pair in run.overrides:
        cmd += ["--set", pair]
    cmd += ["--out", str(run.folder), "--quiet"]
    if run.action == "overwrite":
        cmd += ["--overwrite"]
    return cmd


class _StopFlag:
    """Set by SIGTERM/SIGINT/SIGUSR1; the scheduling loop checks it between polls, so a signal never
    lands between launching a child and recording it."""

    def __init__(self):
        self.signal = None

    def __call__(self, signum, frame):
        self.signal = signal.Signals(signum).name


def console_path(root, run) -> Path:
    """Where a child's terminal output goes: a hidden folder, so `report ROOT/*/` sees only runs."""
    return Path(root) / CONSOLE_DIR / f"{run.name}.txt"


def _launch(config_path, run, root, env):
    path = console_path(root, run)
    path.parent.mkdir(exist_ok=True)
    console = open(path, "a" if run.action == "resume" else "w")
    proc = subprocess.Popen(child_command(config_path, run), stdout=console,
                            stderr=subprocess.STDOUT, env=env)
    return proc, console, time.monotonic()


def execute(config_path, runs: list[SweepRun], root: Path, jobs: int, threads: int,
            status: dict, echo=print) -> bool:
    """Run the runs that need it, `jobs` at a time; returns True when stopped by a signal
    (the running children get SIGTERM, write a checkpoint and exit 75)."""
    env = dict(os.environ, EDDYBOX_THREADS=str(threads))
    pending = [r for r in runs if r.action != "skip"]
    running = {}
    stop = _StopFlag()
    old = {}
    for s in (signal.SIGTERM, signal.SIGINT, signal.SIGUSR1):
        try:
            old[s] = signal.signal(s, stop)
        except ValueError:  # not the main thread: leave signals alone
            pass
    try:
        while (pending or running) and stop.signal is None:
            while pending and len(running) < jobs and stop.signal is None:
                run = pending.pop(0)
                proc, console, t0 = _launch(config_path, run, root, env)
                running[proc] = (run, console, t0)
                echo(f"  started  {run.name} ({run.action})")
            for proc in [p for p in running if p.poll() is not None]:
                _finish(running.pop(proc), proc.returncode, status, root, echo)
            time.sleep(0.05)
        if stop.signal is not None:
            echo(f"sweep: {stop.signal} received; stopping the running runs (each writes a "
                 "checkpoint)")
            for proc in running:
                if proc.poll() is None:
                    proc.send_signal(signal.SIGTERM)
            deadline = time.monotonic() + 300.0
            for proc in list(running):
                try:
                    proc.wait(timeout=max(1.0, deadline - time.monotonic()))
                except subprocess.TimeoutExpired:
                    proc.kill()
                    proc.wait()
                _finish(running.pop(proc), proc.returncode, status, root, echo)
    finally:
        for s, h in old.items():
            signal.signal(s, h)
    return stop.signal is not None


def _finish(entry, code, status, root, echo):
    run, console, t0 = entry
    console.close()
    run.code = code
    run.seconds = time.monotonic() - t0
    if code == EXIT_DONE:
        run.status = "resumed" if run.action == "resume" else "done"
    else:
        run.status = "failed"
    status["runs"][run.name] = {
        "values": run.values, "exit": code, "status": run.status,
        "config_hash": run.config.hash(), "seconds": round(run.seconds, 3),
        "finished": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds")}
    if run.resolved:
        status["runs"][run.name]["resolved"] = run.resolved
    write_status(root, status)
    tail = "" if code == EXIT_DONE else f" (see {console_path(root, run)})"
    echo(f"  finished {run.name}: exit {code} after {run.seconds:.1f} s{tail}")


# --- the summary table ---------------------------------------------------------------------
#: what the summary shows of each run, and compares with the reference
SUMMARY_KEYS = (("energy", "E"), ("dissipation", "eps"), ("re_lambda", "Re_lambda"),
                ("eddy_time", "T_E"))


def run_row(run: SweepRun) -> dict:
    """Final time, fluid series and stationary means of E, eps, Re_lambda and T_E of a run
    folder (t NaN and no estimates if none)."""
    from eddybox.solver.study.readers import read_fluid_series
    from eddybox.solver.study.run_results import fluid_estimates, measured_from

    row = {"t": math.nan}
    try:
        series = read_fluid_series(run.folder)
    except (ConfigError, OSError, KeyError):
        return row
    if series["time"].size:
        row["t"] = float(series["time"][-1])
    row["series"] = series
    row["estimates"] = fluid_estimates(series, keys=[k for k, _ in SUMMARY_KEYS],
                                       t_min=measured_from(_saved_config(run.folder)))
    return row


def _fmt_est(e) -> str:
    if e is None or not math.isfinite(e.mean):
        return "-"
    mark = "" if e.converged else NOT_CONVERGED
    return f"{e.mean:.4g} ± {e.stderr:.2g}{mark}"


def _reference_differences(runs, infos, correction):
    """Per run, the text of the column 'vs reference': the summary quantities whose difference
    from the reference is significant after the correction over every comparison of the table."""
    from eddybox.solver.study.run_results import compare_quantity

    ref, ref_info = runs[0], infos[0]
    cells, diffs = {}, []
    for i, (r, info) in enumerate(zip(runs[1:], infos[1:]), start=1):
        if "estimates" not in info or "estimates" not in ref_info:
            continue
        paired = correlated(_saved_config(ref.folder), _saved_config(r.folder))
        for key, label in SUMMARY_KEYS:
            d = compare_quantity(key, ref_info["series"], ref_info["estimates"][key],
                                 info["series"], info["estimates"][key], paired)
            if d is not None:
                diffs.append((i, label, d))
                cells.setdefault(i, [])
    for (i, label, d), f in zip(diffs, flag_family([d for *_, d in diffs], correction)):
        if f.significant:
            cells[i].append(f"{label} {100 * d.relative:+.3g} %")
    return {i: ", ".join(v) or "none" for i, v in cells.items()}, len(diffs)


def summary_table(runs: list[SweepRun], keys: list[str], correction: str = "holm") -> str:
    infos = [run_row(r) for r in runs]
    with_ref = runs[0].role == "reference"
    header = keys + ["status", "final t"] + [label for _, label in SUMMARY_KEYS]
    vs, family = _reference_differences(runs, infos, correction) if with_ref else ({}, 0)
    if with_ref:
        header.append("differs from reference")
    rows = []
    for i, (r, info) in enumerate(zip(runs, infos)):
        code = "" if r.code is None else f" ({r.code})"
        est = info.get("estimates", {})
        row = [r.values.get(k, "") for k in keys] + [
            r.status + code, "-" if not math.isfinite(info["t"]) else f"{info['t']:.4g}"]
        row += [_fmt_est(est.get(k)) for k, _ in SUMMARY_KEYS]
        if with_ref:
            row.append("(reference)" if i == 0 else vs.get(i, "-"))
        rows.append(row)
    widths = [max(len(str(x)) for x in col) for col in zip(header, *rows)]
    line = lambda cells: "  ".join(str(c).ljust(w) for c, w in zip(cells, widths))  # noqa: E731
    out = [line(header), line(["-" * w for w in widths])] + [line(r) for r in rows]
    notes = ["means ± standard error over the stationary part (MSER-5 truncation, "
             f"Flyvbjerg-Petersen blocking); {NOT_CONVERGED} not converged: the run is too short "
             "for a reliable error bar"]
    if with_ref:
        notes.append(f"differs from reference: relative difference (b - a)/|a| where a t test "
                     f"(paired for runs with the reference's seed) rejects equality at "
                     f"{SIGNIFICANCE_LEVEL:g} after the {correction} correction over the "
                     f"{family} comparisons of this table, where the difference's error bar is "
                     "established; details in eddybox report")
    if any(r.code == EXIT_STOPPED for r in runs):
        notes.append("exit 75: stopped early after a checkpoint; run the same sweep command "
                     "again to resume")
    if any(r.code == EXIT_NOTHING_TO_RESUME for r in runs):
        notes.append("exit 76: stopped before its first checkpoint; run the same sweep command "
                     "again to start it over")
    return "\n".join(out + notes)


# --- entry point ---------------------------------------------------------------------------
def run_sweep(args) -> int:
    """`eddybox sweep`; returns 0 when every run succeeded, 75 when stopped by a signal, else 1."""
    if args.jobs is not None and args.jobs < 1:
        raise ConfigError(f"--jobs: expected a positive integer, got {args.jobs}")
    reference = getattr(args, "reference", None) or []
    match = getattr(args, "match", None) or []
    root, runs, notes = plan_study(args.config, args.vary, args.set or [], args.out, reference, match)
    match = refmod.parse_match(match, bool(reference))
    if root.exists() and not root.is_dir():
        raise ConfigError(f"{root}: the sweep folder exists and is not a folder")
    if root.is_dir():
        refuse_if_locked(str(root), "a second sweep on this folder")
    check_bookkeeping(root, [STATUS_FILE] + ([refmod.RECORD_FILE] if reference else []))
    status = read_status(root)
    ref = runs[0] if runs[0].role == "reference" else None
    record = refmod.read_record(root, ref.config.hash()) if ref else None
    for r in runs:  # every folder is checked before anything runs
        if r.role == "dependent" and record is None:
            precheck_folder(r.folder)  # decided once the reference is measured
        else:
            if r.role == "dependent":
                _resolve(r, record, match)
            r.action = decide_action(r, status["runs"].get(r.name))
    threads = threads_per_run()
    jobs = args.jobs or max(1, available_cores() // threads)
    root.mkdir(parents=True, exist_ok=True)
    lock = RunLock(root).acquire("sweep")  # a second sweep on this folder is refused (exit 2)
    try:
        status.update(config=os.path.abspath(args.config), vary=list(args.vary), set=list(args.set or []),
                      reference=list(reference), match=list(match))
        for r in runs:
            if r.action == "skip":
                r.status = "skipped"
                r.code = status["runs"].get(r.name, {}).get("exit", 0)
            status["runs"].setdefault(r.name, {"values": r.values})
        write_status(root, status)
        for note in notes:
            print(note)
        first = [r for r in runs if r.role != "dependent"]
        later = [r for r in runs if r.role == "dependent"]
        todo = sum(r.action != "skip" for r in runs)
        waiting = len(later) if record is None else 0
        print(f"sweep: {len(runs)} runs in {root}, {'up to ' if waiting else ''}{todo} to run, "
              f"{min(jobs, max(todo, 1))} at a time with {threads} thread(s) each"
              + (f"; {waiting} wait for the reference" if waiting else ""))
        interrupted = execute(args.config, first, root, jobs, threads, status)
        problem = None
        if later and not interrupted:
            problem, record = _reference_values(ref, root, record)
            if problem is None:
                for r in later:
                    if not r.resolved:
                        _resolve(r, record, match)
                        r.action = decide_action(r, status["runs"].get(r.name))
                        if r.action == "skip":
                            r.status, r.code = "skipped", status["runs"].get(r.name, {}).get("exit", 0)
                    _record_resolved(status, r)
                write_status(root, status)
                interrupted = execute(args.config, later, root, jobs, threads, status)
            else:
                for r in later:
                    r.status = "not started (reference)"
        print(summary_table(runs, list(runs[-1].values), correction=getattr(args, "correction", "holm")))
        if problem:
            print(f"sweep: {problem}")
        print(f"compare the runs with: eddybox report {root}/*/ --out {root}-report")
        sys.stdout.flush()
        if interrupted:
            return EXIT_STOPPED
        return 0 if all(r.code == 0 for r in runs) else 1
    finally:
        lock.release()


def _resolve(run: SweepRun, record: dict, match):
    """Put the reference's values into a dependent run: its config and the --set overrides its
    child receives (so they reach its config.yaml)."""
    run.config, run.resolved = refmod.resolve(run.config, record, match)
    run.overrides = list(run.overrides) + [f"{k}={json.dumps(v['value'])}"
                                           for k, v in run.resolved.items()]


def _record_resolved(status, run):
    status["runs"].setdefault(run.name, {"values": run.values})["resolved"] = run.resolved


def _reference_values(ref: SweepRun, root, record):
    """(None, record) when the reference succeeded and its T_E and eps are converged (measured
    now, or recorded for this reference before); else (one message, None)."""
    if ref.code != 0:
        return (f"reference run {ref.folder} failed (exit {ref.code}; see "
                f"{console_path(root, ref)}); the runs that resolve their settings from it were "
                "not started"), None
    how = "recorded in"
    if record is None:
        record = refmod.measure(ref.folder, ref.config.hash())
        if not record["converged"]:
            return refmod.not_converged_message(record), None
        refmod.write_record(root, record)
        how = "written to"
    print(f"reference: T_E = {record['eddy_time']['mean']:.6g} ± {record['eddy_time']['stderr']:.2g}, "
          f"eps = {record['dissipation']['mean']:.6g} ± {record['dissipation']['stderr']:.2g} "
          f"(stationary from t = {record['eddy_time']['window_start']:.4g}); {how} "
          f"{Path(root) / refmod.RECORD_FILE}")
    return None, record
