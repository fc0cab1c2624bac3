"""BLAS threading by block size.

The engine's sector blocks range from one row to thousands. Multithreaded OpenBLAS on small
matrices is slower than one thread, and far slower when the cores are shared (threads spin
waiting for each other): measured here, a 10-spin gradient took 1.4 s with one BLAS thread
and 55 s with two on a loaded 2-core machine (12 spins: 55 s against 125 s).

Crossover, measured on this 2-core machine under the usual load of other jobs (load average
about 8; square float64 products, medians, benchmarks/bench_engine.py --crossover): time with two
threads over time with one was 0.05 at d = 256, 0.44 at 512, 0.71 at 924, 0.94 at 1716 and 1.02
at 2400. The eigensolver (scipy eigh, driver evd, d = 2400) took 2.2-2.3 s on one thread and
1.2 s on two on a quiet moment, but 18.9 s on two when other jobs took the second core; a 14-spin
signal ran 2x slower than a one-thread peer with two-thread eigh. So blocks up to
SMALL_BLOCK = 4000 rows (every sector up to 14 protons) run on one thread, and only larger blocks
(15 protons and more, where each call is long) on LARGE_BLOCK_THREADS = 2 (never more than the
machine has).
"""

from contextlib import contextmanager, nullcontext
import functools
import os

from .pages import small_pages

__all__ = ["SMALL_BLOCK", "LARGE_BLOCK_THREADS", "blas_threads", "single_thread_blas", "blas_limited"]

SMALL_BLOCK = 4000
LARGE_BLOCK_THREADS = 2
_CONTROLLER = []


def _controller():
    if not _CONTROLLER:
        try:
            from threadpoolctl import ThreadpoolController
            _CONTROLLER.append(ThreadpoolController())
        except ImportError:  # threadpoolctl is a dependency; without it, leave BLAS as it is
            _CONTROLLER.append(None)
    return _CONTROLLER[0]


def threads_for(rows: int) -> int:
    """BLAS threads for a block of `rows` rows: 1 up to SMALL_BLOCK, else LARGE_BLOCK_THREADS."""
    if rows <= SMALL_BLOCK:
        return 1
    return max(1, min(LARGE_BLOCK_THREADS, os.cpu_count() or 1))


@contextmanager
def blas_threads(rows: int):
    """Run BLAS on threads_for(rows) threads inside the block."""
    ctl = _controller()
    if ctl is None:
        with nullcontext():
            yield
    else:
        with ctl.limit(limits=threads_for(rows), user_api="blas"):
            yield


@contextmanager
def single_thread_blas(largest_block: int):
    """Limit BLAS to one thread while the largest block has at most SMALL_BLOCK rows."""
    ctl = _controller()
    if ctl is None or largest_block > SMALL_BLOCK:
        with nullcontext():
            yield
    else:
        with ctl.limit(limits=1, user_api="blas"):
            yield


def blas_limited(method):
    """Decorator for engine methods: BLAS threads chosen by the engine's largest sector, and no
    huge pages for numpy's temporaries during the call (qhl.base.pages)."""
    @functools.wraps(method)
    def wrapper(self, *args, **kwargs):
        with blas_threads(self.largest_sector), small_pages():
            return method(self, *args, **kwargs)
    return wrapper
