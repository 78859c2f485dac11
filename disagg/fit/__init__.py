"""Fit: exact overlap of run logs with meter intervals, the design, solvers and intervals."""
