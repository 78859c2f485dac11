"""Inputs: the site file, the meter, run-log and weather files, and their validation (VEE)."""
