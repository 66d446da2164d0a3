"""Checkpoints: the complete state of a run in one HDF5 file, in global (layout-independent)
index order, written atomically (temporary file, fsync, rename) and pruned to `keep`.

Layout of a checkpoint file:
    velocity_hat             (3, N, N, N/2+1) complex, normalised Fourier coefficients
    attrs                    time, step, dt, cfl, physics_hash, config (YAML), wall_time
    /state/<part>/<key>      arrays and scalars of every stateful part (forcing, hooks,
                             particles, ...), as returned by their `state()` methods
"""
from __future__ import annotations

import glob
import os

import h5py
import numpy as np

from eddybox.solver.errors import CheckpointError
from eddybox.solver.run.output import file_attrs, fsync_path


def rng_state_array(rng: np.random.Generator) -> np.ndarray:
    """A numpy Generator's bit-generator state as bytes (uint8), storable in a checkpoint."""
    return np.frombuffer(repr(rng.bit_generator.state).encode(), np.uint8).copy()


def restore_rng_state(rng: np.random.Generator, data) -> None:
    """Inverse of `rng_state_array` (the state is a dict literal; literal_eval, no code runs)."""
    import ast

    rng.bit_generator.state = ast.literal_eval(bytes(np.asarray(data, np.uint8)).decode())


def checkpoint_name(step: int) -> str:
    return f"checkpoint_{step:010d}.h5"


def list_checkpoints(folder) -> list[str]:
    return sorted(glob.glob(os.path.join(folder, "checkpoint_*.h5")))


def _write_tree(group, tree):
    for k, v in tree.items():
        if isinstance(v, dict):
            _write_tree(group.create_group(k), v)
        else:
            group.create_dataset(k, data=np.asarray(v))


def _read_tree(group):
    out = {}
    for k, v in group.items():
        out[k] = _read_tree(v) if isinstance(v, h5py.Group) else v[()]
    return out


def write_checkpoint(folder, step, velocity_hat, attrs: dict, state: dict, config_hash: str,
                     length: float, keep: int) -> str:
    os.makedirs(folder, exist_ok=True)
    path = os.path.join(folder, checkpoint_name(step))
    tmp = path + f".tmp{os.getpid()}"
    try:
        with h5py.File(tmp, "w") as f:
            for k, v in file_attrs(config_hash).items():
                f.attrs[k] = v
            for k, v in attrs.items():
                f.attrs[k] = v
            d = f.create_dataset("velocity_hat", data=velocity_hat)
            d.attrs["units"] = "L T^-1"
            d.attrs["description"] = "normalised Fourier coefficients (3, kx, ky, kz>=0)"
            d.attrs["length"] = length
            _write_tree(f.create_group("state"), state)
        fsync_path(tmp)
        os.replace(tmp, path)
        fsync_path(folder)
    except BaseException:
        if os.path.exists(tmp):
            try:
                os.remove(tmp)
            except OSError:
                pass
        raise
    for old in list_checkpoints(folder)[:-keep]:
        try:
            os.remove(old)
        except OSError:
            pass
    return path


def read_checkpoint(path):
    """Return (velocity_hat, attrs, state) or raise CheckpointError."""
    if not os.path.exists(path):
        raise CheckpointError(f"{path}: no such checkpoint file")
    try:
        with h5py.File(path, "r") as f:
            if f.attrs.get("producer") != "eddybox" or "velocity_hat" not in f or "state" not in f:
                raise CheckpointError(f"{path}: not an eddybox checkpoint")
            attrs = {k: (v.decode() if isinstance(v, bytes) else v) for k, v in f.attrs.items()}
            return f["velocity_hat"][...], attrs, _read_tree(f["state"])
    except (OSError, KeyError, RuntimeError) as exc:
        raise CheckpointError(f"{path}: unreadable or truncated checkpoint ({exc})") from None


def latest_checkpoint(folder):
    """The newest readable checkpoint in `folder` (skipping truncated ones), or None."""
    for path in reversed(list_checkpoints(folder)):
        try:
            with h5py.File(path, "r") as f:
                if "velocity_hat" in f and "state" in f:
                    return path
        except (OSError, RuntimeError):
            continue
    return None
