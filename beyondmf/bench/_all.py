"""Imports every benchmark suite so that each registers itself."""
