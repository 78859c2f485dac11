"""Shared test settings."""

import os

# Single-threaded BLAS before numpy is imported (as the command line does, disagg/cli.py).
for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(var, "1")
