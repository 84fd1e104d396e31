"""Numba kernels of dyadperm: pure functions over plain arrays (no I/O, no objects).

Importing the package first sends numba's cache of these kernels to a per-user folder
(``kernels.cache``), never into the installed package.
"""

from . import cache  # noqa: F401  (registers the cache locator before any kernel exists)
