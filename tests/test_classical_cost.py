"""Classical-cost meter: predictions against measured runs on this machine (time.perf_counter and
tracemalloc from Python's standard library as the references; common practice for cost models),
and its scaling against closed-form sector counts (binomial coefficients)."""

from math import comb
import time
import tracemalloc

import pytest

from qhl import Experiment, build_model
from qhl.costing.classical_cost import DAY_S, TIB, calibrate, classical_cost, route_costs
from qhl.exact.typicality import TypicalEngine
from qhl.survey.structure import cut_clusters, demo_structure_path, invented_offsets_hz, read_structure

EXP = Experiment("fid", 2e-4, 64, 1.0, 1e-3)


def invented_cluster(n):
    nuc = read_structure(demo_structure_path(), ("1H",))
    off = invented_offsets_hz(nuc, 8.0, 9.4, 0)
    return cut_clusters(nuc, n, 1, field_tesla=9.4, experiments=(EXP,), offsets_hz=off)[0]


def test_memory_prediction_within_1_5x_of_tracemalloc():
    c = invented_cluster(12)
    ex = Experiment("fid", 5e-5, 16, 1.0, 1e-3)
    eng = TypicalEngine(build_model(c), replicas=4)
    tracemalloc.start()
    eng.estimate(ex)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    predicted = eng.memory_bytes(16)
    assert peak / 1.5 <= predicted <= 1.5 * peak


@pytest.mark.slow
def test_time_prediction_within_3x_of_a_measured_run():
    # 14 spins, 64 points, 4 replicas: about 5 s of propagation here (> 10 s with calibration)
    c = invented_cluster(14)
    cost = classical_cost(c, replicas=4)
    pure = next(r for r in cost.routes if r["method"] == "pure-state")
    eng = TypicalEngine(build_model(c), replicas=4)
    t0 = time.perf_counter()
    eng.estimate(EXP)
    measured = time.perf_counter() - t0
    assert measured / 3 <= pure["seconds"] <= 3 * measured, (pure["seconds"], measured)


def test_routes_scale_as_sector_counts():
    # sum_k C(n, k)^3 for the eigendecomposition (closed form from the binomial sectors)
    cal = calibrate()
    a = route_costs(12, 30, 1e5, 2e-4, 32, cal=cal)[0]["seconds"]
    b = route_costs(14, 30, 1e5, 2e-4, 32, cal=cal)[0]["seconds"]
    cube = lambda n: sum(comb(n, k) ** 3 for k in range(n + 1))   # noqa: E731
    sq = lambda n: sum(comb(n, k) ** 2 * (comb(n, k + 1) + comb(n, k)) for k in range(n))  # noqa: E731
    assert cube(14) / cube(12) * 0.8 < b / a < sq(14) / sq(12) * 1.25 + cube(14) / cube(12)


def test_crossover_and_json_keys():
    cost = classical_cost(invented_cluster(10))
    js = cost.to_json()
    assert {"method", "memory_bytes", "seconds", "feasible_here"} <= set(js)   # issue 11 contract
    assert cost.feasible_here and cost.seconds < 60
    n = cost.crossover_spins
    assert n is not None and 16 <= n <= 40
    # the definition: beyond a day or 1 TiB at n for every route, not at n - 1
    t_max, points = cost.time_grid
    k, w = cost.couplings_per_spin, cost.half_width_per_spin

    def routes(m):
        return route_costs(m, min(k * m / 2, m * (m - 1) / 2), w * m, t_max, points, m)
    assert all(r["seconds"] > DAY_S or r["memory_bytes"] > TIB for r in routes(n))
    assert not all(r["seconds"] > DAY_S or r["memory_bytes"] > TIB for r in routes(n - 1))


def test_cli_classical_json(capsys):
    import json
    from qhl.cli import main
    assert main(["classical", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["spins"] == 6
    assert {"method", "memory_bytes", "seconds", "feasible_here"} <= set(out["classical"])
