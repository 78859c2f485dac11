"""Exception types the library raises for bad input.

Only ``cli.py`` turns them into an ``Error: ...`` line on stderr with exit status 1.
Every message names the file, the row or column, the first bad value, what was
expected and, where there is one, how to fix it.
"""

from __future__ import annotations


class DisaggError(Exception):
    """Base class for errors caused by the user's inputs or settings."""


class ConfigError(DisaggError):
    """The site TOML file is missing a setting or holds a value that cannot be used."""


class InputError(DisaggError):
    """A meter or run-log file cannot be read or holds data that cannot be used."""


class OutputError(DisaggError):
    """An output folder cannot be written, or writing would overwrite an input."""
