"""Build of routerd's optional compiled kernels (Cython): the engine's
(routerd/core/_kernels.pyx → routerd.core._kernels), the simulator's event loop
(sim/_hops.pyx → routerd.sim._hops; sim/ installs as routerd.sim, see pyproject.toml) and
the journal writer thread's loop (routerd/io/_fsync.pyx → routerd.io._fsync).

Everything else about the package is in pyproject.toml.  The extension is optional: if
it cannot be built (no C compiler, a failing compile), the build says so in a warning and
the install goes on; routerd then runs on its reference paths and says so (the engine at
start-up and in ``health``, routerd/core/kernels.py; the simulator in ``routerd.sim.core.hops_status``).
Each extension is built on its own: one failing leaves the other.  Cython is a build-time dependency only
(pyproject's [build-system] requires); the installed package does not import it.
"""
from __future__ import annotations

import sys

from setuptools import Extension, setup
from setuptools.command.build_ext import build_ext

WARNING = ("routerd: the compiled kernels ({what}) could not be built ({why}); "
           "routerd will run on its reference path, correct but slower. Install a C "
           "compiler and reinstall for the compiled path.")
ALL = "routerd.core._kernels, routerd.sim._hops, routerd.io._fsync"


class OptionalBuildExt(build_ext):
    """build_ext whose failures are warnings, not errors."""

    def run(self) -> None:
        try:
            super().run()
        except Exception as e:  # noqa: BLE001 - any failure of the optional build
            self._warn(e)

    def build_extension(self, ext: Extension) -> None:
        try:
            super().build_extension(ext)
        except Exception as e:  # noqa: BLE001
            self._warn(e, ext.name)

    @staticmethod
    def _warn(e: BaseException, what: str = ALL) -> None:
        # pip shows a build's output with -v, or in full when the build fails
        print(f"WARNING: {WARNING.format(what=what, why=f'{type(e).__name__}: {e}')}",
              file=sys.stderr)


def extensions() -> list[Extension]:
    try:
        from Cython.Build import cythonize
    except ImportError as e:  # only without build isolation and without Cython
        OptionalBuildExt._warn(e)
        return []
    # no fused multiply-add: the kernels must round exactly like their reference paths
    args = ["-O2", "-ffp-contract=off"] if sys.platform != "win32" else []
    out: list[Extension] = []
    # the simulator's loop lives in sim/ (installed as routerd.sim): the module name is the
    # installed one, the source path the repository's
    for name, source in (("routerd.core._kernels", "routerd/core/_kernels.pyx"),
                         ("routerd.sim._hops", "sim/_hops.pyx"),
                         ("routerd.io._fsync", "routerd/io/_fsync.pyx")):
        try:
            out += cythonize([Extension(name, [source], extra_compile_args=args)],
                             language_level=3, quiet=True)
        except Exception as e:  # noqa: BLE001 - e.g. a source tree without the .pyx
            OptionalBuildExt._warn(e, name)
    return out


setup(ext_modules=extensions(), cmdclass={"build_ext": OptionalBuildExt})
