"""Pipeline stages: each reads its inputs from the run directory, calls kernels, writes atomically."""
