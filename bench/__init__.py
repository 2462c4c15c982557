"""thresher's benchmarks: ``python -m bench`` measures every figure against its peer or target."""
