"""Numba kernels of dyadperm: pure functions over plain arrays (no I/O, no objects)."""
