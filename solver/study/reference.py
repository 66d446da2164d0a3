"""The reference run of a sweep: what is measured in it, where that is recorded, and how the other
runs' relative settings are resolved from it.

    eddybox sweep study.yaml --reference 'forcing={kind: reinject, mode: power, dissipation: 0.1}' \\
        --match dissipation --vary 'forcing.timescale=0.25 T_E,1 T_E,4 T_E'

The reference (the sweep's config with the --reference overrides, in SWEEP/reference) runs first.
From its fluid series come the stationary means (MSER-5 window; the error bar of the significance
tests, estimators.significance.mean_error) of

    T_E = L/u'   the large-eddy turnover time (integral scale over r.m.s. velocity, the report's
                 T_E row), against which every 'x T_E' value of the other runs is resolved
                 (scales.EDDY_TIME_KEYS: forcing.timescale, forcing.calibrate);
    eps          the dissipation, which `--match dissipation` gives the other runs as
                 forcing.dissipation (OU runs should calibrate to it: forcing.calibrate).

Both must be converged, or the runs that depend on them are not started. The measurement is
written to SWEEP/reference.json with the reference's config hash: a sweep run again (after an
interruption) reuses it as long as the reference is unchanged, so every run of a study resolves
against the same numbers. The resolved absolute values go into each run's config (its --set
overrides, hence its config.yaml); the sweep's status file records what was given and what it
resolved to.
"""
from __future__ import annotations

import datetime
import json
import math
from pathlib import Path

import numpy as np
import yaml

from eddybox.forcing import FORCINGS
from eddybox.solver.errors import ConfigError
from eddybox.solver.run import scales
from eddybox.solver.run.output import write_json_atomic

NAME = "reference"
RECORD_FILE = "reference.json"

#: --match NAME -> (the key it sets in every other run, the reference's estimate it takes)
MATCHES = {"dissipation": ("forcing.dissipation", "dissipation")}


def parse_match(items, has_reference: bool) -> list[str]:
    """The --match names, checked; ConfigError naming the bad one."""
    out = []
    for item in items or ():
        name = item.strip()
        if name not in MATCHES:
            raise ConfigError(f"--match {item!r}: not a matchable quantity; choose one of "
                              f"{', '.join(MATCHES)}")
        if name not in out:
            out.append(name)
    if out and not has_reference:
        raise ConfigError("--match: matches a quantity of the reference run; give the reference "
                          "with --reference KEY=VALUE")
    return out


def depends_on_reference(config, match) -> bool:
    """True when a run has settings resolved from the reference ('x T_E' values, --match)."""
    return bool(match) or bool(scales.eddy_time_keys(config))


def check_resolvable(config, match, label: str):
    """Resolve with stand-in values and validate, so a run that cannot take the reference's
    values is refused before anything runs. Returns a note for the user, or ''."""
    changes = {}
    for name in match:
        key, _ = MATCHES[name]
        kind = config.forcing.kind
        if "dissipation" not in FORCINGS[kind].params:
            raise ConfigError(f"--match {name} (run {label}): forcing {kind!r} has no "
                              f"{key}; matching applies to forcings that aim at a dissipation")
        changes[key] = 0.1 if config.get(key) is None else config.get(key)
    try:
        probe = config.with_changes(changes) if changes else config
        probe, _ = scales.resolve_eddy_times(probe, eddy_time=1.0, source="stand-in")
    except ConfigError as exc:
        raise ConfigError(f"run {label}: with the reference's values: {exc}") from None
    if match and scales.forcing_target(probe) is None:
        raise ConfigError(f"--match dissipation (run {label}): its forcing "
                          f"({probe.forcing.summary()}) does not aim at a dissipation; use "
                          "forcing.mode: power for reinject")
    if "dissipation" in match and probe.forcing.kind == "ou" and probe.forcing.calibrate is None:
        return (f"note: run {label}: OU forcing without forcing.calibrate meets its target "
                "dissipation only for short T_F (Eswaran & Pope 1988); set forcing.calibrate "
                "(e.g. '20 T_E') to match the reference's dissipation at any T_F")
    return ""


def measure(folder, config_hash: str) -> dict:
    """The record of a finished reference run: the stationary means of T_E = L/u' and eps with
    the errors the significance tests use (comparison.stationary_mean: MSER-5 window, batch
    means corrected for short batches); ``converged`` False, with the reasons, when the window
    or the error bar of either is not established."""
    from eddybox.solver.study.comparison import stationary_mean
    from eddybox.solver.study.readers import read_fluid_series
    from eddybox.solver.study.run_results import QUANTITIES, measured_from

    series = read_fluid_series(folder)
    try:
        config = yaml.safe_load((Path(folder) / "config.yaml").read_text())
    except (OSError, yaml.YAMLError):
        config = None
    keep = series["time"] >= measured_from(config if isinstance(config, dict) else {})
    series = {k: v[keep] for k, v in series.items()}
    record = {"folder": str(folder), "config_hash": config_hash,
              "measured": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds")}
    for key in ("eddy_time", "dissipation"):
        with np.errstate(divide="ignore", invalid="ignore"):
            err, start = stationary_mean(series["time"], QUANTITIES[key].samples(series))
        record[key] = {"mean": err.mean, "stderr": err.stderr, "window_start": start,
                       "converged": bool(err.reliable and math.isfinite(err.mean)), "note": err.note}
    record["converged"] = all(record[k]["converged"] for k in ("eddy_time", "dissipation"))
    return record


def not_converged_message(record) -> str:
    bad = [f"{k} ({record[k]['note'] or 'no stationary window'})" for k in ("eddy_time", "dissipation")
           if not (record[k]["converged"] and math.isfinite(record[k]["mean"]))]
    return (f"reference run {record['folder']}: the stationary mean of {' and '.join(bad)} is not "
            "converged, so the runs that resolve their settings from it were not started; run "
            "the reference longer (e.g. --reference time.end=...) and the same command again")


def read_record(root, config_hash: str) -> dict | None:
    """The recorded measurement if it belongs to a reference with this config hash."""
    try:
        data = json.loads((Path(root) / RECORD_FILE).read_text())
    except (OSError, ValueError):
        return None
    if not isinstance(data, dict) or data.get("config_hash") != config_hash or not data.get("converged"):
        return None
    try:
        float(data["eddy_time"]["mean"]), float(data["dissipation"]["mean"])
    except (KeyError, TypeError, ValueError):
        return None
    return data


def write_record(root, record: dict):
    """Atomic write of SWEEP/reference.json."""
    write_json_atomic(Path(root) / RECORD_FILE, record, indent=1, sort_keys=True)


def resolve(config, record: dict, match) -> tuple[object, dict]:
    """(config with every relative setting replaced by its absolute value, {key: {given, value}}).
    'x T_E' values take x times the reference's T_E; --match keys take the reference's mean."""
    eddy = float(record["eddy_time"]["mean"])
    source = (f"reference run {record['folder']}: stationary mean of L/u' from "
              f"t = {record['eddy_time']['window_start']:.6g}")
    resolved, eddy_record = scales.resolve_eddy_times(config, eddy_time=eddy, source=source)
    changes = {k: v for k, v in eddy_record.items() if isinstance(v, dict)}
    for name in match:
        key, what = MATCHES[name]
        value = float(record[what]["mean"])
        changes[key] = {"given": f"the reference's {what}", "value": value}
        resolved = resolved.with_changes({key: value})
    return resolved, changes
