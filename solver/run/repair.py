"""Make the files of a killed run readable by plain HDF5 readers again.

A writer killed in single-writer/multiple-reader mode leaves the file's consistency flags set:
HDF5 then refuses every open except a SWMR read (`h5py.File(path, "r", swmr=True)`). `repair`
copies such a file, object by object with its attributes and dimension scales, into a fresh
file that atomically replaces it. The data are unchanged (every flushed sample is kept).
"""
from __future__ import annotations

import os

import h5py

from eddybox.solver.run.output import discard_temporary, fsync_path, release_after_failure, write_error


def needs_repair(path) -> bool:
    """True when the file opens only as a SWMR reader (its writer did not close it)."""
    try:
        with h5py.File(path, "r"):
            return False
    except (OSError, RuntimeError):
        try:
            with h5py.File(path, "r", swmr=True):
                return True
        except (OSError, RuntimeError):
            return False


def _copy_attrs(src, dst):
    for k, v in src.attrs.items():
        if k in ("DIMENSION_LIST", "REFERENCE_LIST", "CLASS", "NAME"):
            continue  # dimension-scale bookkeeping is rebuilt below
        dst.attrs[k] = v


def repair_file(path) -> bool:
    """Rewrite `path` if it needs it; return whether it did."""
    if not needs_repair(path):
        return False
    tmp = str(path) + ".repair"
    with h5py.File(path, "r", swmr=True) as src:
        dst = None
        try:
            dst = h5py.File(tmp, "w", libver="latest")
            _copy(src, dst)
            dst.close()
        except BaseException as exc:  # a full disk or a stop signal: the original stays as it was
            release_after_failure(dst)
            discard_temporary(tmp)
            if isinstance(exc, (OSError, RuntimeError)):
                raise write_error(tmp, exc) from None
            raise
    fsync_path(tmp)
    os.replace(tmp, path)
    return True


def _copy(src, dst):
    """Every object of `src` into the new file `dst`, with attributes and dimension scales."""
    _copy_attrs(src, dst)
    datasets = []

    def visit(name, obj):
        if isinstance(obj, h5py.Group):
            _copy_attrs(obj, dst.require_group(name))
        else:
            maxshape = obj.maxshape if obj.chunks else None
            d = dst.create_dataset(name, data=obj[...], maxshape=maxshape, chunks=obj.chunks)
            _copy_attrs(obj, d)
            datasets.append(name)

    src.visititems(visit)
    for name in datasets:
        s = src[name]
        if s.is_scale:
            # eddybox names every scale after its dataset (eddybox.solver.run.output)
            dst[name].make_scale(name.rsplit("/", 1)[-1])
    for name in datasets:
        s = src[name]
        for axis, dim in enumerate(s.dims):
            for scale in dim.values():
                if scale.name != s.name:
                    dst[name].dims[axis].attach_scale(dst[scale.name])


def repair_path(path) -> list[str]:
    """Repair one file or every .h5 file of a run folder; return the files rewritten."""
    if os.path.isdir(path):
        files = []
        for root, _, names in os.walk(path):
            files += [os.path.join(root, n) for n in sorted(names) if n.endswith(".h5")]
    else:
        files = [path]
    return [f for f in files if repair_file(f)]
