"""Build step for the compiled kernels; everything else is declared in pyproject.toml.

The extension is optional: without a C compiler the install still succeeds
and the engine forms the same sums with numpy (slower; see DEVELOPERS.md).
"""

from setuptools import Extension, setup

setup(ext_modules=[Extension("beamtap.service.engine._kernels", ["service/engine/_kernels.c"],
                             depends=["service/engine/_steer_lanes.h"],
                             extra_compile_args=["-O3", "-Wno-psabi"], optional=True)])
