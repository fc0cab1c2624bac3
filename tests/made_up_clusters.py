"""Invented test clusters (value types of qhl; no physics is computed here).

The references (reference_dense.py, reference_trotter.py) take these clusters' models as data.
"""

from qhl.spins.cluster import Cluster, Experiment, Pair, Spin
from qhl.spins.model import build_model


def random_cluster(rng, n, hetero=False, experiments=None, with_j=True):
    spins = []
    for i in range(n):
        iso = "13C" if (hetero and i % 3 == 2) else "1H"
        spins.append(Spin(f"S{i}", iso, tuple(rng.uniform(-1, 1, 3) * 1.3 * n ** (1 / 3)),
                          float(rng.normal(0, 2000))))
    pairs = (Pair(("S0", "S1"), j_hz=7.0), Pair(("S1", "S2"), j_hz=-12.0)) if with_j and n > 2 else ()
    if experiments is None:
        experiments = (Experiment("a", 2e-4, 6, 0.7), Experiment("b", 1e-3, 5, 0.1))
    try:
        return Cluster(9.4, "1H", tuple(spins), pairs, tuple(experiments))
    except Exception:  # two spins drawn too close: draw again
        return random_cluster(rng, n, hetero, experiments, with_j)


# ---------------------------------------------------------------- operators built here


def small_cluster(hetero=False, n=3):
    """Hz-scale invented couplings so that 2 pi t h is of order one at t = 0.3 s."""
    iso = ["1H", "1H", "13C" if hetero else "1H", "1H"][:n]
    offsets = [1.3, -0.8, 0.55, 0.2][:n]
    spins = tuple(Spin(f"S{i}", iso[i], None, offsets[i]) for i in range(n))
    pairs = [Pair(("S0", "S1"), j_hz=0.45, dipolar_hz=0.9), Pair(("S1", "S2"), dipolar_hz=-0.6),
             Pair(("S0", "S2"), j_hz=0.3, dipolar_hz=0.35)]
    if n == 4:
        pairs += [Pair(("S2", "S3"), dipolar_hz=0.5), Pair(("S0", "S3"), j_hz=0.25)]
    pairs = [p for p in pairs if all(int(s[1:]) < n for s in p.spins)]
    return Cluster(9.4, "1H", spins, tuple(pairs), (Experiment("x", 0.3, 4, 0.8),))


def small_model(hetero=False, n=3):
    c = small_cluster(hetero, n)
    return build_model(c, free=["offset:*", "dipolar:*", "j:*"]), c.experiments[0]


# ---------------------------------------------------------------- blocks, ordering, grouping


# An invented three-proton cluster in TOML (the check and device-check CLI tests).
TRIO_TOML = """
field_tesla = 9.4
observe = "1H"
name = "trio"
[[spin]]
label = "A"
isotope = "1H"
position_angstrom = [0.0, 0.0, 0.0]
offset_hz = -300.0
[[spin]]
label = "B"
isotope = "1H"
position_angstrom = [2.0, 0.0, 0.0]
offset_hz = 250.0
[[spin]]
label = "C"
isotope = "1H"
position_angstrom = [0.5, 2.3, 0.6]
offset_hz = 700.0
[[experiment]]
name = "static"
t_max_s = 4e-4
points = 8
"""
