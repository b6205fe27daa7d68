"""Matrix products cut into row blocks small enough that the BLAS runs each on one thread."""

from __future__ import annotations

import numpy as np

# OpenBLAS starts its threads for a gemm once m*n*k exceeds about 2.6e5 (its interface code, from
# memory). Between the many small eigen-decompositions of the solvers those threads cost more than
# they give: woken for each product, they spin on the cores the next decomposition needs. Blocks
# below this size keep every product on the calling thread; results are the same either way.
_BLOCK_MNK = 131072


def matmul_rows(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """a @ b for a (..., k) and b (k, n), computed as a stack of row blocks (same values as a @ b)."""
    k, n = b.shape
    lead = a.shape[:-1]
    flat = a.reshape(-1, k)
    m = flat.shape[0]
    rows = max(1, _BLOCK_MNK // max(k * n, 1))
    if m <= rows:
        return (flat @ b).reshape(lead + (n,))
    blocks = -(-m // rows)
    padded = np.zeros((blocks * rows, k), dtype=np.result_type(a, b))
    padded[:m] = flat
    out = (padded.reshape(blocks, rows, k) @ b).reshape(blocks * rows, n)[:m]
    return out.reshape(lead + (n,))
