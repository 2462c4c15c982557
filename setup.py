"""Build hook for the one compiled module; everything else is declared in pyproject.toml."""

from setuptools import Extension, setup

setup(
    ext_modules=[
        Extension(
            "thresher._featurize",
            ["service/thresher/_featurize.c"],
            extra_compile_args=["-O2", "-std=c11", "-Wall", "-Wextra", "-Wno-unused-parameter",
                                "-Wno-missing-field-initializers", "-Wno-cast-function-type"],
        )
    ]
)
