"""Jobs that would not fit in memory are refused with the estimate (project convention,
common practice), before any large allocation."""

import numpy as np
import pytest

import qhl.base.memory
from qhl import ExactEngine, MemoryBudgetError, build_model
from qhl.cli import main
from qhl.exact.engine import estimate_memory_bytes
from qhl.exact.sectors import magnetisation_sectors

from made_up_clusters import random_cluster


def test_estimate_grows_with_the_largest_sector():
    dims8 = [len(s) for s in magnetisation_sectors(("1H",) * 8)]
    dims12 = [len(s) for s in magnetisation_sectors(("1H",) * 12)]
    assert max(dims8) == 70 and max(dims12) == 924          # binomial(8,4), binomial(12,6)
    assert estimate_memory_bytes(12, dims12, 256) > 50 * estimate_memory_bytes(8, dims8, 256)


def test_engine_refuses_with_the_estimate(monkeypatch):
    monkeypatch.setattr(qhl.base.memory, "available_memory_bytes", lambda: 1e5)
    c = random_cluster(np.random.default_rng(0), 5)
    with pytest.raises(MemoryBudgetError, match=r"needs about .* GiB of memory, but only") as e:
        ExactEngine(build_model(c))
    assert e.value.needed_bytes > 0.8 * 1e5


def test_cli_refusal_is_exit_2(monkeypatch, capsys):
    # --method exact: with "auto", whether the exact or the typical engine is tried depended on whether
    # qhl.exact.engine_choice had imported available_memory_bytes before this patch (test order)
    monkeypatch.setattr(qhl.base.memory, "available_memory_bytes", lambda: 1e5)
    assert main(["signal", "--method", "exact"]) == 2
    err = capsys.readouterr().err
    assert "GiB" in err and len(err.strip().splitlines()) == 1


@pytest.mark.parametrize("version", [0, 1])
def test_a_control_group_limit_caps_the_available_memory(monkeypatch, tmp_path, version):
    # Linux kernel documentation (admin-guide/cgroup-v2.rst: memory.max, memory.current, memory.stat
    # inactive_file; cgroup-v1/memory.rst: memory.limit_in_bytes, usage_in_bytes, total_inactive_file):
    # in a container limited to 2 GiB, /proc/meminfo still shows the host's memory
    import qhl.base.memory as mem
    limit, usage, cache = tmp_path / "limit", tmp_path / "usage", tmp_path / "stat"
    limit.write_text(str(2 * 2**30) + "\n")
    usage.write_text(str(2**29) + "\n")
    key = ("inactive_file", "total_inactive_file")[version]
    cache.write_text(f"anon 123\n{key} {2**28}\nactive_file 5\n")
    files = [("/nonexistent/a", "/nonexistent/b", "/nonexistent/c", "x")] * 2
    files[version] = (str(limit), str(usage), str(cache), key)
    monkeypatch.setattr(mem, "CGROUP_FILES", tuple(files))
    assert mem._cgroup_headroom() == 2 * 2**30 - 2**29 + 2**28
    assert mem.available_memory_bytes() <= 2 * 2**30 - 2**29 + 2**28
    with pytest.raises(MemoryBudgetError):
        mem.require_memory("a 3 GiB job", 3 * 2**30)
    limit.write_text("max\n")                       # cgroup v2 without a limit
    assert mem._cgroup_headroom() == float("inf")
