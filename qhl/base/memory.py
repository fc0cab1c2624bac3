"""Memory estimates: refuse a job that would not fit, with the estimate in the message."""

import os

from .errors import MemoryBudgetError

__all__ = ["available_memory_bytes", "require_memory"]


def available_memory_bytes() -> float:
    """MemAvailable from /proc/meminfo (Linux), else total physical memory."""
    try:
        with open("/proc/meminfo") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return float(line.split()[1]) * 1024
    except OSError:
        pass
    try:
        return float(os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):
        return float("inf")


def require_memory(what: str, needed_bytes: float, fraction: float = 0.8, hint: str | None = None) -> None:
    """Raise MemoryBudgetError if `needed_bytes` exceeds `fraction` of available memory (`hint`: what
    to change, default fewer spins or time points)."""
    avail = available_memory_bytes()
    if needed_bytes > fraction * avail:
        if hint is None:
            raise MemoryBudgetError(what, needed_bytes, fraction * avail)
        raise MemoryBudgetError(what, needed_bytes, fraction * avail, hint)
