"""Run configuration: schema, defaults, validation and one-line summaries.

A config is read with yaml.safe_load, overridden by `--set KEY=VALUE` pairs (values parsed as
YAML), checked key by key against the schema below, and returned as a `Config` holding plain
nested dicts with every default filled. Every problem raises `ConfigError` with one message
that names the key and what is allowed; the CLI turns it into exit code 2.
"""
from __future__ import annotations

import copy
import difflib
import hashlib
import json
import math
import re
from pathlib import Path

import yaml

from eddybox.forcing import FORCINGS
from eddybox.solver.errors import ConfigError
from eddybox.solver.fluid.initial import INITIAL_PARAMS
from eddybox.solver.fluid.timestepping import SCHEMES


# --- field specifications ---------------------------------------------------------------------
class Spec:
    def __init__(self, default=None, doc="", none_ok=None):
        self.default = default
        self.doc = doc
        self.none_ok = (default is None) if none_ok is None else none_ok

    def check(self, key, value):
        if value is None:
            if self.none_ok:
                return None
            raise ConfigError(f"{key}: a value is required ({self.allowed()})")
        return self._check(key, value)

    def allowed(self) -> str:
        return ""


class Num(Spec):
    def __init__(self, default=None, doc="", lo=None, hi=None, lo_open=False, integer=False,
                 even=False, none_ok=None):
        super().__init__(default, doc, none_ok)
        self.lo, self.hi, self.lo_open, self.integer, self.even = lo, hi, lo_open, integer, even

    def allowed(self):
        kind = "an even integer" if self.even else ("an integer" if self.integer else "a number")
        rng = []
        if self.lo is not None:
            rng.append(f"{'>' if self.lo_open else '>='} {self.lo}")
        if self.hi is not None:
            rng.append(f"<= {self.hi}")
        s = kind + (" " + " and ".join(rng) if rng else "")
        return s + (", or null" if self.none_ok else "")

    def _check(self, key, v):
        if isinstance(v, str):
            # YAML 1.1 reads 1e-6 (no dot) as a string; accept plain numeric strings
            try:
                v = float(v) if not re.fullmatch(r"[+-]?\d+", v.strip()) else int(v)
            except ValueError:
                raise ConfigError(f"{key}: expected {self.allowed()}, got {v!r}") from None
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise ConfigError(f"{key}: expected {self.allowed()}, got {v!r}")
        if self.integer:
            if isinstance(v, float) and not v.is_integer():
                raise ConfigError(f"{key}: expected {self.allowed()}, got {v!r}")
            v = int(v)
        else:
            v = float(v)
            if not math.isfinite(v):
                raise ConfigError(f"{key}: expected a finite number, got {v!r}")
        bad = (self.lo is not None and (v <= self.lo if self.lo_open else v < self.lo)) or \
              (self.hi is not None and v > self.hi) or (self.even and v % 2)
        if bad:
            raise ConfigError(f"{key}: expected {self.allowed()}, got {v!r}")
        return v


class Str(Spec):
    def allowed(self):
        return "a string"

    def _check(self, key, v):
        if not isinstance(v, str) or not v.strip():
            raise ConfigError(f"{key}: expected a non-empty string, got {v!r}")
        return v


class Name(Str):
    """A name usable as a folder or HDF5 group name."""

    def _check(self, key, v):
        v = super()._check(key, v)
        if not re.fullmatch(r"[A-Za-z0-9][A-Za-z0-9_.\-]*", v) or "__" in v:
            raise ConfigError(f"{key}: {v!r} is not allowed; use letters, digits, '.', '-' and "
                              "single '_' (no spaces, slashes or '__')")
        return v


class Bool(Spec):
    def allowed(self):
        return "true or false"

    def _check(self, key, v):
        if not isinstance(v, bool):
            raise ConfigError(f"{key}: expected true or false, got {v!r}")
        return v


class Choice(Spec):
    def __init__(self, default, options, doc="", none_ok=None):
        super().__init__(default, doc, none_ok)
        self.options = tuple(options)

    def allowed(self):
        return "one of " + ", ".join(repr(o) for o in self.options)

    def _check(self, key, v):
        if v not in self.options:
            hint = _suggest(str(v), [str(o) for o in self.options])
            raise ConfigError(f"{key}: {v!r} is not allowed; expected {self.allowed()}{hint}")
        return v


class Vector(Spec):
    def __init__(self, default=None, doc="", length=3, integer=False, lo=None, none_ok=None):
        super().__init__(default, doc, none_ok)
        self.length, self.integer, self.lo = length, integer, lo

    def allowed(self):
        what = "integers" if self.integer else "numbers"
        lo = f" >= {self.lo}" if self.lo is not None else ""
        return f"a list of {self.length} {what}{lo}" + (", or null" if self.none_ok else "")

    def _check(self, key, v):
        if not isinstance(v, (list, tuple)) or len(v) != self.length:
            raise ConfigError(f"{key}: expected {self.allowed()}, got {v!r}")
        item = Num(integer=self.integer, lo=self.lo, none_ok=False)
        return [item.check(f"{key}[{i}]", x) for i, x in enumerate(v)]


class Duration(Spec):
    """Seconds, or HH:MM:SS / MM:SS as a string."""

    def allowed(self):
        return "seconds > 0 or 'HH:MM:SS', or null"

    def _check(self, key, v):
        if isinstance(v, str):
            m = re.fullmatch(r"(?:(\d+):)?(\d+):(\d+(?:\.\d*)?)", v.strip())
            if not m:
                raise ConfigError(f"{key}: expected {self.allowed()}, got {v!r}")
            h, mi, s = m.groups()
            v = int(h or 0) * 3600 + int(mi) * 60 + float(s)
        if isinstance(v, bool) or not isinstance(v, (int, float)) or v <= 0:
            raise ConfigError(f"{key}: expected {self.allowed()}, got {v!r}")
        return float(v)


def _suggest(word, options):
    close = difflib.get_close_matches(word, options, n=1, cutoff=0.5)
    return f" (did you mean '{close[0]}'?)" if close else ""


# --- the schema ---------------------------------------------------------------------------------
def _every(default, doc):
    return {"every": Num(default, doc + "; 0 means every step, null disables", lo=0.0, none_ok=True)}


SET_SCHEMA = {
    "name": Name(None, "unique name of the set", none_ok=False),
    "count": Num(1000, "number of particles", lo=1, integer=True),
    "stokes": Num(None, "Stokes number tau_p / tau_eta (tau_eta measured at release)", lo=0.0),
    "tau_p": Num(None, "particle response time (instead of stokes); 0 means tracers", lo=0.0),
    "radius": Num(None, "particle radius in metres (with density and particles.physical)", lo=0.0,
                  lo_open=True),
    "density": Num(None, "particle material density in kg/m^3", lo=0.0, lo_open=True),
    "interpolation": Choice(None, (2, 4, 6, 8), "points per direction for this set"),
    "gravity": Vector(None, "gravity vector for this set"),
}

PHYSICAL_SCHEMA = {
    "viscosity": Num(1.5e-5, "kinematic viscosity of the gas, m^2/s", lo=0.0, lo_open=True),
    "dissipation": Num(0.01, "dissipation rate of the flow represented, m^2/s^3", lo=0.0, lo_open=True),
    "fluid_density": Num(1.2, "fluid density, kg/m^3", lo=0.0, lo_open=True),
    "gravity": Num(9.81, "gravitational acceleration, m/s^2", lo=0.0),
}

SCHEMA = {
    "name": Name("eddybox-run", "run name"),
    "output": Str(None, "output folder (default runs/<name>)"),
    "seed": Num(2026, "seed of every random draw", lo=0, integer=True),
    "grid": {
        "points": Num(64, "points per direction N", lo=4, integer=True, even=True),
        "length": Num(2 * math.pi, "box side L", lo=0.0, lo_open=True),
    },
    "fluid": {
        "viscosity": Num(0.01, "kinematic viscosity nu", lo=0.0, lo_open=True),
        "initial": "initial",  # dynamic, by kind
        "frozen": Bool(False, "keep the velocity field fixed"),
        "dealias": Choice("two-thirds", ("two-thirds", "phase-shift", "stage-shift"),
                          "dealiasing method"),
    },
    "time": {
        "scheme": Choice("rk4", tuple(SCHEMES), "time scheme"),
        "cfl": Num(0.6, "CFL number dt max(|u|+|v|+|w|)/dx", lo=0.0, lo_open=True),
        "max_dt": Num(None, "upper bound of dt", lo=0.0, lo_open=True),
        "end": Num(10.0, "end time", lo=0.0, lo_open=True),
        "max_steps": Num(None, "stop after this many steps in total", lo=1, integer=True),
        "walltime": Duration(None, "wall-clock budget; checkpoint and exit 75 before it ends"),
    },
    "forcing": "forcing",  # dynamic, by kind
    "particles": {
        "release": Num(0.0, "time at which particles are seeded", lo=0.0),
        "interpolation": Choice(8, (2, 4, 6, 8), "Lagrange points per direction"),
        "gravity": Vector([0.0, 0.0, 0.0], "gravitational acceleration vector", none_ok=False),
        "physical": "physical",  # optional block
        "sets": "sets",
    },
    "stats": {
        "fluid": _every(0.05, "time between fluid series samples"),
        "spectra": _every(0.5, "time between spectra"),
        "pairs": {
            **_every(None, "time between pair-statistics samples"),
            "r_max": Num(10.0, "largest separation", lo=0.0, lo_open=True),
            "bins": Num(40, "separation bins", lo=1, integer=True),
            "spacing": Choice("log", ("log", "linear"), "bin spacing"),
            "r_min": Num(None, "smallest edge for log bins (default r_max/100)", lo=0.0, lo_open=True),
            "units": Choice("eta", ("eta", "box"), "units of r_max and r_min"),
            "wr_bins": Num(101, "bins of the w_r histogram (odd)", lo=3, integer=True),
            "cross": Bool(False, "also pairs across every two sets"),
            "subsample_above": Num(None, "separation above which a particle subsample is used", lo=0.0,
                                   lo_open=True),
            "subsample_count": Num(20000, "particles per set in that subsample", lo=2, integer=True),
        },
        "particles": {
            **_every(None, "time between particle snapshots"),
            "max_count": Num(10000, "particles per set in snapshots", lo=1, integer=True),
            "series_every": Num(None, "time between per-set series (default stats.fluid.every)", lo=0.0),
        },
        "fields": _every(None, "time between velocity-field snapshots"),
    },
    "checkpoint": {
        "every": Num(None, "time between checkpoints; null: only at the end and on signals", lo=0.0,
                     lo_open=True),
        "keep": Num(2, "checkpoints kept", lo=1, integer=True),
    },
    "parallel": {
        "layout": Choice("auto", ("auto", "serial", "slab", "pencil"), "domain decomposition"),
        "grid": Vector(None, "pencil process grid [P1, P2]", length=2, integer=True, lo=1),
    },
}

# keys that may change when a run is restarted (how long it goes and how often it saves)
RESTART_MUTABLE = {"time.end", "time.max_steps", "time.walltime", "checkpoint.every",
                   "checkpoint.keep", "output", "name", "parallel.layout", "parallel.grid"}


def _check_section(prefix, schema, raw):
    if raw is None:
        raw = {}
    if not isinstance(raw, dict):
        raise ConfigError(f"{prefix or 'config'}: expected a mapping of keys, got {raw!r}")
    for k in raw:
        if k not in schema:
            where = f"{prefix}.{k}" if prefix else str(k)
            raise ConfigError(f"{where}: unknown key{_suggest(str(k), list(schema))}; allowed: "
                              + ", ".join(schema))
    out = {}
    for k, spec in schema.items():
        key = f"{prefix}.{k}" if prefix else k
        if isinstance(spec, dict):
            out[k] = _check_section(key, spec, raw.get(k))
        elif isinstance(spec, str):
            out[k] = _DYNAMIC[spec](key, raw.get(k))
        else:
            out[k] = spec.check(key, raw.get(k, copy.deepcopy(spec.default)))
    return out


def _kind_section(key, raw, registry, default_kind, param_specs):
    if raw is None:
        raw = {}
    if not isinstance(raw, dict):
        raise ConfigError(f"{key}: expected a mapping with a 'kind', got {raw!r}")
    kind = raw.get("kind", default_kind)
    if kind not in registry:
        raise ConfigError(f"{key}.kind: {kind!r} is not allowed; expected one of "
                          + ", ".join(repr(k) for k in registry) + _suggest(str(kind), list(registry)))
    schema = {"kind": Choice(kind, tuple(registry))}
    schema.update(param_specs(kind))
    out = _check_section(key, schema, raw)
    out["kind"] = kind
    return out


def _forcing_specs(kind):
    cls = FORCINGS[kind]
    choices = getattr(cls, "choices", {})
    specs = {}
    for name, (default, doc) in cls.params.items():
        if name in choices:
            specs[name] = Choice(default, choices[name], doc)
        else:
            specs[name] = Num(default, doc, lo=0.0, lo_open=True)
    return specs


def _initial_specs(kind):
    specs = {}
    for name, (default, doc) in INITIAL_PARAMS[kind].items():
        if name == "path":
            specs[name] = Str(None, doc, none_ok=False)
        elif name in ("energy", "peak"):
            specs[name] = Num(default, doc, lo=0.0, lo_open=True)
        else:
            specs[name] = Num(default, doc)
    return specs


def _sets(key, raw):
    if raw is None:
        return []
    if not isinstance(raw, list):
        raise ConfigError(f"{key}: expected a list of particle sets, got {raw!r}")
    out = []
    seen = set()
    for i, item in enumerate(raw):
        s = _check_section(f"{key}[{i}]", SET_SCHEMA, item)
        if s["name"] in seen:
            raise ConfigError(f"{key}[{i}].name: duplicate set name {s['name']!r}; names must be unique")
        seen.add(s["name"])
        given = [k for k in ("stokes", "tau_p", "radius") if s[k] is not None]
        if len(given) != 1:
            raise ConfigError(f"{key}[{i}]: give exactly one of stokes, tau_p or radius "
                              f"(got {', '.join(given) or 'none'})")
        if (s["radius"] is None) != (s["density"] is None):
            raise ConfigError(f"{key}[{i}]: radius and density go together")
        out.append(s)
    return out


def _physical(key, raw):
    if raw is None:
        return None
    return _check_section(key, PHYSICAL_SCHEMA, raw)


_DYNAMIC = {
    "forcing": lambda key, raw: _kind_section(key, raw, FORCINGS, "none", _forcing_specs),
    "initial": lambda key, raw: _kind_section(key, raw, INITIAL_PARAMS, "spectrum", _initial_specs),
    "sets": _sets,
    "physical": _physical,
}


# --- cross-field checks -------------------------------------------------------------------------
def _cross_checks(c):
    n = c["grid"]["points"]
    scheme = SCHEMES[c["time"]["scheme"]]
    if c["fluid"]["dealias"] == "stage-shift" and not scheme.stage_shifts:
        able = ", ".join(k for k, v in SCHEMES.items() if v.stage_shifts)
        raise ConfigError(f"fluid.dealias: 'stage-shift' cancels aliasing across the stages of "
                          f"a step, which time.scheme {scheme.name!r} cannot do (no stage shifts "
                          f"make its weights cancel); use time.scheme {able}, or fluid.dealias "
                          "two-thirds or phase-shift")
    if c["time"]["cfl"] > scheme.cfl_limit:
        raise ConfigError(f"time.cfl: {c['time']['cfl']} is above the stability limit "
                          f"{scheme.cfl_limit} of scheme {scheme.name!r}; allowed: 0 < cfl <= "
                          f"{scheme.cfl_limit}")
    f = c["forcing"]
    if "band" in f:
        if f["band"] < 1.0:
            raise ConfigError(f"forcing.band: {f['band']} holds no Fourier mode; the smallest "
                              "nonzero |k| is 1 (in units of 2 pi / L); allowed: 1 <= band < N/3")
        if f["band"] >= n / 3.0:
            raise ConfigError(f"forcing.band: {f['band']} reaches the dealiased modes of a {n}^3 "
                              f"grid; allowed: 1 <= band < {n / 3:.3g}")
    if f["kind"] == "ou" and f.get("variance") is not None and f.get("dissipation") is not None:
        raise ConfigError("forcing: give either forcing.variance or forcing.dissipation, not both")
    if f["kind"] == "reinject" and f["mode"] == "power" and f.get("dissipation") is None:
        raise ConfigError("forcing.dissipation: required with forcing.mode: power")
    if f["kind"] == "linear" and (f.get("coefficient") is None) == (f.get("dissipation") is None):
        raise ConfigError("forcing: kind 'linear' needs exactly one of forcing.coefficient or "
                          "forcing.dissipation")
    p = c["particles"]
    if p["sets"]:
        if p["release"] >= c["time"]["end"]:
            raise ConfigError(f"particles.release: {p['release']} is not before time.end "
                              f"{c['time']['end']}; particles would never move")
        if any(s["radius"] is not None for s in p["sets"]) and p["physical"] is None:
            raise ConfigError("particles.physical: required when a set gives radius and density")
    pr = c["stats"]["pairs"]
    if pr["every"] is not None:
        if not p["sets"]:
            raise ConfigError("stats.pairs.every: pair statistics need particles.sets")
        if pr["units"] == "box" and pr["r_max"] >= 0.5 * c["grid"]["length"]:
            raise ConfigError(f"stats.pairs.r_max: {pr['r_max']} must be below half the box "
                              f"({0.5 * c['grid']['length']:.6g}) with units: box")
        if pr["wr_bins"] % 2 == 0:
            raise ConfigError(f"stats.pairs.wr_bins: expected an odd integer (a bin centred on "
                              f"w_r = 0), got {pr['wr_bins']}")
        if pr["r_min"] is not None and pr["r_min"] >= pr["r_max"]:
            raise ConfigError("stats.pairs.r_min: must be below stats.pairs.r_max")
    if c["parallel"]["grid"] is not None and c["parallel"]["layout"] not in ("pencil", "auto"):
        raise ConfigError("parallel.grid: only used with parallel.layout: pencil")


# --- the Config object --------------------------------------------------------------------------
class Config:
    """A validated configuration: `data` holds nested dicts with every default filled."""

    def __init__(self, data: dict, source: str = "<dict>"):
        self.data = data
        self.source = source

    def __getitem__(self, k):
        return self.data[k]

    def get(self, path, default=None):
        cur = self.data
        for part in path.split("."):
            if not isinstance(cur, dict) or part not in cur:
                return default
            cur = cur[part]
        return cur

    @property
    def output(self) -> Path:
        return Path(self.data["output"] or f"runs/{self.data['name']}")

    def summary(self) -> str:
        d = self.data
        f = d["forcing"]
        fparams = ",".join(f"{k}={v}" for k, v in f.items() if k != "kind" and v is not None)
        sets = d["particles"]["sets"]
        parts = [f"{d['name']}: {d['grid']['points']}^3 box L={d['grid']['length']:.4g}",
                 f"nu={d['fluid']['viscosity']:g}",
                 f"init={d['fluid']['initial']['kind']}" + (" frozen" if d["fluid"]["frozen"] else ""),
                 f"forcing={f['kind']}({fparams})",
                 f"{d['time']['scheme']} cfl={d['time']['cfl']:g} end={d['time']['end']:g}",
                 f"{len(sets)} particle set(s)" if sets else "no particles",
                 f"seed={d['seed']}"]
        return ", ".join(parts)

    def physics(self) -> dict:
        """The config without the keys a restart may change."""
        d = copy.deepcopy(self.data)
        for path in RESTART_MUTABLE:
            parts = path.split(".")
            cur = d
            for p in parts[:-1]:
                cur = cur.get(p, {})
            cur.pop(parts[-1], None)
        return d

    def physics_hash(self) -> str:
        return hashlib.sha256(json.dumps(self.physics(), sort_keys=True).encode()).hexdigest()[:16]

    def hash(self) -> str:
        return hashlib.sha256(json.dumps(self.data, sort_keys=True).encode()).hexdigest()[:16]

    def to_yaml(self, derived: dict | None = None) -> str:
        d = copy.deepcopy(self.data)
        if derived is not None:
            d["derived"] = derived
        return yaml.safe_dump(d, sort_keys=False)


def flat_keys(d: dict, prefix="") -> dict:
    out = {}
    for k, v in d.items():
        key = f"{prefix}.{k}" if prefix else str(k)
        if isinstance(v, dict):
            out.update(flat_keys(v, key))
        else:
            out[key] = v
    return out


def differing_keys(a: dict, b: dict) -> list[str]:
    fa, fb = flat_keys(a), flat_keys(b)
    return sorted(k for k in set(fa) | set(fb) if fa.get(k) != fb.get(k))


def validate(raw, source="<dict>") -> Config:
    if raw is None:
        raw = {}
    if not isinstance(raw, dict):
        raise ConfigError(f"{source}: the top level must be a mapping of keys, got {type(raw).__name__}")
    data = _check_section("", SCHEMA, raw)
    _cross_checks(data)
    return Config(data, source)


def apply_overrides(raw: dict, pairs: list[str]) -> dict:
    """Apply KEY=VALUE pairs (dotted keys, list items by index; values parsed as YAML)."""
    raw = copy.deepcopy(raw) if raw else {}
    for pair in pairs or []:
        if "=" not in pair:
            raise ConfigError(f"--set {pair!r}: expected KEY=VALUE, e.g. --set grid.points=32")
        key, text = pair.split("=", 1)
        key = key.strip()
        if not key:
            raise ConfigError(f"--set {pair!r}: the key is empty")
        try:
            value = yaml.safe_load(text)
        except yaml.YAMLError as exc:
            raise ConfigError(f"--set {key}: the value {text!r} is not valid YAML ({exc.problem})") from None
        parts = key.split(".")
        cur = raw
        for i, part in enumerate(parts[:-1]):
            nxt = parts[i + 1]
            if isinstance(cur, list):
                if not part.isdigit() or int(part) >= len(cur):
                    raise ConfigError(f"--set {key}: {part!r} is not an index of the list "
                                      f"{'.'.join(parts[:i])}")
                cur = cur[int(part)]
                continue
            if not isinstance(cur, dict):
                raise ConfigError(f"--set {key}: {'.'.join(parts[:i])} is not a mapping")
            if part not in cur or cur[part] is None:
                cur[part] = [] if nxt.isdigit() else {}
            cur = cur[part]
        last = parts[-1]
        if isinstance(cur, list):
            if not last.isdigit() or int(last) >= len(cur):
                raise ConfigError(f"--set {key}: {last!r} is not an index of that list")
            cur[int(last)] = value
        elif isinstance(cur, dict):
            cur[last] = value
        else:
            raise ConfigError(f"--set {key}: {'.'.join(parts[:-1])} is not a mapping")
    return raw


def read_yaml(path) -> dict:
    p = Path(path)
    if not p.exists():
        raise ConfigError(f"{path}: no such config file")
    if p.is_dir():
        raise ConfigError(f"{path}: is a folder, expected a YAML config file")
    try:
        text = p.read_text()
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{path}: cannot read ({exc})") from None
    try:
        raw = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        problem = getattr(exc, "problem", None) or str(exc).splitlines()[0]
        raise ConfigError(f"{path}:{where}: YAML syntax error: {problem}") from None
    if raw is not None and not isinstance(raw, dict):
        raise ConfigError(f"{path}: the top level must be a mapping of keys")
    return raw or {}


def load(path, overrides=None) -> Config:
    raw = apply_overrides(read_yaml(path), overrides)
    return validate(raw, str(path))
