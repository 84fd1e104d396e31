"""Numba options shared by every kernel.

``nogil`` lets joblib threads run kernels side by side; ``cache`` keeps compiled code
between runs (a fresh machine compiles once). The fastmath set leaves out ``nnan`` and
``ninf`` (NaN marks missing dyads and must survive) and ``reassoc`` (sums must be
accumulated in one fixed order so results are bit-identical for any chunking).
"""

FASTMATH = {"nsz", "arcp", "contract", "afn"}

KERNEL_OPTIONS = dict(nogil=True, cache=True, fastmath=FASTMATH, error_model="numpy")
