"""Analyses on fitted draws: monthly breakdown, tariff, drift tracking, comparison, clock offset."""
