"""Build hook for the optional C kernels of the sketch core.

All project metadata lives in pyproject.toml; this file only declares the
extension.  It is optional: when no C compiler is available the install
goes on and sketchmerge uses its pure numpy code paths (same results,
slower; see DEVELOPERS.md).
"""

from setuptools import Extension, setup

setup(
    ext_modules=[
        Extension(
            "sketchmerge._kernels",
            sources=["sketchmerge/_kernels.c"],
            extra_compile_args=["-O3"],
            optional=True,
        )
    ]
)
