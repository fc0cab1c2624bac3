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
    monkeypatch.setattr(qhl.base.memory, "available_memory_bytes", lambda: 1e5)
    assert main(["signal"]) == 2
    err = capsys.readouterr().err
    assert "GiB" in err and len(err.strip().splitlines()) == 1
