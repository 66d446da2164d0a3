"""Checkpoints: the complete state of a run in one HDF5 file, in global (layout-independent)
index order, written atomically (temporary file, fsync, rename) and pruned to `keep`.

Layout of a checkpoint file:
    velocity_hat             (3, N, N, N/2+1) complex, normalised Fourier coefficients
    attrs                    time, step, dt, cfl, physics_hash, config (YAML), wall_time
    /state/<part>/<key>      arrays and scalars of every stateful part (forcing, hooks,
                             particles, ...), as returned by their `state()` methods

Every dataset carries a CRC-32 of its type, shape and bytes (attribute `crc32`), and the file
a CRC-32 of its other attributes (`attrs_crc32`); `read_checkpoint` verifies all of them and
refuses a velocity field that is not finite, so a flipped bit or a truncated write is found
before a run continues from it. `latest_intact` passes over such files to the newest good one.
"""
from __future__ import annotations

import ast
import glob
import os
import zlib

import h5py
import numpy as np

from eddybox.solver.errors import CheckpointError
from eddybox.solver.fluid.field_file import checksum
from eddybox.solver.run.output import (
    discard_temporary,
    file_attrs,
    fsync_path,
    release_after_failure,
    write_error,
)


def rng_state_array(rng: np.random.Generator) -> np.ndarray:
    """A numpy Generator's bit-generator state as bytes (uint8), storable in a checkpoint."""
    return np.frombuffer(repr(rng.bit_generator.state).encode(), np.uint8).copy()


def restore_rng_state(rng: np.random.Generator, data) -> None:
    """Inverse of `rng_state_array` (the state is a dict literal; literal_eval, no code runs).
    ValueError when the bytes are not such a state."""
    try:
        rng.bit_generator.state = ast.literal_eval(bytes(np.asarray(data, np.uint8)).decode())
    except (ValueError, TypeError, KeyError, SyntaxError, UnicodeDecodeError, MemoryError,
            RecursionError, OverflowError):
        raise ValueError("garbled random-generator state") from None


def attrs_checksum(attrs) -> int:
    """CRC-32 of the attributes: name, type and value of each, in name order."""
    crc = 0
    for k in sorted(attrs):
        if k == "attrs_crc32":
            continue
        v = attrs[k]
        crc = zlib.crc32(k.encode(), crc)
        if isinstance(v, bytes):
            v = v.decode(errors="replace")
        if isinstance(v, str):
            crc = zlib.crc32(b"str:" + v.encode(), crc)
        else:
            a = np.ascontiguousarray(v)
            crc = zlib.crc32(f"{a.dtype.str}{a.shape}".encode(), crc)
            crc = zlib.crc32(a.reshape(-1).view(np.uint8), crc)
    return crc


def checkpoint_name(step: int) -> str:
    return f"checkpoint_{step:010d}.h5"


def list_checkpoints(folder) -> list[str]:
    return sorted(glob.glob(os.path.join(folder, "checkpoint_*.h5")))


def _write_tree(group, tree):
    for k, v in tree.items():
        if isinstance(v, dict):
            _write_tree(group.create_group(k), v)
        else:
            data = np.asarray(v)
            group.create_dataset(k, data=data).attrs["crc32"] = checksum(data)


def _read_verified(path, d):
    if "crc32" not in d.attrs:
        raise CheckpointError(f"{path}: dataset {d.name} has no checksum (not written by this "
                              "eddybox, or damaged); not used")
    value = d[()]
    if checksum(np.asarray(value)) != int(d.attrs["crc32"]):
        raise CheckpointError(f"{path}: dataset {d.name} does not match its checksum (the file "
                              "is corrupt); not used")
    return value


def _read_tree(path, group):
    out = {}
    for k, v in group.items():
        out[k] = _read_tree(path, v) if isinstance(v, h5py.Group) else _read_verified(path, v)
    return out


def write_checkpoint(folder, step, velocity_hat, attrs: dict, state: dict, config_hash: str,
                     length: float, keep: int) -> str:
    """Write checkpoint_<step>.h5 in `folder` atomically and prune the folder to `keep`.
    DiskWriteError (naming the file) when it cannot be written; the older checkpoints are
    untouched then."""
    path = os.path.join(folder, checkpoint_name(step))
    tmp = path + f".tmp{os.getpid()}"
    f = None
    try:
        os.makedirs(folder, exist_ok=True)
        f = h5py.File(tmp, "w")
        for k, v in file_attrs(config_hash).items():
            f.attrs[k] = v
        for k, v in attrs.items():
            f.attrs[k] = v
        d = f.create_dataset("velocity_hat", data=velocity_hat)
        d.attrs["units"] = "L T^-1"
        d.attrs["description"] = "normalised Fourier coefficients (3, kx, ky, kz>=0)"
        d.attrs["length"] = length
        d.attrs["crc32"] = checksum(velocity_hat)
        _write_tree(f.create_group("state"), state)
        f.attrs["attrs_crc32"] = attrs_checksum(dict(f.attrs))
        f.close()
        f = None
        fsync_path(tmp)
        os.replace(tmp, path)
        fsync_path(folder)
    except BaseException as exc:
        release_after_failure(f)
        discard_temporary(tmp)
        if isinstance(exc, (OSError, RuntimeError)):  # h5py reports a full disk either way
            raise write_error(path, exc) from None
        raise
    for old in list_checkpoints(folder)[:-keep]:
        try:
            os.remove(old)
        except OSError:
            pass
    return path


def read_checkpoint(path):
    """Return (velocity_hat, attrs, state), every checksum verified, or raise CheckpointError
    naming the file and what is wrong with it."""
    if not os.path.exists(path):
        raise CheckpointError(f"{path}: no such checkpoint file")
    try:
        with h5py.File(path, "r") as f:
            if f.attrs.get("producer") != "eddybox" or "velocity_hat" not in f or "state" not in f:
                raise CheckpointError(f"{path}: not an eddybox checkpoint")
            if not isinstance(f["velocity_hat"], h5py.Dataset) or not isinstance(f["state"], h5py.Group):
                raise CheckpointError(f"{path}: not an eddybox checkpoint")
            raw = dict(f.attrs)
            if "attrs_crc32" not in raw:
                raise CheckpointError(f"{path}: the checkpoint has no checksums (not written by "
                                      "this eddybox, or damaged); not used")
            if attrs_checksum(raw) != int(raw["attrs_crc32"]):
                raise CheckpointError(f"{path}: its attributes do not match their checksum (the "
                                      "file is corrupt); not used")
            attrs = {k: (v.decode() if isinstance(v, bytes) else v) for k, v in raw.items()}
            uh = _read_verified(path, f["velocity_hat"])
            state = _read_tree(path, f["state"])
    except (OSError, KeyError, RuntimeError, ValueError, TypeError) as exc:
        raise CheckpointError(f"{path}: unreadable or truncated checkpoint ({exc})") from None
    if uh.ndim != 4 or uh.shape[0] != 3 or not np.iscomplexobj(uh):
        raise CheckpointError(f"{path}: velocity_hat has shape {uh.shape} and type {uh.dtype}; "
                              "expected (3, N, N, N/2+1) complex")
    if not np.isfinite(uh).all():
        raise CheckpointError(f"{path}: velocity_hat holds NaN or infinite values; not used")
    return uh, attrs, state


def latest_intact(folder):
    """(path, (velocity_hat, attrs, state), skipped) of the newest checkpoint in `folder` that
    reads and verifies, passing over damaged ones; skipped lists (path, reason) of those.
    (None, None, skipped) when there is none."""
    skipped = []
    for path in reversed(list_checkpoints(folder)):
        try:
            return path, read_checkpoint(path), skipped
        except CheckpointError as exc:
            skipped.append((path, str(exc).removeprefix(f"{path}: ")))
    return None, None, skipped


def latest_checkpoint(folder, verify: bool = True):
    """The newest checkpoint in `folder` that verifies (or, with verify=False, that opens and
    holds a velocity field), or None."""
    if verify:
        return latest_intact(folder)[0]
    for path in reversed(list_checkpoints(folder)):
        try:
            with h5py.File(path, "r") as f:
                if "velocity_hat" in f and "state" in f:
                    return path
        except (OSError, RuntimeError):
            continue
    return None
