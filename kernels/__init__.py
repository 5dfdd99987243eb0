"""Numba kernels on arrays: numpy and numba only."""
