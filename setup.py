"""Build of the one C extension: the sparse engine's kernels (server/engine/kernels.c).

Everything else about the package is declared in pyproject.toml; ext_modules stays here
because the setuptools this project supports (>= 68) reads extensions only from setup.py.
No numpy headers are needed: the kernels take arrays through the buffer protocol.
"""

from setuptools import Extension, setup

setup(
    ext_modules=[
        Extension(
            "server.engine._kernels_c",
            sources=["server/engine/kernels.c"],
            # The same results to the last bit as the numba kernels: the same operations in the
            # same order, so no fast-math and no fused multiply-add; no -march=native either
            # (a wheel runs on other machines).
            extra_compile_args=["-O2", "-fno-fast-math", "-ffp-contract=off", "-std=c11"],
            # Where it cannot be compiled (no C compiler) the install still succeeds and the
            # engine runs numba's kernels; scripts/install says which are in use, and
            # tests/test_packaging.py fails when a wheel is built without it.
            optional=True,
        )
    ],
)
