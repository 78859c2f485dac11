"""Jobs: one function per command, used by the CLI and by batch."""
