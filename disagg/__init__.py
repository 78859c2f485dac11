"""disagg: per-equipment monthly energy from one interval meter and building automation run logs."""

__version__ = "0.1.0"
