"""The house rules of the import graph (DEVELOPERS.md, "Architecture"), read from the source
with the standard library's `ast`: which package may import which, no circles, one namespace.

Every import counts, also those inside functions (a lazy import is still a dependency)."""
from __future__ import annotations

import ast
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
FOLDERS = {"solver": "eddybox.solver", "forcing": "eddybox.forcing", "particles": "eddybox.particles"}

#: layer of each package, and the layers it may import (besides its own)
BOTTOM = {"errors", "fields"}
LAYERS = {
    "errors": set(),
    "fields": {"errors"},
    "estimators": set(),
    "fluid": BOTTOM,
    "forcing": BOTTOM | {"fluid", "run", "estimators"},
    "particles": BOTTOM | {"fluid", "run", "estimators", "forcing"},
    "run": BOTTOM | {"fluid", "forcing", "particles", "estimators", "version"},
    "study": BOTTOM | {"fluid", "forcing", "particles", "estimators", "run", "version"},
    "cli": BOTTOM | {"fluid", "forcing", "particles", "estimators", "run", "study", "version"},
    "version": set(),
}
#: plain functions on arrays: they import no run machinery (nor anything above it)
KERNELS = {"eddybox.solver.fluid.spectral_ops", "eddybox.particles.interpolation",
           "eddybox.particles.integrator", "eddybox.particles.pairs"}


def module_name(path: Path) -> str:
    rel = path.relative_to(ROOT).with_suffix("")
    parts = list(rel.parts)
    parts[0] = FOLDERS[parts[0]]
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def layer(module: str) -> str:
    parts = module.split(".")
    if parts[1] in ("forcing", "particles"):
        return parts[1]
    if len(parts) == 2:
        return "version"  # eddybox.solver itself: __version__ and the lazy public API
    return parts[2]  # errors, fields, cli or a subpackage


def project_modules() -> dict[str, Path]:
    out = {}
    for folder in FOLDERS:
        for p in (ROOT / folder).rglob("*.py"):
            out[module_name(p)] = p
    return out


def imports_of(path: Path, module: str) -> list[tuple[str, int]]:
    """(imported module, line) for every import statement of the file."""
    tree = ast.parse(path.read_text(), str(path))
    package = module if path.name == "__init__.py" else module.rsplit(".", 1)[0]
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found += [(a.name, node.lineno) for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")
                anchor = anchor[: len(anchor) - node.level + 1]
                base = ".".join(anchor + ([base] if base else []))
            found.append((base, node.lineno))
            # `from eddybox.solver.fluid import fft` imports the module eddybox.solver.fluid.fft
            found += [(f"{base}.{a.name}", node.lineno) for a in node.names]
    return found


def graph():
    mods = project_modules()
    edges = {}
    for name, path in mods.items():
        targets = set()
        for target, line in imports_of(path, name):
            if target in mods and target != name:
                targets.add((target, line))
        edges[name] = targets
    return mods, edges


def test_no_import_of_the_old_top_level_names():
    bad = []
    for name, path in project_modules().items():
        for target, line in imports_of(path, name):
            if target.split(".")[0] in FOLDERS:
                bad.append(f"{path.relative_to(ROOT)}:{line} imports {target}")
    for p in (ROOT / "tests").rglob("*.py"):
        for target, line in imports_of(p, "tests.x"):
            if target.split(".")[0] in FOLDERS:
                bad.append(f"{p.relative_to(ROOT)}:{line} imports {target}")
    assert not bad, "use the eddybox.* namespace:\n" + "\n".join(bad)


def test_packages_import_only_the_layers_below():
    _, edges = graph()
    bad = []
    for src, targets in edges.items():
        for dst, line in targets:
            a, b = layer(src), layer(dst)
            if a != b and b not in LAYERS[a]:
                bad.append(f"{src} ({a}) imports {dst} ({b}) at line {line}")
    assert not bad, "forbidden imports:\n" + "\n".join(sorted(bad))


def test_kernels_import_no_run_machinery():
    _, edges = graph()
    bad = [f"{k} imports {dst} at line {line}" for k in KERNELS for dst, line in edges[k]
           if layer(dst) not in ("errors", "fields", "estimators") and dst not in KERNELS
           and not dst.startswith("eddybox.solver.fluid")]
    assert not bad, "\n".join(bad)


def test_no_import_cycles():
    _, edges = graph()
    adj = {k: sorted({d for d, _ in v if not (k.startswith(d + ".") )}) for k, v in edges.items()}
    # a package's __init__ importing its own submodules is not a cycle of concepts
    state, stack, cycles = {}, [], []

    def visit(node):
        state[node] = 1
        stack.append(node)
        for nxt in adj.get(node, ()):
            if state.get(nxt) == 1:
                cycles.append(stack[stack.index(nxt):] + [nxt])
            elif nxt not in state:
                visit(nxt)
        stack.pop()
        state[node] = 2

    for n in sorted(adj):
        if n not in state:
            visit(n)
    assert not cycles, "import cycles:\n" + "\n".join(" -> ".join(c) for c in cycles)


def test_pyproject_lists_every_package_folder():
    cfg = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    listed = set(cfg["packages"])
    found = {module_name(p) for folder in FOLDERS for p in (ROOT / folder).rglob("__init__.py")}
    assert listed == found, f"pyproject.toml packages differ: missing {found - listed}, extra {listed - found}"
    assert cfg["package-dir"] == {v: k for k, v in FOLDERS.items()}
