"""Memory pages of numpy's large temporaries inside the engines.

On Linux, numpy asks the kernel for transparent huge pages (madvise MADV_HUGEPAGE) on every
array of 4 MiB or more. The engines allocate such temporaries by the thousand (eigen-generators,
time tables, product buffers) and free them again, so each one is faulted in afresh; on the
virtual machines measured here a huge-page fault costs far more than the 512 small-page faults
it replaces (the kernel zeroes and maps 2 MiB at a time, and the hypervisor backs it).
Measured on this 2-core machine (12 random protons, full gradient, 78 parameters, 256 points,
precision "fast", one BLAS thread, fresh processes, /tmp benchmarks of 2026-12-03): 11.1, 10.5,
11.1 s with huge pages against 7.8, 7.5, 7.3 s without (1,100 huge-page faults per gradient,
no compaction stalls); the 18-spin pure-state signal 12.0 and 11.2 s against 9.9 and 10.4 s
(system time 2.1 s -> 0.8 s).

`small_pages()` turns numpy's request off for the duration of an engine call and restores the
previous setting afterwards (numpy's own switch, the one its NUMPY_MADVISE_HUGEPAGE environment
variable sets at import). Set QHL_HUGEPAGES=1 to keep numpy's default inside the engines.
Where numpy has no such switch (other platforms or versions), nothing changes.
"""

from contextlib import contextmanager
import os

__all__ = ["small_pages", "hugepage_switch"]


def hugepage_switch():
    """numpy's setter of the huge-page request (returns the previous setting), or None."""
    try:
        from numpy._core import multiarray
    except ImportError:  # numpy < 2
        from numpy.core import multiarray
    return getattr(multiarray, "_set_madvise_hugepage", None)


@contextmanager
def small_pages():
    """Inside the block numpy does not request huge pages for new arrays (module docstring)."""
    setter = hugepage_switch()
    if setter is None or os.environ.get("QHL_HUGEPAGES", "") == "1":
        yield
        return
    previous = setter(False)
    try:
        yield
    finally:
        setter(previous)
