"""Noise-transfer design and its realization as a loop."""
