"""Typed, documented config values: each field knows its default, type, range, units and
description, checks a raw YAML value (one message naming the key and what is allowed), and
describes itself as JSON Schema and as a row of the README's config reference.

Fields are declared where the concept lives: the config sections in `eddybox.solver.run.config`,
the parameters of each forcing scheme in its class, those of each initial field in its
registration. This module sits at the bottom of the import graph beside `errors`.
"""
from __future__ import annotations

import difflib
import math
import re

from eddybox.solver.errors import ConfigError

#: the largest integer any count, step or seed may take (exact in a float64 and an int64)
MAX_INT = 2**53


def suggest(word, options) -> str:
    """' (did you mean 'x'?)' for the closest option, or ''."""
    close = difflib.get_close_matches(str(word), [str(o) for o in options], n=1, cutoff=0.5)
    return f" (did you mean '{close[0]}'?)" if close else ""


def _show(v) -> str:
    return repr(v) if not isinstance(v, float) else f"{v!r}"


class Field:
    """One config value. `none_ok`: null is allowed (default: when the default is null).
    `restart`: the key may change when a run is restarted (how long it runs, how often it
    saves, where it writes); every other key is part of the run's physics."""

    def __init__(self, default=None, doc="", units="", none_ok=None, restart=False):
        self.default = default
        self.doc = doc
        self.units = units
        self.none_ok = (default is None) if none_ok is None else none_ok
        self.restart = restart

    def check(self, key, value):
        if value is None:
            if self.none_ok:
                return None
            raise ConfigError(f"{key}: a value is required ({self.allowed()})")
        return self._check(key, value)

    def _check(self, key, value):
        return value

    def allowed(self) -> str:
        return ""

    # --- self-description -----------------------------------------------------------------
    def schema(self) -> dict:
        """JSON Schema (draft 2020-12) of the value."""
        s = self._schema()
        if self.none_ok:
            s = {"anyOf": [s, {"type": "null"}]}
        s["description"] = self.describe()
        if self.default is not None:
            s["default"] = self.default
        return s

    def _schema(self) -> dict:
        return {}

    def describe(self) -> str:
        units = f" [{self.units}]" if self.units and self.units != "1" else ""
        return f"{self.doc}{units}; {self.allowed()}"

    def default_text(self) -> str:
        d = self.default
        if d is None:
            return "null"
        if isinstance(d, float) and d == 2 * math.pi:
            return "2π"
        if isinstance(d, bool):
            return "true" if d else "false"
        if isinstance(d, float):
            return f"{d:.6g}"
        if isinstance(d, (list, tuple)):
            return "[" + ", ".join(f"{x:g}" if isinstance(x, float) else str(x) for x in d) + "]"
        return str(d)


class Num(Field):
    """A finite number in [lo, hi] (lo excluded with lo_open); `integer`, `even` refine it."""

    def __init__(self, default=None, doc="", units="", lo=None, hi=None, lo_open=False,
                 integer=False, even=False, none_ok=None, restart=False):
        super().__init__(default, doc, units, none_ok, restart)
        #: an explicit upper bound is part of the documented range; the implicit one only
        #: keeps values finite and representable, and shows in messages when it is hit
        self.hi_given = hi is not None
        if hi is None:
            hi = MAX_INT if integer else 1e12
        self.lo, self.hi, self.lo_open, self.integer, self.even = lo, hi, lo_open, integer, even

    def allowed(self, full=False):
        kind = "an even integer" if self.even else ("an integer" if self.integer else "a number")
        rng = []
        if self.lo is not None:
            rng.append(f"{'>' if self.lo_open else '>='} {self.lo:g}")
        if full or self.hi_given:
            hi = self.hi
            rng.append(f"<= {hi}" if self.integer and hi < 1e7 else f"<= {hi:.4g}")
        s = kind + (" " + " and ".join(rng) if rng else "")
        return s + (", or null" if self.none_ok else "")

    def _check(self, key, v):
        if isinstance(v, str):
            # YAML 1.1 reads 1e-6 (no dot) as a string; accept plain numeric strings
            try:
                v = int(v) if re.fullmatch(r"\s*[+-]?\d+\s*", v) else float(v)
            except ValueError:
                raise ConfigError(f"{key}: expected {self.allowed()}, got {v!r}") from None
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise ConfigError(f"{key}: expected {self.allowed()}, got {v!r}")
        if isinstance(v, float) and not math.isfinite(v):
            raise ConfigError(f"{key}: expected a finite number ({self.allowed(True)}), got {v!r}")
        if self.integer:
            if isinstance(v, float) and not v.is_integer():
                raise ConfigError(f"{key}: expected {self.allowed()}, got {v!r}")
            v = int(v)
        else:
            v = float(v)
        bad = (self.lo is not None and (v <= self.lo if self.lo_open else v < self.lo)) or \
              v > self.hi or (self.even and v % 2)
        if bad:
            raise ConfigError(f"{key}: expected {self.allowed(v > self.hi)}, got {_show(v)}")
        return v

    def _schema(self):
        s = {"type": "integer" if self.integer else "number", "maximum": self.hi}
        if self.lo is not None:
            s["exclusiveMinimum" if self.lo_open else "minimum"] = self.lo
        if self.even:
            s["multipleOf"] = 2
        return s


class NumOrWord(Num):
    """A number as `Num`, or one of a few words (`auto`)."""

    def __init__(self, default=None, doc="", units="", words=("auto",), **kw):
        super().__init__(default, doc, units, **kw)
        self.words = tuple(words)

    def allowed(self, full=False):
        base = super().allowed(full).replace(", or null", "")
        return (f"{base}, or " + " or ".join(repr(w) for w in self.words)
                + (", or null" if self.none_ok else ""))

    def _check(self, key, v):
        if isinstance(v, str) and v.strip() in self.words:
            return v.strip()
        if isinstance(v, str) and not re.fullmatch(r"\s*[+-]?[\d.]+([eE][+-]?\d+)?\s*", v):
            raise ConfigError(f"{key}: expected {self.allowed()}, got {v!r}"
                              f"{suggest(v, self.words)}")
        return super()._check(key, v)

    def _schema(self):
        return {"anyOf": [super()._schema(), {"enum": list(self.words)}]}


class Text(Field):
    def allowed(self):
        return "a non-empty string" + (", or null" if self.none_ok else "")

    def _check(self, key, v):
        if not isinstance(v, str) or not v.strip():
            raise ConfigError(f"{key}: expected a non-empty string, got {v!r}")
        if "\x00" in v:
            raise ConfigError(f"{key}: the string holds a NUL character")
        return v

    def _schema(self):
        return {"type": "string", "minLength": 1}


class Name(Text):
    """A name usable as a folder or HDF5 group name."""

    PATTERN = r"[A-Za-z0-9][A-Za-z0-9_.\-]*"

    def allowed(self):
        return "letters, digits, '.', '-' and single '_', at most 100 characters"

    def _check(self, key, v):
        v = super()._check(key, v)
        if not re.fullmatch(self.PATTERN, v) or "__" in v or len(v) > 100:
            raise ConfigError(f"{key}: {v!r} is not allowed; use letters, digits, '.', '-' and "
                              "single '_' (no spaces, slashes or '__'), at most 100 characters")
        return v

    def _schema(self):
        return {"type": "string", "pattern": f"^(?!.*__){self.PATTERN}$", "maxLength": 100}


class Flag(Field):
    def allowed(self):
        return "true or false"

    def _check(self, key, v):
        if not isinstance(v, bool):
            raise ConfigError(f"{key}: expected true or false, got {v!r}")
        return v

    def _schema(self):
        return {"type": "boolean"}


class Choice(Field):
    def __init__(self, default, options, doc="", units="", none_ok=None, restart=False):
        super().__init__(default, doc, units, none_ok, restart)
        self.options = tuple(options)

    def allowed(self):
        return "one of " + ", ".join(repr(o) for o in self.options)

    def _check(self, key, v):
        if isinstance(v, bool) or v not in self.options:
            raise ConfigError(f"{key}: {v!r} is not allowed; expected {self.allowed()}"
                              f"{suggest(v, self.options)}")
        return v

    def _schema(self):
        return {"enum": list(self.options)}


class Vector(Field):
    """A list of `length` numbers (each a `Num` with the given bounds)."""

    def __init__(self, default=None, doc="", units="", length=3, integer=False, lo=None, hi=None,
                 none_ok=None, restart=False):
        super().__init__(default, doc, units, none_ok, restart)
        self.length = length
        self.item = Num(integer=integer, lo=lo, hi=hi if hi is not None else (None if integer else 1e12),
                        none_ok=False)
        if hi is None and not integer:
            self.item.lo = -1e12 if lo is None else lo

    def allowed(self):
        what = "integers" if self.item.integer else "numbers"
        lo = self.item.lo
        rng = f" in [{lo:g}, {self.item.hi:g}]" if lo is not None else ""
        return f"a list of {self.length} {what}{rng}" + (", or null" if self.none_ok else "")

    def _check(self, key, v):
        if not isinstance(v, (list, tuple)) or len(v) != self.length:
            raise ConfigError(f"{key}: expected {self.allowed()}, got {v!r}")
        return [self.item.check(f"{key}[{i}]", x) for i, x in enumerate(v)]

    def _schema(self):
        item = self.item._schema()
        return {"type": "array", "items": item, "minItems": self.length, "maxItems": self.length}


class Duration(Field):
    """Seconds, or HH:MM:SS / MM:SS as a string."""

    MAX = 1e9

    def allowed(self):
        return "seconds > 0 or 'HH:MM:SS'" + (", or null" if self.none_ok else "")

    def _check(self, key, v):
        if isinstance(v, str):
            m = re.fullmatch(r"(?:(\d+):)?(\d+):(\d+(?:\.\d*)?)", v.strip())
            if not m:
                raise ConfigError(f"{key}: expected {self.allowed()}, got {v!r}")
            h, mi, s = m.groups()
            v = int(h or 0) * 3600 + int(mi) * 60 + float(s)
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) \
                or not 0 < v <= self.MAX:
            raise ConfigError(f"{key}: expected {self.allowed()} (at most {self.MAX:g} s), got {v!r}")
        return float(v)

    def _schema(self):
        return {"anyOf": [{"type": "number", "exclusiveMinimum": 0, "maximum": self.MAX},
                          {"type": "string", "pattern": r"^(\d+:)?\d+:\d+(\.\d*)?$"}]}


# --- sections: typed groups of fields -----------------------------------------------------------
class Section:
    """A config section: a small immutable value whose fields are declared as class attributes
    (`Field`s, nested `Section` classes, or `ListOf` / `Optional` / `KindOf` entries).

        class GridConfig(Section):
            points = Num(64, "points per direction N", lo=4, integer=True, even=True)

        GridConfig.parse({"points": 32}, "grid").points  -> 32

    `parse` refuses unknown keys (naming the closest valid one), fills defaults and checks every
    value; `check()` (override) adds rules across the section's own fields."""

    def __init__(self, key: str = "", **values):
        object.__setattr__(self, "_key", key)
        for name, v in values.items():
            object.__setattr__(self, name, v)

    def __setattr__(self, name, value):
        raise AttributeError(f"{self._key or 'config'} is read-only; build a new config instead")

    # --- declaration -----------------------------------------------------------------------
    @classmethod
    def section_fields(cls) -> dict:
        out = {}
        for klass in reversed(cls.__mro__):
            for name, v in vars(klass).items():
                if name.startswith("_"):
                    continue
                if isinstance(v, (Field, Entry)) or (isinstance(v, type) and issubclass(v, Section)):
                    out[name] = v
        return out

    # --- parsing ---------------------------------------------------------------------------
    @classmethod
    def parse(cls, raw, key: str = ""):
        if raw is None:
            raw = {}
        if not isinstance(raw, dict):
            raise ConfigError(f"{key or 'config'}: expected a mapping of keys, got {raw!r}")
        fields = cls.section_fields()
        for k in raw:
            if k not in fields:
                where = f"{key}.{k}" if key else str(k)
                raise ConfigError(f"{where}: unknown key{suggest(k, fields)}; allowed: "
                                  + ", ".join(fields))
        values = {}
        for name, spec in fields.items():
            sub = f"{key}.{name}" if key else name
            values[name] = parse_entry(spec, raw.get(name, _MISSING), sub)
        obj = cls(key, **values)
        obj.check()
        return obj

    def check(self) -> None:
        """Rules across this section's fields (raise ConfigError naming the key)."""

    # --- use -------------------------------------------------------------------------------
    @property
    def key(self) -> str:
        return self._key

    def to_dict(self) -> dict:
        out = {}
        for name in self.section_fields():
            out[name] = _plain(getattr(self, name))
        return out

    def summary(self) -> str:
        """One line for logs: the values that are set."""
        parts = []
        for name in self.section_fields():
            v = getattr(self, name)
            if v is None or isinstance(v, (Section, tuple)):
                continue
            parts.append(f"{name}={_short(v)}")
        return ", ".join(parts)

    def __repr__(self):
        return f"{type(self).__name__}({self.summary()})"

    def __eq__(self, other):
        return type(self) is type(other) and self.to_dict() == other.to_dict()

    def __hash__(self):
        return hash(repr(self.to_dict()))


class _Missing:
    pass


_MISSING = _Missing()


class Entry:
    """A structured config entry that is not a plain value (a list, an optional or a
    kind-selected section)."""

    doc = ""
    restart = False

    def parse(self, raw, key):
        raise NotImplementedError


class ListOf(Entry):
    """A list of sections of one class (e.g. particle sets); `unique` names a field whose
    values must differ between the items."""

    def __init__(self, section, doc="", unique=None):
        self.section, self.doc, self.unique = section, doc, unique
        self.default = []

    def parse(self, raw, key):
        if raw is None or raw is _MISSING:
            return ()
        if not isinstance(raw, list):
            raise ConfigError(f"{key}: expected a list, got {raw!r}")
        items = tuple(self.section.parse(item, f"{key}[{i}]") for i, item in enumerate(raw))
        if self.unique:
            seen = set()
            for i, item in enumerate(items):
                v = getattr(item, self.unique)
                if v in seen:
                    raise ConfigError(f"{key}[{i}].{self.unique}: duplicate {self.unique} {v!r}; "
                                      f"each must be unique")
                seen.add(v)
        return items


class Optional(Entry):
    """A section that may be left out (null)."""

    def __init__(self, section, doc=""):
        self.section, self.doc = section, doc
        self.default = None

    def parse(self, raw, key):
        if raw is None or raw is _MISSING:
            return None
        return self.section.parse(raw, key)


class KindOf(Entry):
    """A section whose fields depend on its `kind`, looked up in a registry: `params(kind)`
    returns {name: Field} of that kind (a forcing scheme, an initial field)."""

    def __init__(self, name, registry, params, default_kind, doc="", base=None):
        self.name, self.registry, self.params = name, registry, params
        self.default_kind, self.doc = default_kind, doc
        self.base = base or Section
        self._classes = {}
        self.default = {"kind": default_kind}

    def kinds(self):
        return list(self.registry())

    def section_class(self, kind):
        if kind not in self._classes:
            attrs = {"kind": Choice(kind, self.kinds(), f"kind of {self.name}")}
            attrs.update(self.params(kind))
            self._classes[kind] = type(f"{self.base.__name__}[{kind}]", (self.base,), attrs)
        return self._classes[kind]

    def parse(self, raw, key):
        if raw is None or raw is _MISSING:
            raw = {}
        if not isinstance(raw, dict):
            raise ConfigError(f"{key}: expected a mapping with a 'kind', got {raw!r}")
        kind = raw.get("kind", self.default_kind)
        kinds = self.kinds()
        if isinstance(kind, bool) or kind not in kinds:
            raise ConfigError(f"{key}.kind: {kind!r} is not allowed; expected one of "
                              + ", ".join(repr(k) for k in kinds) + suggest(kind, kinds))
        return self.section_class(kind).parse(raw, key)


def parse_entry(spec, raw, key):
    if isinstance(spec, Field):
        value = spec.default if raw is _MISSING else raw
        if isinstance(value, list):
            value = list(value)
        return spec.check(key, value)
    if isinstance(spec, Entry):
        return spec.parse(raw, key)
    return spec.parse(None if raw is _MISSING else raw, key)  # a nested Section class


def _plain(v):
    if isinstance(v, Section):
        return v.to_dict()
    if isinstance(v, tuple):
        return [_plain(x) for x in v]
    if isinstance(v, list):
        return list(v)
    return v


def _short(v) -> str:
    if isinstance(v, float):
        return f"{v:g}"
    if isinstance(v, list):
        return "[" + ",".join(_short(x) for x in v) + "]"
    return str(v)


#: a time given in large-eddy turnover times: "0.5 T_E"
_EDDY_TIMES = re.compile(r"\s*([0-9]*\.?[0-9]+(?:[eE][+-]?[0-9]+)?)\s*T_E\s*")


class TimeSpan(Num):
    """A duration: a number (in the run's time unit T) or a string 'x T_E', x large-eddy
    turnover times T_E = L/u' (resolved before the run: from the scales predicted from the
    config, or in a sweep from a reference run; see `eddybox.solver.run.scales`)."""

    def allowed(self, full=False):
        return super().allowed(full).replace(", or null", "") + " (time units) or 'x T_E'" + (
            ", or null" if self.none_ok else "")

    def _check(self, key, v):
        if isinstance(v, str):
            m = _EDDY_TIMES.fullmatch(v)
            if m:
                x = float(m.group(1))
                if not (math.isfinite(x) and 0.0 < x <= 1e6):
                    raise ConfigError(f"{key}: expected x T_E with 0 < x <= 1e6, got {v!r}")
                return f"{x:g} T_E"
        return super()._check(key, v)

    def _schema(self):
        return {"anyOf": [super()._schema(),
                          {"type": "string", "pattern": r"^\s*[0-9]*\.?[0-9]+([eE][+-]?[0-9]+)?\s*T_E\s*$"}]}


def eddy_times(value) -> float | None:
    """x for a TimeSpan value 'x T_E', None for an absolute time (or None)."""
    if isinstance(value, str):
        m = _EDDY_TIMES.fullmatch(value)
        if m:
            return float(m.group(1))
    return None
