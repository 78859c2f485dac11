"""disagg: per-equipment monthly energy from one interval meter and building automation run logs."""

# Importing disagg changes nothing in the caller's process: the command line sets its own
# BLAS thread count (disagg/cli.py); a Python user keeps theirs.

__version__ = "0.1.0"
