"""Install-time build of the counter's kernels (all other metadata is in pyproject.toml).

analysis/build_kernels.py compiles the kernels ahead of time with numba and
the C compiler, in a process of its own. If that fails (no compiler, say),
the install goes on without the module and the counter compiles the same
kernels with numba's JIT at first use: slower to start, same results.
"""
import subprocess
import sys
from pathlib import Path

from setuptools import Extension, setup
from setuptools.command.build_ext import build_ext

ROOT = Path(__file__).resolve().parent


class BuildKernels(build_ext):
    def build_extension(self, ext):
        target = Path(self.get_ext_fullpath(ext.name)).resolve()
        r = subprocess.run([sys.executable, "-m", "analysis.build_kernels", "--target", str(target)],
                           cwd=ROOT, capture_output=True, text=True)
        if r.returncode != 0:
            from setuptools.errors import CompileError
            tail = "\n".join((r.stderr or r.stdout).strip().splitlines()[-5:])
            raise CompileError(f"the counter kernels were not compiled ahead of time "
                               f"(the counter will use numba's JIT): {tail}")
        print(r.stdout.strip())


setup(
    ext_modules=[Extension("analysis._kernels_aot", sources=[], optional=True)],
    cmdclass={"build_ext": BuildKernels},
)
