"""HDF5 output: appendable sample files written in single-writer / multiple-reader (SWMR)
mode and flushed after every sample, so a killed run leaves every flushed sample readable.

Every dataset carries `units` and `description` attributes; every file carries the config
hash, the code version and the creation time. The sample axis of each group is an HDF5
dimension scale (and so are fixed axes such as wavenumbers), so netCDF readers (xarray with
the h5netcdf engine) see named dimensions.
"""
from __future__ import annotations

import datetime
import os

import h5py
import numpy as np

from eddybox.solver import __version__
from eddybox.solver.errors import OutputError


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


class SampleFile:
    """An HDF5 file of appendable columns. `create` builds every dataset up front (SWMR forbids
    creating datasets later), then `append` adds one sample to each column and flushes."""

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

    # -- life cycle ------------------------------------------------------------------------
    def create(self, path=None, swmr=True):
        path = path or self.path
        try:
            f = h5py.File(path, "w", libver="latest")
        except OSError as exc:
            raise OutputError(f"{path}: cannot create ({exc})") from None
        for k, v in self.attrs.items():
            f.attrs[k] = v
        for fx in self.fixed:
            d = f.create_dataset(fx.path, data=fx.data)
            d.attrs["units"], d.attrs["description"] = fx.units, fx.description
            if fx.scale:
                d.make_scale(fx.scale)
        for c in self.columns.values():
            chunk = (max(1, min(1024, (1 << 16) // max(1, int(np.prod(c.tail)) * c.dtype.itemsize))),) + c.tail
            d = f.create_dataset(c.path, shape=(0,) + c.tail, maxshape=(None,) + c.tail,
                                 dtype=c.dtype, chunks=chunk)
            d.attrs["units"], d.attrs["description"] = c.units, c.description
            if c.path in self.sample_scales:
                d.make_scale(c.path.rsplit("/", 1)[-1])
        for gpath, attrs in self.group_attrs.items():
            g = f.require_group(gpath)
            for k, v in attrs.items():
                g.attrs[k] = v
        for c in [*self.columns.values(), *self.fixed]:
            if c.dims:
                for axis, scale in enumerate(c.dims):
                    if scale and scale != c.path:
                        f[c.path].dims[axis].attach_scale(f[scale])
        if swmr:
            f.swmr_mode = True
        self.f = f
        self.n = 0
        self.counts = {p: 0 for p in self.columns}
        f.flush()

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
            new = self.f
            for k, v in attrs.items():
                new.attrs[k] = v
            for fx in self.fixed:
                if fx.path in old and old[fx.path].shape == new[fx.path].shape:
                    new[fx.path][...] = old[fx.path][...]
            for p, n in counts.items():
                new[p].resize(n, axis=0)
                for i in range(0, n, 256):
                    new[p][i:min(n, i + 256)] = old[p][i:min(n, i + 256)]
            new.close()
        fsync_path(tmp)
        os.replace(tmp, self.path)
        f = h5py.File(self.path, "r+", libver="latest")
        f.swmr_mode = True
        self.f = f
        self.counts = counts
        self.n = min(counts.values()) if counts else 0
        f.flush()

    def append(self, record: dict):
        """Add one sample to each column named in `record` (others keep their length)."""
        f = self.f
        for p, value in record.items():
            d = f[p]
            i = self.counts[p]
            d.resize(i + 1, axis=0)
            d[i] = value
            self.counts[p] = i + 1
        self.n = min(self.counts.values())
        f.flush()

    def write_fixed(self, path, value):
        """Overwrite a fixed-shape dataset (running averages); allowed in SWMR mode."""
        self.f[path][...] = value

    def close(self):
        if self.f is not None:
            try:
                self.f.flush()
                self.f.close()
            finally:
                self.f = None


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
    with open(xdmf_path, "w") as fh:
        fh.write(text)
