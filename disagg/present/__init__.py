"""Presentation: the one place that writes result files, terminal summaries, the report, history."""
