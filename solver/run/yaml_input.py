"""Reading YAML safely: config files and `--set KEY=VALUE` values.

The loader is PyYAML's safe loader (plain data only, no object construction), made stricter:

* a key given twice in one mapping is an error (the plain safe loader keeps the last one);
* a file larger than `MAX_BYTES`, or anything but a regular file (a FIFO, /dev/zero), is
  refused before it is read;
* a document whose aliases expand to more than `MAX_NODES` nodes (an "alias bomb") is refused
  before any Python object is built from it.
"""
from __future__ import annotations

import copy
import os
import stat
from pathlib import Path

import yaml

from eddybox.solver.errors import ConfigError

#: a config is a few kilobytes; anything near this is not one
MAX_BYTES = 1 << 20
#: nodes of the document with every alias expanded (a config has a few hundred)
MAX_NODES = 100_000


class _StrictLoader(yaml.SafeLoader):
    """SafeLoader that refuses duplicate keys."""

    def construct_mapping(self, node, deep=False):
        seen = {}
        for key_node, _ in node.value:
            key = self.construct_object(key_node, deep=True)
            try:
                hash(key)
            except TypeError:
                raise yaml.constructor.ConstructorError(
                    None, None, "a mapping key must be a plain value", key_node.start_mark) from None
            if key in seen:
                raise yaml.constructor.ConstructorError(
                    None, None, f"duplicate key {key!r} (first given on line {seen[key] + 1})",
                    key_node.start_mark)
            seen[key] = key_node.start_mark.line
        return super().construct_mapping(node, deep=deep)


def _expanded_size(node, memo) -> int:
    """Number of nodes once every alias is expanded (shared nodes counted each time)."""
    key = id(node)
    if key in memo:
        return memo[key]
    memo[key] = MAX_NODES + 1  # a cycle (recursive alias) counts as too large
    if isinstance(node, yaml.MappingNode):
        size = 1 + sum(_expanded_size(k, memo) + _expanded_size(v, memo) for k, v in node.value)
    elif isinstance(node, yaml.SequenceNode):
        size = 1 + sum(_expanded_size(v, memo) for v in node.value)
    else:
        size = 1
    memo[key] = min(size, 10 * MAX_NODES)
    return memo[key]


def parse_yaml(text: str, where: str):
    """Plain data from YAML text, or ConfigError naming `where` (a file, or `--set KEY`)."""
    loader = _StrictLoader(text)
    try:
        node = loader.get_single_node()
        if node is None:
            return None
        if _expanded_size(node, {}) > MAX_NODES:
            raise ConfigError(f"{where}: the YAML expands to more than {MAX_NODES} values "
                              "(aliases repeated too often); a config is far smaller")
        return loader.construct_document(node)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        at = f" line {mark.line + 1}, column {mark.column + 1}:" if mark else ""
        problem = getattr(exc, "problem", None) or str(exc).splitlines()[0]
        raise ConfigError(f"{where}:{at} not valid YAML: {problem}") from None
    except RecursionError:
        raise ConfigError(f"{where}: the YAML is nested too deeply") from None
    finally:
        loader.dispose()


def read_yaml(path) -> dict:
    """The mapping of a YAML config file (empty file: {})."""
    p = Path(path)
    try:
        st = os.stat(p)
    except FileNotFoundError:
        raise ConfigError(f"{path}: no such config file") from None
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read ({exc.strerror})") from None
    if stat.S_ISDIR(st.st_mode):
        raise ConfigError(f"{path}: is a folder, expected a YAML config file")
    if not stat.S_ISREG(st.st_mode):
        raise ConfigError(f"{path}: not a regular file; expected a YAML config file")
    if st.st_size > MAX_BYTES:
        raise ConfigError(f"{path}: {st.st_size} bytes is too large for a config file "
                          f"(at most {MAX_BYTES})")
    try:
        with open(p, "rb") as fh:
            data = fh.read(MAX_BYTES + 1)
        text = data.decode("utf-8")
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read ({exc.strerror})") from None
    except UnicodeDecodeError:
        raise ConfigError(f"{path}: not a text file (expected UTF-8 YAML)") from None
    if len(data) > MAX_BYTES:
        raise ConfigError(f"{path}: too large for a config file (at most {MAX_BYTES} bytes)")
    raw = parse_yaml(text, str(path))
    if raw is not None and not isinstance(raw, dict):
        raise ConfigError(f"{path}: the top level must be a mapping of keys")
    return raw or {}


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
        if len(text) > MAX_BYTES:
            raise ConfigError(f"--set {key}: the value is too long")
        value = parse_yaml(text, f"--set {key}")
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
