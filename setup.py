"""Build script for the optional C counting kernel (all metadata lives in pyproject.toml).

The extension is optional: if it cannot be compiled, dicert falls back to a numpy kernel that
gives identical counts, only slower.
"""

from setuptools import Extension, setup

setup(
    ext_modules=[
        Extension("dicert._ccount", ["dicert/_ccount.c"], extra_compile_args=["-O3"], optional=True),
    ]
)
