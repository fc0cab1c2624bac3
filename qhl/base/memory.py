"""Memory estimates: refuse a job that would not fit, with the estimate in the message."""

import os

from .errors import MemoryBudgetError

__all__ = ["available_memory_bytes", "require_memory"]


# control-group memory limits (a container or a batch job): (limit, usage, statistics) files of cgroup v2
# and v1 (Linux kernel documentation, admin-guide/cgroup-v2.rst and cgroup-v1/memory.rst)
CGROUP_FILES = (("/sys/fs/cgroup/memory.max", "/sys/fs/cgroup/memory.current", "/sys/fs/cgroup/memory.stat",
                 "inactive_file"),
                ("/sys/fs/cgroup/memory/memory.limit_in_bytes", "/sys/fs/cgroup/memory/memory.usage_in_bytes",
                 "/sys/fs/cgroup/memory/memory.stat", "total_inactive_file"))


def _read_number(path):
    try:
        with open(path) as f:
            text = f.read().strip()
    except OSError:
        return None
    try:
        return float(text)
    except ValueError:             # "max": no limit
        return None


def _cgroup_headroom() -> float:
    """Memory the control group still allows: limit - usage + reclaimable page cache (inactive file pages),
    or inf without a limit (or a limit above 2^60 bytes, the kernel's way of saying none)."""
    for limit_path, usage_path, stat_path, cache_key in CGROUP_FILES:
        limit = _read_number(limit_path)
        if limit is None or limit >= 2.0**60:
            continue
        usage = _read_number(usage_path) or 0.0
        cache = 0.0
        try:
            with open(stat_path) as f:
                for line in f:
                    key, _, value = line.partition(" ")
                    if key == cache_key:
                        cache = float(value)
        except (OSError, ValueError):
            pass
        return max(0.0, limit - usage + cache)
    return float("inf")


def available_memory_bytes() -> float:
    """MemAvailable from /proc/meminfo (Linux), else total physical memory; never more than what the
    process's control group (a container's or a batch job's memory limit) still allows."""
    avail = None
    try:
        with open("/proc/meminfo") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    avail = float(line.split()[1]) * 1024
                    break
    except OSError:
        pass
    if avail is None:
        try:
            avail = float(os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE"))
        except (ValueError, OSError, AttributeError):
            avail = float("inf")
    return min(avail, _cgroup_headroom())


def require_memory(what: str, needed_bytes: float, fraction: float = 0.8, hint: str | None = None) -> None:
    """Raise MemoryBudgetError if `needed_bytes` exceeds `fraction` of available memory (`hint`: what
    to change, default fewer spins or time points)."""
    avail = available_memory_bytes()
    if needed_bytes > fraction * avail:
        if hint is None:
            raise MemoryBudgetError(what, needed_bytes, fraction * avail)
        raise MemoryBudgetError(what, needed_bytes, fraction * avail, hint)
