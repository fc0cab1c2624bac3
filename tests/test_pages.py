"""No huge pages for numpy's temporaries inside engine calls (qhl.base.pages), read back from the
kernel: the VmFlags line of /proc/self/smaps shows `hg` on a mapping that was advised
MADV_HUGEPAGE (Linux kernel documentation, "The /proc Filesystem", section on /proc/PID/smaps,
and "Transparent Hugepage Support", admin-guide/mm/transhuge; the kernel is the reference)."""

import os

import numpy as np
import pytest

from qhl.base.blas import blas_limited
from qhl.base.pages import hugepage_switch, small_pages

SMAPS = "/proc/self/smaps"


def _advised(arr):
    """Whether the kernel marks the mapping that holds the middle of arr's data as advised for huge
    pages (numpy advises the 2 MiB-aligned part: the first page is a mapping of its own)."""
    addr = arr.ctypes.data + arr.nbytes // 2
    with open(SMAPS) as fh:
        inside = False
        for line in fh:
            head = line.split()[0]
            if "-" in head and not head.endswith(":"):
                lo, hi = (int(x, 16) for x in head.split("-"))
                inside = lo <= addr < hi
            elif inside and head == "VmFlags:":
                return "hg" in line.split()[1:]
    raise AssertionError("mapping of the array not found in smaps")


def _big():
    return np.ones(64 << 17)            # 64 MiB: far above numpy's 4 MiB threshold


@pytest.fixture
def numpy_advises():
    if not os.path.exists(SMAPS) or hugepage_switch() is None:
        pytest.skip("Linux smaps and numpy's huge-page switch needed")
    switch = hugepage_switch()
    before = switch(True)
    try:
        if not _advised(_big()):
            pytest.skip("numpy does not advise huge pages on this kernel")
        yield
    finally:
        switch(before)


def test_small_pages_inside_and_restored_after(numpy_advises):
    with small_pages():
        assert not _advised(_big())
    assert _advised(_big())


def test_engine_methods_run_without_huge_pages(numpy_advises):
    class Engine:
        largest_sector = 10

        @blas_limited
        def work(self):
            return _advised(_big())

    assert Engine().work() is False
    assert _advised(_big())


def test_environment_keeps_numpy_default(numpy_advises, monkeypatch):
    monkeypatch.setenv("QHL_HUGEPAGES", "1")
    with small_pages():
        assert _advised(_big())


def test_restored_after_an_error(numpy_advises):
    with pytest.raises(ValueError):
        with small_pages():
            raise ValueError("inside")
    assert _advised(_big())
