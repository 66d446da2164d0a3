"""HDF5 output: appendable sample files written in single-writer / multiple-reader (SWMR)
mode and flushed after every sample, so a killed run leaves every flushed sample readable.

Every dataset carries `units` and `description` attributes; every file carries the config
hash, the code version and the creation time. The sample axis of each group is an HDF5
dimension scale (and so are fixed axes such as wavenumbers), so netCDF readers (xarray with
the h5netcdf engine) see named dimensions.
"""
from __future__ import annotations

import datetime
import json
import os
import re
from pathlib import Path

import h5py
import numpy as np

from eddybox.solver import __version__
from eddybox.solver.errors import DiskWriteError, OutputError


def file_attrs(config_hash: str) -> dict:
    return {"config_hash": config_hash, "code_version": __version__,
            "created": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
            "producer": "eddybox"}


class Column:
    """One appendable dataset: samples along axis 0, then a fixed tail shape."""

    def __init__(self, path, units, description, dtype=np.float64, tail=(), dims=None):
        self.path, self.units, self.description = path, units, description
        self.dtype, self.tail = np.dtype(dtype), tuple(tail)
        #: names of the dimension-scale datasets for each axis (axis 0: the sample scale)
        self.dims = dims


class Fixed:
    """A dataset written once at creation (bin edges, wavenumbers, ...); `scale` makes it a
    dimension scale of that name, `dims` names the scale datasets of its axes."""

    def __init__(self, path, data, units, description, scale=None, dims=None):
        self.path, self.data, self.units, self.description = path, np.asarray(data), units, description
        self.scale = scale
        self.dims = dims


#: h5py objects of files whose writes failed for good. They are never closed: closing an HDF5
#: file that cannot be flushed frees HDF5's state of it, after which h5py touches the freed
#: memory and the process dies with a segmentation fault (h5py issues #914 and #1642). Kept
#: here, they are never released either; the command line then leaves with os._exit, so that
#: nothing tries to close them at exit.
_ABANDONED: list = []


def write_error(path, exc) -> DiskWriteError:
    """DiskWriteError naming `path`, with HDF5's long multi-line report cut to its reason
    ('Unable to synchronously flush file: No space left on device')."""
    text = " ".join(str(getattr(exc, "strerror", None) or exc).split())
    m = re.search(r"error message = '([^']+)'", text)
    if m:
        text = f"{text.split(' (', 1)[0]}: {m.group(1)}"
    return DiskWriteError(f"{path}: {text[:300]}")


def abandon(*objects):
    _ABANDONED.extend(o for o in objects if o is not None)


def abandoned() -> bool:
    """True when some file could not be closed safely (see `_ABANDONED`)."""
    return bool(_ABANDONED)


def release_after_failure(f, *objects):
    """After a failed write to the h5py file `f` (and its dataset `objects`): close it if a
    flush now succeeds (space was freed), else abandon it."""
    if f is None:
        return
    try:
        f.flush()
        f.close()
    except Exception:  # noqa: BLE001 - HDF5 reports a full disk in several ways
        abandon(f, *objects)


def discard_temporary(path):
    """Remove a half-written temporary file; emptied first, so that its blocks are freed even
    while an abandoned HDF5 handle keeps it open."""
    try:
        os.truncate(path, 0)
    except OSError:
        pass
    try:
        os.remove(path)
    except OSError:
        pass


def write_json_atomic(path, data, **dump_options):
    """Write `data` as JSON to `path` through a temporary file in the same folder and a rename,
    so a reader sees the old file or the new one, never a half-written one; the temporary file
    is removed if the write fails."""
    path = Path(path)
    tmp = path.with_name(f"{path.name}.tmp{os.getpid()}")
    try:
        tmp.write_text(json.dumps(data, **dump_options))
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


class SampleFile:
    """An HDF5 file of appendable columns. `create` builds every dataset up front (SWMR forbids
    creating datasets later), then `append` adds one sample to each column and flushes.

    A failed write (disk full: h5py raises OSError or RuntimeError) raises DiskWriteError
    naming the file; the file is then left alone (`close` closes it only if it can be flushed,
    see `release_after_failure`), so no later write meets a half-updated HDF5 state."""

    def __init__(self, path, columns, fixed=(), attrs=None, group_attrs=None, sample_scales=()):
        self.path = str(path)
        self.columns = {c.path: c for c in columns}
        self.fixed = list(fixed)
        self.attrs = attrs or {}
        self.group_attrs = group_attrs or {}
        self.sample_scales = set(sample_scales)
        self.f = None
        self.n = 0
        self.counts = {}
        self.failed = False
        self._touched = []

    def _failure(self, exc, path=None):
        self.failed = True
        return write_error(path or self.path, exc)

    # -- life cycle ------------------------------------------------------------------------
    def create(self, path=None, swmr=True):
        path = path or self.path
        try:
            f = h5py.File(path, "w", libver="latest")
        except (OSError, RuntimeError) as exc:
            raise self._failure(exc, path) from None
        made = []
        try:
            self._build(f, swmr, made)
        except (OSError, RuntimeError) as exc:
            release_after_failure(f, *made)
            raise self._failure(exc, path) from None
        self.f = f
        self.n = 0
        self.counts = {p: 0 for p in self.columns}

    def _build(self, f, swmr, made):
        for k, v in self.attrs.items():
            f.attrs[k] = v
        for fx in self.fixed:
            d = f.create_dataset(fx.path, data=fx.data)
            made.append(d)
            d.attrs["units"], d.attrs["description"] = fx.units, fx.description
            if fx.scale:
                d.make_scale(fx.scale)
        for c in self.columns.values():
            chunk = (max(1, min(1024, (1 << 16) // max(1, int(np.prod(c.tail)) * c.dtype.itemsize))),) + c.tail
            d = f.create_dataset(c.path, shape=(0,) + c.tail, maxshape=(None,) + c.tail,
                                 dtype=c.dtype, chunks=chunk)
            made.append(d)
            d.attrs["units"], d.attrs["description"] = c.units, c.description
            if c.path in self.sample_scales:
                d.make_scale(c.path.rsplit("/", 1)[-1])
        for gpath, attrs in self.group_attrs.items():
            g = f.require_group(gpath)
            made.append(g)
            for k, v in attrs.items():
                g.attrs[k] = v
        for c in [*self.columns.values(), *self.fixed]:
            if c.dims:
                for axis, scale in enumerate(c.dims):
                    if scale and scale != c.path:
                        d, sd = f[c.path], f[scale]
                        made += [d, sd]
                        d.dims[axis].attach_scale(sd)
        if swmr:
            f.swmr_mode = True
        f.flush()

    def verify_existing(self, keep=None):
        """Check, changing nothing, that `reopen(keep)` can continue the existing file: it reads,
        has every column with the expected per-sample shape, and at least the samples the
        checkpoint recorded. OutputError names the file and what is wrong."""
        try:
            f = h5py.File(self.path, "r", swmr=True)
        except (OSError, RuntimeError) as exc:
            raise OutputError(f"{self.path}: cannot read the existing output file ({exc}); "
                              "restore it, or start the run again with --overwrite") from None
        with f:
            for p, c in self.columns.items():
                d = f.get(p)
                if not isinstance(d, h5py.Dataset) or d.shape[1:] != c.tail:
                    raise OutputError(f"{self.path}: dataset {p} is missing or has another "
                                      "shape; not a file of this run")
                want = keep.get(p, 0) if isinstance(keep, dict) else (keep or 0)
                if d.shape[0] < int(want):
                    raise OutputError(f"{self.path}: {p} holds {d.shape[0]} samples but the "
                                      f"checkpoint recorded {int(want)}; not the file this "
                                      "checkpoint belongs to")

    def reopen(self, keep=None):
        """Continue an existing file, first dropping samples beyond `keep` (an int for every
        column, or a dict column path -> samples to keep).

        The file is rebuilt rather than opened for writing: a writer killed in SWMR mode leaves
        the file's consistency flags set, after which HDF5 refuses every open except a SWMR read.
        The kept samples are copied into a fresh file (same layout, the original attributes),
        which atomically replaces the old one."""
        try:
            old = h5py.File(self.path, "r", swmr=True)
        except OSError as exc:
            raise OutputError(f"{self.path}: cannot read the existing output file ({exc})") from None
        tmp = self.path + ".rebuild"
        with old:
            counts = {}
            for p in self.columns:
                if p not in old:
                    raise OutputError(f"{self.path}: dataset {p} is missing; not a file of this run")
                have = old[p].shape[0]
                want = keep.get(p, have) if isinstance(keep, dict) else (have if keep is None else keep)
                counts[p] = min(have, int(want))
            attrs = dict(old.attrs)
            self.create(path=tmp, swmr=False)
            new, self.f = self.f, None
            try:
                for k, v in attrs.items():
                    new.attrs[k] = v
                for fx in self.fixed:
                    if fx.path in old and old[fx.path].shape == new[fx.path].shape:
                        new[fx.path][...] = old[fx.path][...]
                for p, n in counts.items():
                    d = new[p]
                    self._touched.append(d)
                    d.resize(n, axis=0)
                    for i in range(0, n, 256):
                        d[i:min(n, i + 256)] = old[p][i:min(n, i + 256)]
                new.close()
            except BaseException as exc:
                release_after_failure(new, *self._touched)
                discard_temporary(tmp)
                if isinstance(exc, (OSError, RuntimeError)):
                    raise self._failure(exc, tmp) from None
                raise
            self._touched = []
        fsync_path(tmp)
        try:
            os.replace(tmp, self.path)
            f = h5py.File(self.path, "r+", libver="latest")
        except (OSError, RuntimeError) as exc:
            raise self._failure(exc) from None
        try:
            f.swmr_mode = True
            f.flush()
        except (OSError, RuntimeError) as exc:
            release_after_failure(f)
            raise self._failure(exc) from None
        self.f = f
        self.counts = counts
        self.n = min(counts.values()) if counts else 0

    def append(self, record: dict):
        """Add one sample to each column named in `record` (others keep their length)."""
        f = self._open_for_writing()
        try:
            for p, value in record.items():
                d = f[p]
                self._touched.append(d)
                i = self.counts[p]
                d.resize(i + 1, axis=0)
                d[i] = value
                self.counts[p] = i + 1
            self.n = min(self.counts.values())
            f.flush()
        except (OSError, RuntimeError) as exc:
            raise self._failure(exc) from None
        self._touched = []

    def write_fixed(self, path, value):
        """Overwrite a fixed-shape dataset (running averages); allowed in SWMR mode."""
        f = self._open_for_writing()
        try:
            d = f[path]
            self._touched.append(d)
            d[...] = value
        except (OSError, RuntimeError) as exc:
            raise self._failure(exc) from None
        self._touched = []

    def _open_for_writing(self):
        if self.failed:
            raise DiskWriteError(f"{self.path}: an earlier write to this file failed")
        return self.f

    def close(self):
        """Flush and close; after a failed write, close only if the file can be flushed."""
        f, self.f = self.f, None
        if f is None:
            return
        if self.failed:
            release_after_failure(f, *self._touched)
            return
        try:
            f.flush()
            f.close()
        except (OSError, RuntimeError) as exc:
            self.failed = True
            abandon(f, *self._touched)
            raise write_error(self.path, exc) from None


def fsync_path(path):
    try:
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
    except OSError:
        pass


def write_xdmf(h5_name: str, xdmf_path, n: int, length: float, time: float, datasets):
    """XDMF 3 sidecar describing (x, y, z) scalar fields in `h5_name` on a uniform grid."""
    h = length / n
    attrs = "\n".join(
        f'      <Attribute Name="{name}" AttributeType="Scalar" Center="Node">\n'
        f'        <DataItem Dimensions="{n} {n} {n}" NumberType="Float" Precision="8" '
        f'Format="HDF">{h5_name}:{path}</DataItem>\n      </Attribute>'
        for name, path in datasets)
    text = f"""<?xml version="1.0" ?>
<Xdmf Version="3.0">
  <Domain>
    <Grid Name="velocity" GridType="Uniform">
      <Time Value="{time!r}"/>
      <Topology TopologyType="3DCoRectMesh" Dimensions="{n} {n} {n}"/>
      <Geometry GeometryType="ORIGIN_DXDYDZ">
        <DataItem Dimensions="3" NumberType="Float" Precision="8" Format="XML">0 0 0</DataItem>
        <DataItem Dimensions="3" NumberType="Float" Precision="8" Format="XML">{h!r} {h!r} {h!r}</DataItem>
      </Geometry>
{attrs}
    </Grid>
  </Domain>
</Xdmf>
"""
    try:
        with open(xdmf_path, "w") as fh:
            fh.write(text)
    except OSError as exc:
        raise write_error(xdmf_path, exc) from None
