"""Readers and writers (lowest layer: imports nothing above it)."""
