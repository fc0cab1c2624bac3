"""Spinning experiments in the exact engine (qhl.exact.spinning_engine), against outside references.

References, beside each check:
  * tests/reference_spinning.py: a dense time-ordered propagation (midpoint slices, scipy expm,
    the rotor rotation rebuilt with scipy.spatial.transform.Rotation; imports nothing of qhl);
  * M. M. Maricq and J. S. Waugh, J. Chem. Phys. 70, 3300 (1979): an isolated homonuclear pair at
    the magic angle refocuses at every rotor period, its spectrum is a set of sidebands at the
    offset plus multiples of the spinning rate, and fast spinning averages the dipolar coupling
    away (first-order average Hamiltonian, proportional to 1 / rate);
  * the closed-form FID of an isolated pair (derived in test_pair_closed_form), with the time
    integral of the coupling from scipy.integrate.quad of P2 built here with scipy Rotation;
  * the static engine (spinning_hz -> 0) and central differences of the engine's own signal.
"""

import dataclasses

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.spatial.transform import Rotation

from qhl.base.errors import QhlInputError
from qhl.exact.engine import ExactEngine
from qhl.exact.likelihood import fisher_information
from qhl.exact.powder import powder_lines
from qhl.exact.spinning_engine import default_slices_per_period, spinning_signal
from qhl.spins.cluster import Delay
from qhl.spins.cluster_file import parse_cluster_toml
from qhl.spins.model import build_model
from qhl.spins.spinning import MAGIC_ANGLE_DEG

from reference_spinning import dense_spinning_gradient, dense_spinning_signal

# invented clusters (made-up geometries and shifts)
HEADER = """field_tesla = 9.4
observe = "1H"
field_direction = [0.3, 0.2, 1.0]
"""
SPIN = """[[spin]]
label = "{label}"
isotope = "{iso}"
position_angstrom = {pos}
shift_ppm = {shift}
"""
EXPERIMENT = """[[experiment]]
name = "mas"
t_max_s = {t_max}
points = {points}
spinning_hz = {rate}
spinning_angle_deg = {angle}
"""
THREE = [("A", "1H", [0.0, 0.0, 0.0], 1.0), ("B", "1H", [1.2, 0.4, 1.0], 3.0),
         ("C", "13C", [-0.9, 1.1, 0.3], 0.0)]
FOUR = THREE + [("D", "1H", [0.5, -1.6, 0.8], 2.2)]


def _cluster(spins, rate=12500.0, angle=MAGIC_ANGLE_DEG, t_max=None, points=16, extra=""):
    t_max = 2.4 / rate if t_max is None else t_max
    text = HEADER + "".join(SPIN.format(label=a, iso=b, pos=list(c), shift=d) for a, b, c, d in spins)
    text += EXPERIMENT.format(t_max=t_max, points=points, rate=rate, angle=angle) + extra
    return parse_cluster_toml(text, "made_up_spinning.toml")


def _setup(spins, **kw):
    c = _cluster(spins, **kw)
    m = build_model(c)
    return c, m, ExactEngine(m), c.experiments[0]


# ------------------------------------------------------------------ the dense time-ordered reference
@pytest.mark.parametrize("spins,angle", [(THREE, MAGIC_ANGLE_DEG), (FOUR, MAGIC_ANGLE_DEG), (THREE, 40.0)])
def test_signal_equals_dense_reference(spins, angle):
    # Source: tests/reference_spinning.py (dense time-ordered propagation). Its midpoint slices carry an
    # O(slice^2) error; the engine (fourth order, 64 slices) is converged far below it, so the
    # difference must (1) be small and (2) shrink by about 4 when the reference's slices double.
    c, m, eng, ex = _setup(spins, angle=angle)
    t = ex.times_s
    s = spinning_signal(eng, ex, t, slices_per_period=64)
    d200 = np.abs(s - dense_spinning_signal(c, m, ex, t, slices_per_period=200)).max()
    d400 = np.abs(s - dense_spinning_signal(c, m, ex, t, slices_per_period=400)).max()
    assert d400 < 1e-4
    assert 3.0 < d200 / d400 < 5.0          # the reference's own second-order error, halved slices


@pytest.mark.slow
@pytest.mark.parametrize("angle", [MAGIC_ANGLE_DEG, 70.0])
def test_gradient_equals_dense_reference(angle):
    # Source: tests/reference_spinning.py, central differences (step 1e-3 Hz, error ~1e-12) of the dense
    # propagation with 400 slices per period. Tolerance from the reference's O(slice^2) error: measured
    # 1.2e-3 of the largest entry at 400 slices here (the signal's 5e-6 times t ~ 2 T_R times the
    # couplings); 5e-3 leaves a margin.
    c, m, eng, ex = _setup(THREE, angle=angle, points=6)
    sig, g = eng.gradient(ex)
    ref = dense_spinning_gradient(c, m, ex, ex.times_s, slices_per_period=400)
    assert np.abs(g - ref).max() < 5e-3 * np.abs(ref).max()
    assert np.abs(sig - eng.signal(ex)).max() < 1e-14


# ------------------------------------------------------------------ isolated pair (Maricq and Waugh)
PAIR = [("A", "1H", [0.0, 0.0, 0.0], 2.0), ("B", "1H", [1.1, 0.5, 1.3], 2.0)]


def _p2_factor(c, ex, t):
    """s(t) = P2(cos Theta(t)) / P2(cos Theta(0)) of the pair, by scipy Rotation (module convention)."""
    f = np.asarray(c.field_direction, float)
    f /= np.linalg.norm(f)
    x = np.array([1.0, 0.0, 0.0])
    e = x - (x @ f) * f
    e /= np.linalg.norm(e)
    th = np.radians(ex.spinning_angle_deg)
    axis = np.cos(th) * f + np.sin(th) * e
    r = np.subtract(PAIR[1][2], PAIR[0][2]) / np.linalg.norm(np.subtract(PAIR[1][2], PAIR[0][2]))
    cos_t = Rotation.from_rotvec(2 * np.pi * ex.spinning_hz * t * axis).apply(r) @ f
    return (1.5 * cos_t**2 - 0.5) / (1.5 * (r @ f) ** 2 - 0.5)


@pytest.mark.parametrize("angle", [MAGIC_ANGLE_DEG, 35.0])
def test_pair_closed_form(angle):
    # Closed form (derived here): for two like spins with equal offsets nu, H = 2 pi [nu Iz_tot + d(t) G],
    # G = 3 Iz1 Iz2 - I1.I2, and [H(t), H(t')] = 0, so U = exp(-i 2 pi (nu t Iz_tot + D(t) G)), D = int d.
    # G has eigenvalue 1/2 on |uu>, |dd> and -1 on the triplet m = 0 (0 on the singlet, not observed), so
    # the single-quantum lines sit at nu +- 3/2 d and S(t) = exp(2 pi i nu t) cos(3/2 * 2 pi D(t)).
    c, m, eng, ex = _setup(PAIR, angle=angle, rate=8000.0, t_max=3.3 / 8000.0, points=40)
    names = [p.name for p in m.parameters]
    nu = m.values_hz[names.index("offset:A")]
    h = m.values_hz[names.index("dipolar:A-B")]
    t = ex.times_s
    big_d = np.array([quad(lambda x: h * _p2_factor(c, ex, x), 0.0, tt, limit=200)[0] for tt in t])
    want = np.exp(2j * np.pi * nu * t) * np.cos(1.5 * 2 * np.pi * big_d)
    assert np.abs(spinning_signal(eng, ex, t, slices_per_period=8) - want).max() < 1e-10


def test_pair_refocuses_every_rotor_period():
    # Maricq and Waugh (1979): at the magic angle the pair's coupling averages to zero over each period,
    # so the dipolar evolution refocuses, |S(k T_R)| = 1 (exact here: the slice averages are exact and
    # H(t) commutes with itself), while between the periods it does not.
    rate = 5000.0
    c, m, eng, ex = _setup(PAIR, rate=rate, t_max=10 / rate, points=41)
    s = eng.signal(ex)
    assert np.abs(np.abs(s[::4]) - 1).max() < 1e-10
    assert np.abs(np.abs(s[2::4]) - 1).min() > 1e-2


def test_pair_spectrum_has_only_rotor_sidebands():
    # Maricq and Waugh (1979): the spectrum of the spinning pair is a set of sharp sidebands at the
    # offset plus integer multiples of the spinning rate. With 16 samples per period over 64 periods
    # and an offset on the FFT grid, every other FFT bin must vanish (to rounding).
    rate, per, periods = 10000.0, 16, 64
    n = per * periods
    c, m, eng, ex = _setup(PAIR, rate=rate, t_max=(n - 1) / (per * rate), points=n)
    names = [p.name for p in m.parameters]
    df = rate / periods                      # FFT resolution
    nu_bin = int(round(m.values_hz[names.index("offset:A")] / df))
    vals = m.values_hz.copy()
    vals[names.index("offset:A")] = vals[names.index("offset:B")] = nu_bin * df
    free = np.array([vals[names.index(f)] for f in m.free])
    spec = np.fft.fft(eng.signal(ex, free_values_hz=free)) / n
    lines = (nu_bin + periods * np.arange(-per, per)) % n
    off = np.ones(n, bool)
    off[lines] = False
    assert np.abs(spec[off]).max() < 1e-10
    amp = np.abs(spec[(nu_bin + periods * np.array([-2, -1, 1, 2])) % n])
    assert amp.min() > 1e-3                  # real sidebands, not a lone centre line


def test_fast_spinning_removes_the_dipolar_coupling():
    # Maricq and Waugh (1979): at the magic angle the rotor-averaged coupling vanishes; the corrections
    # of average Hamiltonian theory are of first order in 1 / rate (and the within-period wobble of the
    # pair terms of second order), so the FID approaches pure offset precession
    # S(t) = mean over observed spins of exp(2 pi i nu_k t) with an error falling at least like 1 / rate
    # and at most like 1 / rate^2. Measured here: log-log slope -1.86 (the first-order term is small
    # for this cluster), errors 0.44, 0.14, 0.037, 0.0093 at 100, 200, 400, 800 kHz.
    spins = [("A", "1H", [0.0, 0.0, 0.0], 1.0), ("B", "1H", [1.2, 0.4, 1.0], 3.0),
             ("D", "1H", [0.5, -1.6, 0.8], 2.2)]
    errs = []
    rates = np.array([100e3, 200e3, 400e3, 800e3])
    for rate in rates:
        c, m, eng, ex = _setup(spins, rate=rate, t_max=4e-4, points=33)
        names = [p.name for p in m.parameters]
        nus = [m.values_hz[names.index(f"offset:{x}")] for x in "ABD"]
        t = ex.times_s
        want = np.mean([np.exp(2j * np.pi * nu * t) for nu in nus], axis=0)
        errs.append(np.abs(eng.signal(ex) - want).max())
    slope = np.polyfit(np.log(rates), np.log(errs), 1)[0]
    assert -2.3 < slope < -0.75
    assert np.all(np.diff(errs) < 0)
    assert errs[-1] < 0.02


# ------------------------------------------------------------------ limits and the gradient
@pytest.mark.parametrize("rate", [1e-6, 1e-9, 1e-12])
def test_slow_spinning_limit_is_the_static_engine(rate):
    # Source: the static engine (qhl.exact.engine, a different code path: one eigendecomposition of
    # the time-independent H). At 1e-6 Hz over 0.2 ms the couplings change by < 1e-8 of themselves
    # (2 pi nu t_max times the Fourier coefficients), and S by less (|dS| <= t_max max ||dH||).
    # At 1e-9 Hz a slice (T_R / 8) is 1.25e8 s, and every time used to snap to the slice start
    # t = 0 (S = 1 at every point).
    c, m, eng, ex = _setup(FOUR, rate=rate, t_max=2e-4, points=24)
    static = dataclasses.replace(ex, spinning_hz=0.0)
    assert np.abs(eng.signal(ex) - eng.signal(static)).max() < 1e-8
    _, g = eng.gradient(ex)
    _, g0 = eng.gradient(static)
    assert np.abs(g - g0).max() < 1e-7 * np.abs(g0).max()


@pytest.mark.parametrize("spins,angle", [(FOUR, MAGIC_ANGLE_DEG), (THREE, 65.0)])
def test_gradient_equals_central_differences(spins, angle):
    # common practice: central differences of the engine's own signal (step 1 mHz, truncation error
    # ~ h^2 S''' ~ 1e-12 relative); the derivative is exact for the discretised propagator.
    c, m, eng, ex = _setup(spins, angle=angle, t_max=3.7 / 12500.0, points=12)
    eng.spinning_slices_per_period = 12
    _, g = eng.gradient(ex)
    base = m.all_values_hz()[m.free_indices]
    step = 1e-3
    for k, name in enumerate(m.free):
        up, dn = base.copy(), base.copy()
        up[k] += step
        dn[k] -= step
        fd = (eng.signal(ex, free_values_hz=up) - eng.signal(ex, free_values_hz=dn)) / (2 * step)
        assert np.abs(g[k] - fd).max() < 1e-6 * np.abs(g).max(), name


def test_fourth_order_convergence_and_default_slices():
    # The scheme is fourth order in the slice (Blanes and Moan, Appl. Numer. Math. 56, 1519 (2006)):
    # doubling K divides the error by about 16. The default K stays within 1e-3 of a converged run.
    c, m, eng, ex = _setup(FOUR, rate=12500.0, t_max=5 / 12500.0, points=30)
    t = ex.times_s
    best = spinning_signal(eng, ex, t, slices_per_period=256)
    e8 = np.abs(spinning_signal(eng, ex, t, slices_per_period=8) - best).max()
    e16 = np.abs(spinning_signal(eng, ex, t, slices_per_period=16) - best).max()
    assert 10 < e8 / e16 < 24
    k = default_slices_per_period(eng, ex)
    assert np.abs(spinning_signal(eng, ex, t) - best).max() < 1e-3
    assert k >= 8


# ------------------------------------------------------------------ what works and what is refused
def test_fisher_information_runs_on_spinning():
    # Fisher information from the spinning gradient: symmetric, positive semi-definite.
    c, m, eng, ex = _setup(THREE)
    f = fisher_information(eng, [ex], sigma=1e-3)
    assert f.shape == (len(m.free), len(m.free))
    assert np.allclose(f, f.T)
    assert np.linalg.eigvalsh(f).min() > -1e-9 * np.abs(f).max()


def test_static_only_paths_refuse_spinning():
    c, m, eng, ex = _setup(THREE)
    for call in (lambda: eng.transitions(ex), lambda: eng.spectrum(ex),
                 lambda: powder_lines(c, ex, order=3)):
        with pytest.raises(QhlInputError, match="spins"):
            call()
    with pytest.raises(QhlInputError, match="pulse-sequence steps"):
        eng.signal(dataclasses.replace(ex, steps=(Delay(1e-5),)))


def test_fit_recovers_parameters_from_a_spinning_experiment():
    # common practice: a maximum-likelihood fit of noiseless synthetic data from a perturbed start
    # returns the true parameters (Levenberg-Marquardt on the exact spinning gradient).
    from qhl.exact.likelihood import synthetic_dataset
    from qhl.exact.provider import ExactGradientProvider
    from qhl.learning.fitting import fit

    c, m, eng, ex = _setup(THREE, points=24)
    true = m.all_values_hz()[m.free_indices]
    data = synthetic_dataset(eng, [ex], sigma=1e-9)
    start = true * (1 + 0.003 * np.cos(np.arange(true.size)))
    res = fit(ExactGradientProvider(eng, [ex]), data, start, max_iter=30)
    assert np.abs(res.values_hz - true).max() < 1e-3 * np.abs(true).max()


def test_memory_model_covers_the_measured_peak():
    # common practice: the stated peak-memory model (spinning_memory_bytes) against tracemalloc's peak
    # of a full gradient; measured 14.6 MiB peak against a 16.5 MiB estimate on the six-proton demo.
    import tracemalloc

    from qhl import demo_cluster
    from qhl.exact.spinning_engine import _Spinning, spinning_memory_bytes

    c = demo_cluster()
    eng = ExactEngine(build_model(c))
    ex = dataclasses.replace(c.experiments[0], t_max_s=10 / 20e3, points=64, spinning_hz=20e3)
    _, rows = eng._rows(ex, None, None)
    eng.gradient(ex)
    tracemalloc.start()
    eng.gradient(ex)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    run = _Spinning(eng, ex, ex.times_s, None, None, len(rows))
    est = spinning_memory_bytes([eng._dims[s] for s in run.sectors], run.k, len(rows), ex.points,
                                len(run.need_j), len(run.need_q))
    assert peak < est < 3 * peak


def test_complex_hamiltonian_with_an_rf_term():
    # An RF term about y (complex H, no magnetisation sectors: the engine's general path). Sources:
    # tests/reference_spinning.py (its generators include RF terms; O(slice^2) tolerance as above) and
    # central differences of the engine's own signal (common practice).
    c = _cluster(THREE, points=10)
    m = build_model(c).with_rf_term("13C", 3000.0, axis="y")
    eng = ExactEngine(m)
    ex = c.experiments[0]
    assert not eng.real
    t = ex.times_s
    s = eng.signal(ex)
    assert np.abs(s - dense_spinning_signal(c, m, ex, t, slices_per_period=400)).max() < 1e-4
    _, g = eng.gradient(ex)
    base = m.all_values_hz()[m.free_indices]
    for k, name in enumerate(m.free):
        up, dn = base.copy(), base.copy()
        up[k] += 1e-3
        dn[k] -= 1e-3
        fd = (eng.signal(ex, free_values_hz=up) - eng.signal(ex, free_values_hz=dn)) / 2e-3
        assert np.abs(g[k] - fd).max() < 1e-6 * np.abs(g).max(), name


def _assert_first_and_last_match_differences(m, eng, ex):
    # common practice: the first and last parameters' gradient rows against central differences
    # (step 1e-3 Hz) of the engine's own signal, to 1e-6 of the largest entry
    _, g = eng.gradient(ex)
    base = m.all_values_hz()[m.free_indices]
    for j in (0, len(base) - 1):
        up, dn = base.copy(), base.copy()
        up[j] += 1e-3
        dn[j] -= 1e-3
        fd = (eng.signal(ex, free_values_hz=up) - eng.signal(ex, free_values_hz=dn)) / 2e-3
        assert np.abs(g[j] - fd).max() < 1e-6 * np.abs(g).max()


def test_rotor_synchronised_sampling_needs_no_partial_slices():
    # Rotor-synchronised sampling (common practice): 8 points per period, at a rate where the angle
    # rule asks for 32 slices. The plan puts a boundary on every sampling phase (4 equal slices between
    # neighbours), no time needs a partial slice, and the result still equals a run with unsynchronised
    # slices (K = 61, fourth order) and central differences of its own signal.
    from qhl.exact.spinning_engine import _Spinning

    rate = 13000.0
    c, m, eng, ex = _setup(FOUR, rate=rate, t_max=15 / (8 * rate), points=16)
    k = default_slices_per_period(eng, ex)
    assert k == 32
    assert _Spinning(eng, ex, ex.times_s, None, None, 0).inside.size == 0
    t = ex.times_s
    assert np.abs(eng.signal(ex) - spinning_signal(eng, ex, t, slices_per_period=61)).max() < 1e-4
    _assert_first_and_last_match_differences(m, eng, ex)


def _brute_force_plan_cost(k_rule, phases, counts, partial_cost):
    # every subset of the phases as boundaries (independent of the dynamic programme): each gap cut into
    # ceil(gap k_rule) equal slices, 2 stages a slice, partial_cost for each sampling time left inside
    import itertools

    best = np.inf
    for r in range(len(phases) + 1):
        for chosen in itertools.combinations(range(len(phases)), r):
            cuts = [0.0, *(phases[i] for i in chosen), 1.0]
            slices = sum(max(1, int(np.ceil((b - a) * k_rule - 1e-9))) for a, b in zip(cuts, cuts[1:]))
            left = sum(counts[i] for i in range(len(phases)) if i not in chosen)
            best = min(best, 2 * slices + partial_cost * left)
    return best


@pytest.mark.parametrize("k_rule,phases,counts", [
    (31, np.arange(1, 63) / 63, None), (8, [0.05, 0.1, 0.33, 0.34, 0.9], None),
    (13, np.sort(np.random.default_rng(3).random(9)), None), (5, [0.5], None),
    (7, [0.5], [40]), (9, [0.2, 0.25, 0.6, 0.61], [1, 12, 3, 1])])
def test_slice_plan_is_the_cheapest_and_obeys_the_angle_rule(k_rule, phases, counts):
    # The slice plan (dynamic programme over the sampling phases, weighted by the times at each) against
    # an exhaustive search over all subsets of the phases (common practice: a brute-force check of an
    # optimiser); no slice is longer than 1 / k_rule of the period. The 62-phase case (64 points over
    # exactly 10 periods) is too large to enumerate: there the plan is 32 slices, every other phase a
    # boundary (31 left inside), cheaper than 31 equal slices (62 left inside) or 63 slices (none).
    # (7, [0.5], [40]): forty times at half a period put a boundary there (8 slices, none inside),
    # where one time would not (7 slices and one inside).
    from qhl.exact.spinning_engine import PARTIAL_COST, _slice_fractions

    phases = np.asarray(phases, float)
    weights = np.ones(phases.size) if counts is None else np.asarray(counts, float)
    f = _slice_fractions(k_rule, phases, counts)
    assert f[0] == 0 and f[-1] == 1 and np.all(np.diff(f) > 0)
    assert np.diff(f).max() <= 1 / k_rule + 1e-12
    on = np.isclose(phases[:, None], f[None, :], rtol=0, atol=1e-12).any(axis=1)
    cost = 2 * (f.size - 1) + PARTIAL_COST * weights[~on].sum()
    if phases.size > 12:
        assert f.size - 1 == 32 and np.count_nonzero(on) == 31
        assert cost < min(2 * 31 + PARTIAL_COST * 62, 2 * 63)
    else:
        assert cost <= _brute_force_plan_cost(k_rule, list(phases), list(weights), PARTIAL_COST) + 1e-9
    if counts == [40]:
        assert f.size - 1 == 8 and on.all()


def test_sampling_phases_and_their_counts():
    # common practice: phases are t mod T_R over T_R; times on a period boundary (here t = 0 and
    # t = T_R, the latter up to rounding) have no phase of their own
    from qhl.exact.spinning_engine import _phases

    period = 1 / 12500.0
    t = np.array([0.0, 0.25, 1.25, 2.25, 0.5, 1.0 + 1e-13]) * period
    phases, counts = _phases(t, period)
    assert np.allclose(phases, [0.25, 0.5]) and counts.tolist() == [3, 1]


def test_bad_slice_boundaries_are_refused():
    # common practice: boundaries that do not run from 0 to 1 or do not increase get a one-line error
    c, m, eng, ex = _setup(THREE)
    for bad in ([0.0, 0.5, 0.4, 1.0], [0.1, 1.0], [0.0, 0.5]):
        with pytest.raises(QhlInputError, match="increasing from 0 to 1"):
            spinning_signal(eng, ex, ex.times_s, slices_per_period=np.array(bad))
    with pytest.raises(QhlInputError, match="positive integer"):
        spinning_signal(eng, ex, ex.times_s, slices_per_period=2.5)


def test_slice_plan_falls_back_to_equal_slices_for_many_phases():
    # common practice: beyond MAX_PLANNED_PHASES distinct phases the m x m tables of the plan are not
    # built; the period gets the angle rule's equal slices (every time then has its own partial slice)
    from qhl.exact.spinning_engine import MAX_PLANNED_PHASES, _slice_fractions

    phases = (np.arange(MAX_PLANNED_PHASES + 1) + 0.5) / (MAX_PLANNED_PHASES + 1)
    assert np.allclose(_slice_fractions(31, phases), np.linspace(0, 1, 32))
    planned = _slice_fractions(31, phases[:MAX_PLANNED_PHASES])              # at the limit: planned
    on = np.isclose(phases[:MAX_PLANNED_PHASES, None], planned[None, :], rtol=0, atol=1e-12).any(axis=1)
    assert np.count_nonzero(on) >= 31 and np.diff(planned).max() <= 1 / 31 + 1e-12


def test_planned_slices_match_equal_slices_and_differences():
    # Dense, unsynchronised sampling (68 points over exactly 10 periods, phases k/67, the angle rule
    # asking for 33 slices): the planned unequal slices (34: 2/67 and one 1/67 of the period) give the signal of a fine equal-slice run (K = 256; fourth order, so within the
    # default's error) and a gradient equal to central differences of their own signal (common practice).
    from qhl.exact.spinning_engine import _Spinning

    rate = 12500.0
    c, m, eng, ex = _setup(FOUR, rate=rate, t_max=10 / rate, points=68)
    run = _Spinning(eng, ex, ex.times_s, None, None, 0)
    assert run.k == 34 and np.ptp(np.diff(run.fractions)) > 0.01      # unequal slices
    assert run.inside.size == 33                                      # every other phase on a boundary
    t = ex.times_s
    best = spinning_signal(eng, ex, t, slices_per_period=256)
    assert np.abs(eng.signal(ex) - best).max() < 1e-3
    _assert_first_and_last_match_differences(m, eng, ex)


def test_spinning_hessian_equals_dense_second_differences():
    # Source: tests/reference_spinning.py (dense time-ordered propagation, imports nothing of qhl),
    # second central differences with step 0.5 Hz: truncation ~ (2 pi t step)^2 ~ 1e-6 of |H| at
    # t <= 2e-4 s, rounding ~ 1e-14 / step^2 against |H| ~ (2 pi t)^2 ~ 1e-6, i.e. ~ 1e-7 relative.
    # The engine runs with 64 slices per period (fourth order); the reference's midpoint slices (400
    # per period) then dominate: measured 5.1e-5 of max |H| (1.2e-5 at 800, the O(slice^2) fall), so
    # the tolerance is 2e-4. The engine's Hessian is Richardson differences of its exact gradients
    # (qhl.exact.gradient_differences).
    c, m, eng, ex = _setup(THREE, points=6)
    eng.spinning_slices_per_period = 64
    names = [m.free[0], m.free[-1]]
    sig, grad, hess = eng.hessian(ex, parameters=names)
    t = ex.times_s
    base = m.all_values_hz()[m.free_indices]
    cols = [list(m.free).index(nm) for nm in names]
    step = 0.5
    ref = np.zeros_like(hess)
    for a, i in enumerate(cols):
        for b, j in enumerate(cols):
            acc = 0
            for si, sj, w in ((1, 1, 1), (1, -1, -1), (-1, 1, -1), (-1, -1, 1)):
                v = base.copy()
                v[i] += si * step
                v[j] += sj * step
                acc = acc + w * dense_spinning_signal(c, m, ex, t, v, slices_per_period=400)
            ref[a, b] = acc / (4 * step * step)
    assert np.abs(hess - ref).max() < 2e-4 * np.abs(ref).max()
    np.testing.assert_allclose(hess, hess.transpose(1, 0, 2), atol=0)
