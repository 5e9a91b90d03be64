"""numba kernels: arrays in, arrays out. No files, no logging, no printing.

Each kernel works on one index range split into fixed chunks of ``chunk`` rows; ``prange`` runs
the chunks in parallel and every chunk writes its partial sums into its own slot, which the
caller adds in chunk order. The chunking does not depend on the thread count, so results are
bitwise identical for any ``--threads``.
"""

from .rank import gather_block, n_chunks, scale_range

__all__ = ["gather_block", "n_chunks", "scale_range"]
