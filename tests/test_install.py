"""What a user installs: a wheel built from the tree, installed (not editable) into a fresh
virtual environment, run from a directory outside the source tree.

An editable install puts the source tree on the path and imports its own hook modules at
start-up, which hid a missing ``import importlib.util`` from every other test.  Here the
package is built the way ``deploy/Containerfile`` builds it (the same files copied, then
``pip``), installed from the wheel with its dependencies from the package index (pip's
cache makes it quick after the first time), and every command of ``routerd.tools.cli.COMMANDS``
is started from the installed entry point, so a new command is covered without editing
this file.  Slow: a venv and a dependency install, 20-60 s here (pip cache warm; most
of it is installing numpy and pyzmq).

The quick test at the end finds the same kind of mistake without installing anything: a
submodule used as an attribute (``importlib.util.find_spec``) after a bare import of its
package, where a fresh interpreter without any start-up hooks does not provide it.
"""
from __future__ import annotations

import ast
import importlib.util
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import sysconfig
import tempfile
import time
import zipfile
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import pytest

from routerd.tools import cli

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
CONTAINERFILE = os.path.join(ROOT, "deploy", "Containerfile")
PIP_TIMEOUT_S = 540.0
RUN_TIMEOUT_S = 120.0



@dataclass(frozen=True)
class Installed:
    venv: str       # the fresh virtual environment
    work: str       # an empty working directory outside the source tree
    wheel: str      # the wheel that was installed
    env: dict[str, str]

    def exe(self, name: str) -> str:
        return os.path.join(self.venv, "bin", name)

    def run(self, *cmd: str, timeout: float = RUN_TIMEOUT_S) -> subprocess.CompletedProcess[str]:
        return subprocess.run(list(cmd), cwd=self.work, env=self.env, capture_output=True,
                              text=True, timeout=timeout, check=False)


def _build_context() -> list[str]:
    """The paths deploy/Containerfile copies into its build stage (COPY without --from)."""
    with open(CONTAINERFILE, encoding="utf-8") as fh:
        lines = [ln.split() for ln in fh if ln.startswith("COPY ") and "--from" not in ln]
    return [src for words in lines for src in words[1:-1]]


def _clean_env(venv: str | None) -> dict[str, str]:
    """The environment with nothing that could put the source tree or another venv on the path."""
    env = {k: v for k, v in os.environ.items()
           if k not in ("PYTHONPATH", "PYTHONHOME", "PYTHONSTARTUP", "VIRTUAL_ENV",
                        "PYTHONSAFEPATH", "PYTHONUSERBASE")}
    if venv is not None:
        env["PATH"] = os.path.join(venv, "bin") + os.pathsep + env.get("PATH", "")
    env["PYTHONNOUSERSITE"] = "1"
    return env


def _check(r: subprocess.CompletedProcess[str], what: str) -> None:
    assert r.returncode == 0, (f"{what}: exit {r.returncode}\n--- stdout\n{r.stdout[-4000:]}"
                               f"\n--- stderr\n{r.stderr[-4000:]}")


def _build_wheel(base: Any, extra_env: dict[str, str] | None = None
                 ) -> tuple[str, subprocess.CompletedProcess[str]]:
    """A wheel built from the files deploy/Containerfile copies, as a clean clone has them
    (no compiled kernels or generated C left by an editable install here)."""
    src = base / "src"
    src.mkdir()
    for rel in _build_context():
        a = os.path.join(ROOT, rel)
        if os.path.isdir(a):
            shutil.copytree(a, src / rel, ignore=shutil.ignore_patterns(
                "__pycache__", "*.pyc", "*.egg-info", "*.so", "_kernels.c", "_kernels.html",
                "_hops.c", "_hops.html", "_fsync.c", "_fsync.html"))
        else:
            shutil.copy2(a, src / rel)
    dist = base / "dist"
    env = {**_clean_env(None), **(extra_env or {})}
    r = subprocess.run([sys.executable, "-m", "pip", "wheel", "-v", "--no-deps", "-w", str(dist),
                        str(src)], cwd=str(base), env=env, capture_output=True, text=True,
                       timeout=PIP_TIMEOUT_S, check=False)
    _check(r, "pip wheel")
    wheels = sorted(dist.glob("routerd-*.whl"))
    assert len(wheels) == 1, os.listdir(dist)
    return str(wheels[0]), r


def _fresh_venv(base: Any, wheel: str) -> str:
    venv = str(base / "venv")
    env = _clean_env(None)
    # a truly fresh environment: no system site-packages, nothing of the test's own venv
    r = subprocess.run([sys.executable, "-m", "venv", venv], cwd=str(base), env=env,
                       capture_output=True, text=True, timeout=PIP_TIMEOUT_S, check=False)
    _check(r, "python -m venv")
    r = subprocess.run([os.path.join(venv, "bin", "python"), "-m", "pip", "install", wheel],
                       cwd=str(base), env=_clean_env(venv), capture_output=True, text=True,
                       timeout=PIP_TIMEOUT_S, check=False)
    _check(r, "pip install WHEEL")
    return venv


@pytest.fixture(scope="module")
def installed(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Installed]:
    base = tmp_path_factory.mktemp("install")
    t0 = time.perf_counter()
    wheel, _ = _build_wheel(base)
    t_wheel = time.perf_counter() - t0
    venv = _fresh_venv(base, wheel)
    work = base / "elsewhere"
    work.mkdir()
    print(f"test_install: wheel built in {t_wheel:.1f} s, venv + install "
          f"{time.perf_counter() - t0 - t_wheel:.1f} s")
    yield Installed(venv, str(work), wheel, _clean_env(venv))


_STATUS = ("import json; from routerd.core import kernels; print(json.dumps(kernels.status())); "
           "print(kernels.__file__)")


_HOPS_STATUS = "import json; from routerd.sim import core; print(json.dumps(core.hops_status()))"


@pytest.mark.slow
def test_compiled_kernels_are_built_and_active(installed: Installed) -> None:
    """With a C compiler (this machine has one), the wheel carries routerd.core._kernels, is
    tagged for this platform, and the installed package runs on the compiled path."""
    if shutil.which(sysconfig.get_config_var("CC").split()[0] or "cc") is None:
        pytest.skip("no C compiler here: the wheel is built without the kernels")
    names = zipfile.ZipFile(installed.wheel).namelist()
    assert [n for n in names if re.fullmatch(r"routerd/core/_kernels\..*\.so", n)], names
    # the simulator's loop: its source is in sim/, installed as routerd.sim
    assert [n for n in names if re.fullmatch(r"routerd/sim/_hops\..*\.so", n)], names
    # the journal writer thread's loop
    assert [n for n in names if re.fullmatch(r"routerd/io/_fsync\..*\.so", n)], names
    assert not installed.wheel.endswith("-none-any.whl"), installed.wheel
    r = installed.run(installed.exe("python"), "-c", _STATUS)
    _check(r, "kernels.status()")
    status = json.loads(r.stdout.splitlines()[0])
    assert status["path"] == "compiled", status
    r2 = installed.run(installed.exe("python"), "-c", _HOPS_STATUS)
    _check(r2, "hops_status()")
    assert json.loads(r2.stdout)["path"] == "compiled", r2.stdout
    assert os.path.realpath(r.stdout.splitlines()[1]).startswith(
        os.path.realpath(installed.venv) + os.sep)


@pytest.mark.slow
def test_without_a_compiler_the_install_runs_on_the_reference_path(
        tmp_path_factory: pytest.TempPathFactory) -> None:
    """CC=/bin/false: the optional build fails with a warning, the install goes on, and
    the package runs on the numpy reference path and says so (banner line, status)."""
    base = tmp_path_factory.mktemp("nocc")
    wheel, built = _build_wheel(base, {"CC": "/bin/false", "LDSHARED": "/bin/false"})
    said = built.stdout + built.stderr
    assert "the compiled kernels (routerd.core._kernels) could not be built" in said
    assert "the compiled kernels (routerd.sim._hops) could not be built" in said
    assert not [n for n in zipfile.ZipFile(wheel).namelist() if n.endswith(".so")]
    venv = _fresh_venv(base, wheel)
    work = base / "elsewhere"
    work.mkdir()
    inst = Installed(venv, str(work), wheel, _clean_env(venv))
    r = inst.run(inst.exe("python"), "-c", _STATUS)
    _check(r, "kernels.status()")
    status = json.loads(r.stdout.splitlines()[0])
    assert status["path"] == "reference" and "without a working C compiler" in status["reason"]
    r = inst.run(inst.exe("python"), "-c", _HOPS_STATUS)
    _check(r, "hops_status()")
    status = json.loads(r.stdout)
    assert status["path"] == "reference" and "without a working C compiler" in status["reason"]
    out = os.path.join(inst.work, "sim-out")
    r = inst.run(inst.exe("routerd"), "simulate", "--policy", "qrouting", "--seed", "1",
                 "--rate", "200", "--duration", "2", "--quiet", "--out", out)
    _check(r, "routerd simulate on the reference path")
    assert os.path.exists(os.path.join(out, "summary.json"))


@pytest.mark.slow
def test_wheel_holds_every_module_and_data_file(installed: Installed) -> None:
    """Every module of the packages and every packaged data file is in the wheel (a new
    subpackage missing from pyproject's package list would be caught here)."""
    names = set(zipfile.ZipFile(installed.wheel).namelist())
    want = []
    # the repository's sim/ folder installs as routerd/sim/ (pyproject's package-dir)
    for pkg, dest in (("routerd", "routerd"), ("sim", "routerd/sim")):
        for d, subdirs, files in os.walk(os.path.join(ROOT, pkg)):
            subdirs[:] = [s for s in subdirs if s != "__pycache__"]
            rel = os.path.relpath(d, os.path.join(ROOT, pkg))
            rel = dest if rel == "." else f"{dest}/{rel}"
            want += [f"{rel}/{f}".replace(os.sep, "/") for f in files
                     if f.endswith(".py") or os.path.basename(d) == "data"]
    assert want and [w for w in want if w not in names] == []
    # nothing named sim at the top level of site-packages
    assert not [n for n in names if n.split("/")[0] == "sim"]
    assert "routerd/data/demo-lab.yaml" in names and "routerd/data/demo-scenario.yaml" in names


@pytest.mark.slow
def test_imports_come_from_the_install(installed: Installed) -> None:
    r = installed.run(installed.exe("python"), "-c",
                      "import routerd, routerd.sim, sys; print(routerd.__file__); "
                      "print(routerd.sim.__file__); print(sys.flags.no_user_site)")
    _check(r, "import")
    site = os.path.realpath(installed.venv)
    for line in r.stdout.split()[:2]:
        assert os.path.realpath(line).startswith(site + os.sep), (line, site)
        assert not os.path.realpath(line).startswith(os.path.realpath(ROOT) + os.sep)


@pytest.mark.slow
def test_version_from_the_entry_point_and_as_a_module(installed: Installed) -> None:
    from routerd import __version__

    for cmd in ([installed.exe("routerd"), "--version"],
                [installed.exe("python"), "-m", "routerd", "--version"]):
        r = installed.run(*cmd)
        _check(r, " ".join(cmd))
        assert r.stdout.strip() == f"routerd {__version__}"


@pytest.mark.slow
def test_top_level_help_lists_every_command(installed: Installed) -> None:
    """A command whose module did not install would be left out of the parser silently."""
    r = installed.run(installed.exe("routerd"), "--help")
    _check(r, "routerd --help")
    listed = re.findall(r"^    ([a-z][a-z-]*)(?:\s|$)", r.stdout, flags=re.M)
    assert listed == list(cli.COMMANDS), r.stdout


@pytest.mark.slow
@pytest.mark.parametrize("command", list(cli.COMMANDS))
def test_every_command_starts(installed: Installed, command: str) -> None:
    r = installed.run(installed.exe("routerd"), command, "--help")
    _check(r, f"routerd {command} --help")
    assert r.stdout.startswith(f"usage: routerd {command}"), r.stdout[:300]


@pytest.mark.slow
def test_validate_the_packaged_files(installed: Installed) -> None:
    r = installed.run(installed.exe("python"), "-c",
                      "import importlib.resources as r; d = r.files('routerd') / 'data'; "
                      "print(d / 'demo-lab.yaml'); print(d / 'demo-scenario.yaml')")
    _check(r, "locate packaged data")
    files = r.stdout.split()
    for f in files:
        assert os.path.realpath(f).startswith(os.path.realpath(installed.venv) + os.sep), f
    r = installed.run(installed.exe("routerd"), "validate", *files)
    _check(r, "routerd validate")
    assert r.stdout.count("OK") == 2, r.stdout


@pytest.mark.slow
def test_simulate_on_the_built_in_demo_lab(installed: Installed) -> None:
    """No --topology: the simulator reads the demo lab shipped inside the package."""
    out = os.path.join(installed.work, "sim-out")
    r = installed.run(installed.exe("routerd"), "simulate", "--policy", "qrouting", "--seed", "1",
                      "--rate", "200", "--duration", "2", "--quiet", "--out", out)
    _check(r, "routerd simulate")
    assert os.path.exists(os.path.join(out, "summary.json")), os.listdir(out)


@pytest.mark.slow
def test_demo_runs_from_the_plain_install_without_the_plot_extra(installed: Installed) -> None:
    """A plain install has no matplotlib: the demo still runs (live service, table, reading)
    and says the plots were skipped and how to get them."""
    out = os.path.join(installed.work, "demo-out")
    r = installed.run(installed.exe("routerd"), "demo", "--duration", "3", "--speed", "3",
                      "--out", out, timeout=240)
    _check(r, "routerd demo")
    assert "no plots (delivery.png, load.png): matplotlib is not installed" in r.stderr, r.stderr
    assert "pip install 'routerd[plot]'" in r.stderr
    assert os.path.exists(os.path.join(out, "reading.txt"))
    assert not os.path.exists(os.path.join(out, "delivery.png"))


@pytest.mark.slow
def test_serve_starts_on_the_built_in_demo_lab_and_stops(installed: Installed) -> None:
    """What deploy/Containerfile runs: `routerd serve`, ready, then SIGTERM → exit 0."""
    ipc = tempfile.mkdtemp(prefix="rdinst-", dir="/tmp")   # ipc paths must stay short
    try:
        state = os.path.join(installed.work, "state")
        p = subprocess.Popen([installed.exe("routerd"), "serve", "--state-dir", state,
                              "--ingest", f"ipc://{ipc}/in", "--publish", f"ipc://{ipc}/pub",
                              "--control", f"ipc://{ipc}/ctl", "--metrics", "127.0.0.1:0"],
                             cwd=installed.work, env=installed.env, stdout=subprocess.PIPE,
                             stderr=subprocess.PIPE, text=True)
        try:
            assert p.stdout is not None
            seen = []
            deadline = time.monotonic() + 30
            while time.monotonic() < deadline:
                line = p.stdout.readline()
                if not line:
                    break
                seen.append(line)
                if line.startswith("routerd: ready"):
                    break
            assert seen and seen[-1].startswith("routerd: ready"), "".join(seen)
            assert [ln for ln in seen if ln.strip().startswith("engine kernels: ")], seen
            p.send_signal(signal.SIGTERM)
            so, se = p.communicate(timeout=30)
            assert p.returncode == 0, "".join(seen) + so + se
        finally:
            if p.poll() is None:
                p.kill()
                p.wait(10)
    finally:
        shutil.rmtree(ipc, ignore_errors=True)


@pytest.mark.slow
def test_every_module_imports_from_the_plain_install(installed: Installed) -> None:
    """The plain install has no test extra (networkx, topohub, hypothesis, matplotlib):
    no module may need one at import time."""
    names = sorted(n[:-3].replace("/", ".").removesuffix(".__init__")
                   for n in zipfile.ZipFile(installed.wheel).namelist()
                   if n.endswith(".py") and n.split("/")[0] == "routerd"
                   and not n.endswith("__main__.py"))
    code = ("import importlib, sys\nbad = []\nfor n in sys.argv[1:]:\n    try:\n"
            "        importlib.import_module(n)\n    except Exception as e:\n"
            "        bad.append(f'{n}: {type(e).__name__}: {e}')\nprint('\\n'.join(bad))")
    r = installed.run(installed.exe("python"), "-c", code, *names)
    _check(r, "import every module")
    assert len(names) > 30 and r.stdout.strip() == "", r.stdout


def _bare_submodule_uses() -> dict[str, set[str]]:
    """``X.Y`` attribute uses, by file, where ``X`` is bound by a bare ``import X`` and the
    module never imports ``X.Y`` itself (``import X.Y``, ``from X.Y import``, ``from X
    import Y``)."""
    out: dict[str, set[str]] = {}
    for pkg in ("routerd", "sim"):
        for d, subdirs, files in os.walk(os.path.join(ROOT, pkg)):
            subdirs[:] = [x for x in subdirs if x != "__pycache__"]
            for f in files:
                if not f.endswith(".py"):
                    continue
                path = os.path.join(d, f)
                with open(path, encoding="utf-8") as fh:
                    tree = ast.parse(fh.read(), path)
                bound: dict[str, str] = {}
                explicit: set[str] = set()
                for n in ast.walk(tree):
                    if isinstance(n, ast.Import):
                        for a in n.names:
                            parts = a.name.split(".")
                            explicit.update(".".join(parts[:i]) for i in range(2, len(parts) + 1))
                            if "." not in a.name or a.asname is None:
                                bound[a.asname or parts[0]] = a.name if a.asname else parts[0]
                    elif isinstance(n, ast.ImportFrom) and n.module and n.level == 0:
                        parts = n.module.split(".")
                        explicit.update(".".join(parts[:i]) for i in range(2, len(parts) + 1))
                        explicit.update(f"{n.module}.{a.name}" for a in n.names)
                for n in ast.walk(tree):
                    if isinstance(n, ast.Attribute) and isinstance(n.value, ast.Name) \
                            and n.value.id in bound:
                        full = f"{bound[n.value.id]}.{n.attr}"
                        if full not in explicit:
                            out.setdefault(full, set()).add(os.path.relpath(path, ROOT))
    return out


def _is_submodule(name: str) -> bool:
    try:
        return importlib.util.find_spec(name) is not None
    except (ImportError, ValueError):
        return False


def test_no_submodule_is_used_without_being_imported() -> None:
    """Each ``X.Y`` used after a bare ``import X`` where ``X.Y`` is a submodule must be
    there after ``import X`` in an interpreter started with ``-S`` (no site start-up, so no
    editable-install hook or other ``.pth`` import), with this environment's packages on
    the path: numpy and dpkt import their submodules, importlib does not import ``util``."""
    subs = {k: v for k, v in _bare_submodule_uses().items() if _is_submodule(k)}
    assert "os.path" in subs                     # the scan sees what it should
    paths = sorted({sysconfig.get_paths()["purelib"], sysconfig.get_paths()["platlib"]})
    code = ("import importlib, sys\nsys.path += sys.argv[1].split(':')\n"
            "for n in sys.argv[2:]:\n    top, sub = n.split('.', 1)\n"
            "    if not hasattr(importlib.import_module(top), sub):\n        print(n)")
    r = subprocess.run([sys.executable, "-S", "-c", code, ":".join(paths), *sorted(subs)],
                       capture_output=True, text=True, timeout=60, check=False, cwd="/")
    assert r.returncode == 0, r.stderr
    missing = {n: sorted(subs[n]) for n in r.stdout.split()}
    assert missing == {}, f"import these submodules by name where they are used: {missing}"


@pytest.mark.slow
def test_source_distribution_carries_the_kernel_source(tmp_path: Any) -> None:
    """A wheel built from the sdist must be able to compile the kernels: the .pyx is in it
    (MANIFEST.in), the generated C is not (it is rebuilt from the .pyx)."""
    src = tmp_path / "src"
    shutil.copytree(ROOT, src, ignore=shutil.ignore_patterns(
        ".git", ".venv", "__pycache__", "*.pyc", "*.egg-info", "*.so", "_kernels.c", "_hops.c",
        "_fsync.c", "build",
        "dist", ".hypothesis", ".pytest_cache", "out"))
    r = subprocess.run([sys.executable, "setup.py", "-q", "sdist", "-d", str(tmp_path / "sd")],
                       cwd=str(src), env=_clean_env(None), capture_output=True, text=True,
                       timeout=PIP_TIMEOUT_S, check=False)
    _check(r, "setup.py sdist")
    import tarfile
    (sd,) = (tmp_path / "sd").glob("routerd-*.tar.gz")
    with tarfile.open(sd) as tf:
        names = [n.split("/", 1)[1] for n in tf.getnames() if "/" in n]
    assert "routerd/core/_kernels.pyx" in names and "setup.py" in names, names
    assert "routerd/core/_kernels.c" not in names
    assert "sim/_hops.pyx" in names and "sim/_hops.c" not in names, names
    assert "routerd/io/_fsync.pyx" in names and "routerd/io/_fsync.c" not in names, names
