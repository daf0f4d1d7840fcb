"""The layout's rules, checked from the import graph (every import statement, including
the ones inside functions: a lazy import still ties two modules together).

* No import circle between modules, nor between the subpackages of ``routerd``.
* Each subpackage declares what it must not import (``MUST_NOT_IMPORT`` in its
  ``__init__``, repeated in its docstring); a module may declare a stricter list of its own.
* Nothing named ``sim`` is importable as a top-level package from the install.
"""
from __future__ import annotations

import ast
import importlib
import os
import pkgutil

import pytest

import routerd

PACKAGES = ("core", "io", "service", "agent", "sim", "tools")


def _modules() -> dict[str, str]:
    """Every module of the installed package: name -> source file."""
    import routerd.sim  # mapped from the repository's sim/ folder: not under routerd/ here

    out = {}
    for path, prefix in ((routerd.__path__, "routerd."), (routerd.sim.__path__, "routerd.sim.")):
        for info in pkgutil.walk_packages(path, prefix):
            spec = importlib.util.find_spec(info.name)
            assert spec is not None and spec.origin, info.name
            if spec.origin.endswith(".py"):      # compiled extensions import nothing of ours
                out[info.name] = spec.origin
    out["routerd"] = routerd.__file__
    out["routerd.sim"] = routerd.sim.__file__
    return out


MODULES = _modules()


def _imports(name: str, path: str) -> set[str]:
    """Absolute names of everything a module imports (relative imports resolved)."""
    with open(path, encoding="utf-8") as fh:
        tree = ast.parse(fh.read(), path)
    pkg = name if path.endswith("__init__.py") else name.rsplit(".", 1)[0]
    found: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = pkg.split(".")
                base = base[:len(base) - (node.level - 1)]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            found.add(mod)
            # `from routerd.io import wire` imports the module routerd.io.wire
            for a in node.names:
                if f"{mod}.{a.name}" in MODULES:
                    found.add(f"{mod}.{a.name}")
    return found


GRAPH = {name: {m for m in _imports(name, path) if m in MODULES and m != name}
         for name, path in MODULES.items()}
ALL_IMPORTS = {name: _imports(name, path) for name, path in MODULES.items()}


def _package(mod: str) -> str | None:
    parts = mod.split(".")
    return parts[1] if len(parts) > 1 and parts[1] in PACKAGES else None


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one member (Tarjan's algorithm)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on: set[str] = set()
    out: list[list[str]] = []
    counter = [0]

    def visit(v: str) -> None:
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in graph.get(v, ()):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                out.append(sorted(comp))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return out


def _without_inits(graph: dict[str, set[str]]) -> dict[str, set[str]]:
    # a package's __init__ importing its own submodules is not a circle between modules
    return {m: {t for t in ts if not (m.startswith(t + "."))} for m, ts in graph.items()}


def test_no_import_circle_between_modules() -> None:
    assert _cycles(_without_inits(GRAPH)) == []


def test_no_import_circle_between_subpackages() -> None:
    pg: dict[str, set[str]] = {}
    for m, targets in GRAPH.items():
        p = _package(m)
        if p is None:
            continue
        for t in targets:
            q = _package(t)
            if q is not None and q != p:
                pg.setdefault(p, set()).add(q)
    assert _cycles(pg) == [], pg


def test_the_top_level_package_imports_no_subpackage() -> None:
    # `import routerd` (and so `routerd --version`) loads nothing else
    assert GRAPH["routerd"] == set()


def _rules(mod: str) -> tuple[str, ...]:
    """The MUST_NOT_IMPORT lists that apply to a module: its package's and its own."""
    rules: list[str] = []
    p = _package(mod)
    if p is not None:
        rules += importlib.import_module(f"routerd.{p}").MUST_NOT_IMPORT
    own = _own_rules(mod)
    return tuple(rules) + own


def _own_rules(mod: str) -> tuple[str, ...]:
    with open(MODULES[mod], encoding="utf-8") as fh:
        tree = ast.parse(fh.read())
    for node in tree.body:
        if isinstance(node, ast.Assign) and any(
                isinstance(t, ast.Name) and t.id == "MUST_NOT_IMPORT" for t in node.targets):
            return tuple(ast.literal_eval(node.value))
    return ()


@pytest.mark.parametrize("package", [p for p in PACKAGES])
def test_each_subpackage_declares_its_rule_in_code_and_docstring(package: str) -> None:
    m = importlib.import_module(f"routerd.{package}")
    assert isinstance(m.MUST_NOT_IMPORT, tuple)
    assert "Must not import" in (m.__doc__ or "")
    for forbidden in m.MUST_NOT_IMPORT:
        assert f"``{forbidden}``" in (m.__doc__ or ""), (package, forbidden)


@pytest.mark.parametrize("mod", sorted(MODULES))
def test_module_keeps_its_declared_rule(mod: str) -> None:
    bad = sorted(i for i in ALL_IMPORTS[mod] for r in _rules(mod)
                 if i == r or i.startswith(r + "."))
    assert bad == [], f"{mod} imports {bad}, which its rule forbids"


def test_nothing_named_sim_is_installed_at_the_top_level() -> None:
    # the simulator's sources sit in the repository's sim/ folder and install as routerd.sim
    site = os.path.dirname(os.path.dirname(routerd.__file__))
    assert "routerd.sim" in MODULES
    assert not os.path.isfile(os.path.join(site, "sim", "__init__.py")) \
        or os.path.samefile(os.path.join(site, "sim"),
                            os.path.dirname(MODULES["routerd.sim"]))


def test_no_undefined_unused_or_redefined_names() -> None:
    """ruff's pyflakes rules over every Python folder: an undefined name (F821) fails only
    when its line runs, and a benchmark's `main` is not run by the tests (a stale name once
    stopped bench/compare_variants.py before its first simulation).  ruff is a test
    dependency: a maintained linter beats a hand-written name resolver."""
    import shutil
    import subprocess
    import sys

    ruff = shutil.which("ruff") or os.path.join(os.path.dirname(sys.executable), "ruff")
    if not os.path.exists(ruff):
        pytest.skip("ruff is not installed (it comes with the package's test extra)")
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    r = subprocess.run([ruff, "check", "--no-cache", "--select", "F821,F811,F401,F841",
                        "--output-format", "concise", "routerd", "sim", "bench", "tests"],
                       cwd=root, capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stdout + r.stderr
