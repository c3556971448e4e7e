"""Build the optional compiled CSV formatter (everything else is in pyproject.toml).

Without a C compiler the install still succeeds: ``sim.floatfmt`` then writes
the same text with numpy, more slowly.
"""
import sys

from setuptools import Extension, setup

flags = [] if sys.platform == "win32" else ["-O2", "-ffp-contract=off"]
setup(ext_modules=[Extension("sim.traces._csvtext", ["sim/traces/_csvtext.c"], extra_compile_args=flags, optional=True)])
