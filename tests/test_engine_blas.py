"""BLAS threads per block (qhl.base.blas): the limit is really applied inside the block and
restored after it, read back through threadpoolctl (a general-purpose library; the reference here
is what threadpoolctl reports, common practice)."""

import os

import numpy as np
import pytest

threadpoolctl = pytest.importorskip("threadpoolctl")

from qhl.base.blas import LARGE_BLOCK_THREADS, SMALL_BLOCK, blas_threads  # noqa: E402


def _blas_threads():
    np.ones(2) @ np.ones(2)  # make sure BLAS is loaded
    info = [p["num_threads"] for p in threadpoolctl.threadpool_info() if p.get("user_api") == "blas"]
    if not info:
        pytest.skip("no BLAS found by threadpoolctl")
    return info[0]


def test_small_blocks_one_thread_large_blocks_two():
    before = _blas_threads()
    with blas_threads(SMALL_BLOCK):
        assert _blas_threads() == 1
    with blas_threads(SMALL_BLOCK + 1):
        assert _blas_threads() == max(1, min(LARGE_BLOCK_THREADS, os.cpu_count() or 1))
    assert _blas_threads() == before
