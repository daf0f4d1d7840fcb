"""Build of routerd's optional compiled kernels (routerd/core/_kernels.pyx, Cython).

Everything else about the package is in pyproject.toml.  The extension is optional: if
it cannot be built (no C compiler, a failing compile), the build says so in a warning and
the install goes on; routerd then runs on its numpy reference path and says so at start-up
and in ``health`` (routerd/core/kernels.py).  Cython is a build-time dependency only
(pyproject's [build-system] requires); the installed package does not import it.
"""
from __future__ import annotations

import sys

from setuptools import Extension, setup
from setuptools.command.build_ext import build_ext

WARNING = ("routerd: the compiled kernels (routerd.core._kernels) could not be built ({why}); "
           "routerd will run on its numpy reference path, correct but slower. Install a C "
           "compiler and reinstall for the compiled path.")


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
            self._warn(e)

    @staticmethod
    def _warn(e: BaseException) -> None:
        # pip shows a build's output with -v, or in full when the build fails
        print(f"WARNING: {WARNING.format(why=f'{type(e).__name__}: {e}')}", file=sys.stderr)


def extensions() -> list[Extension]:
    try:
        from Cython.Build import cythonize
    except ImportError as e:  # only without build isolation and without Cython
        OptionalBuildExt._warn(e)
        return []
    ext = Extension(
        "routerd.core._kernels", ["routerd/core/_kernels.pyx"],
        # no fused multiply-add: the kernels must round exactly like the numpy reference
        extra_compile_args=["-O2", "-ffp-contract=off"] if sys.platform != "win32" else [],
    )
    try:
        return cythonize([ext], language_level=3, quiet=True)
    except Exception as e:  # noqa: BLE001 - e.g. a source tree without the .pyx
        OptionalBuildExt._warn(e)
        return []


setup(ext_modules=extensions(), cmdclass={"build_ext": OptionalBuildExt})
