"""Build hook for the one compiled module; everything else is declared in pyproject.toml."""

from setuptools import Extension, setup

# ISO C without fused multiply-adds: the kernels must round exactly as the numpy reference.
FLAGS = ["-O2", "-std=c11", "-ffp-contract=off", "-Wall", "-Wextra", "-Wno-unused-parameter",
         "-Wno-missing-field-initializers", "-Wno-cast-function-type"]  # fmt: skip

setup(
    ext_modules=[
        Extension(f"thresher.{name}", [f"service/thresher/{name}.c"], extra_compile_args=FLAGS)
        for name in ("_featurize", "_learner", "_appliedids", "_records", "_quality")
    ]
)
