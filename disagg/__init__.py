"""disagg: per-equipment monthly energy from one interval meter and building automation run logs."""

import os as _os

# The fits multiply tall, narrow matrices, where BLAS threads cost more than they save (seen
# here: a fit 5-8x slower with OpenBLAS's default threads on a 2-core machine). Only takes
# effect when numpy has not been imported yet; a user's own setting wins.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    _os.environ.setdefault(_var, "1")

__version__ = "0.1.0"
