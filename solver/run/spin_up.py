"""Spin up once, study many: a run may start from another run's field (`fluid.initial: {kind:
file, path: ...}`), given as a checkpoint or field file, or as the spin-up's run folder (its
newest intact checkpoint). The run records where its field came from (the `derived:` block of
its config.yaml and its log), so a particle study can always be traced to its spin-up."""
from __future__ import annotations

import os

import h5py
import yaml

from eddybox.solver.errors import ConfigError
from eddybox.solver.run import checkpoint as ckpt


def resolve_initial_file(path: str) -> str:
    """The field file a `fluid.initial.path` names: the path itself, or for a run folder (or
    its checkpoints/ folder) the newest checkpoint that verifies."""
    if not os.path.isdir(path):
        return path
    folder = os.path.join(path, "checkpoints") if os.path.isdir(os.path.join(path, "checkpoints")) else path
    found = ckpt.latest_checkpoint(folder)
    if found is None:
        raise ConfigError(f"fluid.initial.path: {path} is a folder without an intact checkpoint; "
                          "give a run folder, a checkpoint or a field snapshot of eddybox")
    return found


def provenance(path: str) -> dict:
    """What a run started from `path` records: the file, its run folder, time, step and the
    hashes of the run that wrote it, and that run's calibrated forcing variance if any."""
    out = {"file": os.path.abspath(path)}
    try:
        with h5py.File(path, "r") as f:
            a = f.attrs
            for key in ("time", "step", "config_hash", "physics_hash", "created", "code_version"):
                if key in a:
                    v = a[key]
                    out[key] = v.decode() if isinstance(v, bytes) else (v.item() if hasattr(v, "item") else v)
    except (OSError, RuntimeError):
        return out  # read_velocity_hat has already named what is wrong with the file
    folder = os.path.dirname(os.path.abspath(path))
    if os.path.basename(folder) in ("checkpoints", "fields"):
        folder = os.path.dirname(folder)
    cfg_path = os.path.join(folder, "config.yaml")
    if os.path.isfile(cfg_path):
        out["run_folder"] = folder
        try:
            with open(cfg_path) as fh:
                derived = (yaml.safe_load(fh) or {}).get("derived") or {}
        except (OSError, yaml.YAMLError, AttributeError):
            derived = {}
        cal = derived.get("forcing_calibration") if isinstance(derived, dict) else None
        if isinstance(cal, dict) and cal.get("status") == "done":
            out["forcing_calibrated_variance"] = float(cal["variance"])
    return out


def forcing_note(source: dict, forcing) -> str | None:
    """A log line when the spin-up calibrated its OU forcing and this run forces with another
    variance (the fluid then drifts to another stationary state)."""
    var = source.get("forcing_calibrated_variance")
    mine = getattr(forcing, "sigma2", None)
    if var is None or mine is None or getattr(forcing, "t_calibrate", None) is not None:
        return None
    if abs(mine - var) <= 1e-9 * var:
        return None
    return (f"note: the spin-up calibrated its forcing to sigma^2 = {var:.6g}; this run forces "
            f"with sigma^2 = {mine:.6g}; set forcing.variance: {var:.6g} (instead of "
            "forcing.dissipation) to continue the spin-up's stationary state")
