"""BLAS threads per block (qhl.base.blas): the limit is really applied inside the block and
restored after it, read back through threadpoolctl (a general-purpose library; the reference here
is what threadpoolctl reports, common practice)."""

import os

import numpy as np
import pytest

threadpoolctl = pytest.importorskip("threadpoolctl")

from qhl.base.blas import LARGE_BLOCK_THREADS, SMALL_BLOCK, blas_threads  # noqa: E402


def _blas_threads():
    """Thread counts of numpy's and scipy's BLAS (what the engine's products and eigh call). Other
    BLAS copies that packages bring along (a single-threaded OpenBLAS inside another wheel, say)
    are not what the engine calls and are left out."""
    import scipy.linalg  # noqa: F401  (loads scipy's BLAS)
    np.ones(2) @ np.ones(2)  # make sure BLAS is loaded
    homes = {"numpy.libs", "scipy.libs", "numpy", "scipy"}
    mine = {p["num_threads"] for p in threadpoolctl.threadpool_info()
            if p.get("user_api") == "blas" and os.path.basename(os.path.dirname(p["filepath"])) in homes}
    if not mine:
        pytest.skip("numpy's and scipy's own BLAS not found by threadpoolctl (a system BLAS?)")
    return mine.pop() if len(mine) == 1 else mine


def test_small_blocks_one_thread_large_blocks_two():
    before = _blas_threads()
    with blas_threads(SMALL_BLOCK):
        assert _blas_threads() == 1
    with blas_threads(SMALL_BLOCK + 1):
        assert _blas_threads() == max(1, min(LARGE_BLOCK_THREADS, os.cpu_count() or 1))
    assert _blas_threads() == before
