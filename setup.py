"""Build step for the compiled row pass (thinning/measure/_rowscan.c); everything else is in pyproject.toml.

The extension is optional: without a C compiler the package installs all the same and
measures with its numpy path (same results, slower; see thinning/measure/compiled.py).
"""

import sys

from setuptools import Extension, setup

flags = [] if sys.platform == "win32" else ["-O3", "-std=c99"]
setup(ext_modules=[Extension("thinning.measure._rowscan", ["thinning/measure/_rowscan.c"], optional=True,
                             extra_compile_args=flags)])
