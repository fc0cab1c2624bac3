"""BLAS threading for small dense blocks.

The engine's sector blocks are small (tens to hundreds of rows). Multithreaded OpenBLAS on such
matrices is slower than one thread, and far slower when the cores are shared (threads spin
waiting for each other): measured here, a 10-spin gradient took 1.4 s with one BLAS thread
and 55 s with two on a loaded 2-core machine (12 spins: 55 s against 125 s). Below SMALL_BLOCK
rows qhl runs BLAS on one thread.
"""

from contextlib import contextmanager, nullcontext
import functools

__all__ = ["SMALL_BLOCK", "single_thread_blas", "blas_limited"]

SMALL_BLOCK = 1000
_CONTROLLER = []


def _controller():
    if not _CONTROLLER:
        try:
            from threadpoolctl import ThreadpoolController
            _CONTROLLER.append(ThreadpoolController())
        except ImportError:  # threadpoolctl is a dependency; without it, leave BLAS as it is
            _CONTROLLER.append(None)
    return _CONTROLLER[0]


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
    """Decorator for engine methods: one BLAS thread when the engine's sectors are small."""
    @functools.wraps(method)
    def wrapper(self, *args, **kwargs):
        with single_thread_blas(self.largest_sector):
            return method(self, *args, **kwargs)
    return wrapper
