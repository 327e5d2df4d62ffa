"""Maintenance scripts (not part of the installed package)."""
