"""What a path that is not a regular file is, in words (stdlib only: the site-file check and the
data readers share it)."""

from __future__ import annotations

import stat


def special_kind(mode: int) -> str | None:
    """None for a regular file, else what it is ("a folder", "a FIFO (named pipe)", "a device",
    "a socket", "not a regular file"): a FIFO would block a reader forever and a device such
    as /dev/zero would be read until memory runs out, so neither is ever opened."""
    if stat.S_ISREG(mode):
        return None
    return ("a folder" if stat.S_ISDIR(mode) else "a FIFO (named pipe)" if stat.S_ISFIFO(mode)
            else "a device" if stat.S_ISCHR(mode) or stat.S_ISBLK(mode)
            else "a socket" if stat.S_ISSOCK(mode) else "not a regular file")
