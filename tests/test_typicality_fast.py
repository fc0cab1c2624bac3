"""Speed options of the typical engine: single precision and row-split threads.

References: the double-precision engine (itself checked against the exact engine and scipy in
test_typicality.py), scipy's expm_multiply for the single-precision Chebyshev propagator, and
the exact engine (qhl.exact.engine, checked against dense expm in test_engine_dense.py) as a
cross-check. All tests are deterministic (fixed seeds).
"""

import numpy as np
import pytest
import scipy.sparse.linalg as spla

from qhl import ExactEngine, Experiment, build_model
from qhl.base.errors import QhlInputError
import qhl.exact.chebyshev as cheb
from qhl.exact.sector_operators import SectorSpace, pauli_groups, sector_matrix
from qhl.exact.typicality import TypicalEngine
from qhl.survey.structure import cut_clusters, demo_structure_path, invented_offsets_hz, read_structure

EXP = Experiment("fid", 1.5e-4, 24, 1.0, 1e-3)


def invented_cluster(n, seed=0):
    """n protons cut from the invented demo structure, invented shifts over 8 ppm at 9.4 T."""
    nuc = read_structure(demo_structure_path(), ("1H",))
    off = invented_offsets_hz(nuc, 8.0, 9.4, seed)
    return cut_clusters(nuc, n, 1, field_tesla=9.4, experiments=(EXP,), offsets_hz=off)[0]


def test_single_precision_chebyshev_matches_scipy_expm_multiply():
    # scipy.sparse.linalg.expm_multiply (Al-Mohy and Higham, SIAM J. Sci. Comput. 33, 488 (2011)):
    # float32 terms carry a relative rounding error of order K eps_32 (K ~ 60 terms here); 1e-5
    # is ~100x the float32 epsilon 6e-8 and ~1e5x below double's agreement (1e-10)
    c = invented_cluster(10)
    m = build_model(c)
    space = SectorSpace(m.isotopes)
    h = 2 * np.pi * m.hamiltonian(EXP)
    k = len(space.labels) // 2
    mat, lo, hi = sector_matrix(space, k, pauli_groups(h), bounds=True, dtype=np.float32)
    ref_mat = sector_matrix(space, k, pauli_groups(h))
    x = np.random.default_rng(1).choice([-1.0, 1.0], size=(mat.shape[0], 2))
    taus = np.linspace(0, 1.5e-4, 6)
    out = cheb.chebyshev_window(lambda y: mat @ y, x, taus, lo, hi, real=True, derivative=False,
                                precision="single")
    assert out.dtype == np.complex64
    ref = spla.expm_multiply(-1j * ref_mat, x.astype(complex), start=0.0, stop=taus[-1], num=taus.size,
                             endpoint=True)
    err = np.abs(out - ref).max() / np.abs(ref).max()
    assert 1e-9 < err < 1e-5                     # single rounding shows, and stays small


def test_single_precision_within_its_error_of_double():
    # the double engine (same seeds, same random vectors): measured max |single - double| 7e-8
    # (10 spins) to 2.5e-8 (18 spins) relative to S(0) = 1, 1e-5 to 2e-6 of the standard error;
    # bound asserted: 1e-6 absolute and 1e-4 of the largest standard error (gradients: 1e-4 of
    # theirs). Cross-check: the single estimate within 6 standard errors of the exact engine
    # (the rule of test_typicality.py: false-failure rate < 0.2 % for 16 replicas).
    c = invented_cluster(12)
    m = build_model(c)
    names = [m.free[0], m.free[-1]]
    ed = TypicalEngine(m, replicas=16, seed=5).estimate(EXP, gradient=True, parameters=names)
    es = TypicalEngine(m, replicas=16, seed=5, precision="single").estimate(EXP, gradient=True,
                                                                             parameters=names)
    se = max(ed.signal_stderr_real.max(), ed.signal_stderr_imag.max())
    diff = np.abs(es.replicas - ed.replicas).max()
    assert diff < 1e-6 and diff < 1e-4 * se
    assert diff > 0                                # it did run in single precision
    gse = max(ed.gradient_stderr_real.max(), ed.gradient_stderr_imag.max())
    assert np.abs(es.gradient_replicas - ed.gradient_replicas).max() < 1e-4 * gse
    s = ExactEngine(m).signal(EXP)
    zr = np.abs(es.signal.real - s.real)[1:] / es.signal_stderr_real[1:]
    zi = np.abs(es.signal.imag - s.imag)[1:] / es.signal_stderr_imag[1:]
    assert max(zr.max(), zi.max()) < 6.0


@pytest.mark.parametrize("start,scheme", [("real", "auto"), ("phase", "auto"), ("real", "pairs")])
def test_threads_give_the_same_estimate(monkeypatch, start, scheme):
    # row-split products, the sector build's blocks, the Lanczos products and the per-time inner
    # products on 3 threads against one thread, same seeds: the same arithmetic on the same rows
    # and times, so equal to 1e-12 (relative to S(0) = 1); a small window forces restarts
    from qhl.exact import sector_operators as so
    monkeypatch.setattr(cheb, "MIN_PART_ROWS", 20)
    monkeypatch.setattr(so._BuildPlan, "rows_per_block", lambda self: 50)
    c = invented_cluster(10)
    m = build_model(c)
    names = [m.free[1], m.free[-2]]
    kw = dict(replicas=3, seed=2, start=start, window_bytes=4e5, scheme=scheme)
    one = TypicalEngine(m, threads=1, **kw).estimate(EXP, gradient=True, parameters=names)
    three = TypicalEngine(m, threads=3, **kw).estimate(EXP, gradient=True, parameters=names)
    assert cheb.row_parts(252, 3) == [(0, 84), (84, 168), (168, 252)]
    assert np.abs(one.replicas - three.replicas).max() < 1e-12
    assert np.abs(one.gradient_replicas - three.gradient_replicas).max() < 1e-12


def test_bad_precision_is_input_error():
    with pytest.raises(QhlInputError, match="precision"):
        TypicalEngine(build_model(invented_cluster(4)), precision="half")


def test_single_precision_memory_model_is_smaller():
    # 4-byte matrix data and vectors: the peak-memory model must fall (not halve: the ladder
    # blocks and index tables stay)
    m = build_model(invented_cluster(12))
    d = TypicalEngine(m, replicas=4).memory_bytes(64)
    s = TypicalEngine(m, replicas=4, precision="single").memory_bytes(64)
    assert 0.4 * d < s < 0.8 * d


def test_window_candidates_start_with_every_point():
    # 1e6 states x 2 columns x 16 bytes x 64 points = 2.048e9 bytes: all points first, then the
    # powers of two below it down to 1 GiB (arithmetic of the rule, written out by hand)
    from qhl.exact.typicality import window_candidates
    assert window_candidates(1e6, 2, 64, 16.0) == [2.048e9, 2.0**30]
    assert window_candidates(1e3, 2, 64, 16.0) == [2.0**30]                 # all points fit in 1 GiB
    assert window_candidates(1e8, 2, 64, 16.0) == [2.0**33, 2.0**32, 2.0**31, 2.0**30]


def test_auto_window_falls_back_when_memory_is_short(monkeypatch):
    # 22 spins (setup only, nothing propagated): with half the free memory below the one-window
    # estimate, the engine must take a smaller window whose estimate fits
    import qhl.exact.typicality as typ
    m = build_model(invented_cluster(22))
    eng = TypicalEngine(m, replicas=2)
    dims = eng.space.dims
    d = max(dims[s] + dims[p] for s, p in eng.blocks)
    cands = typ.window_candidates(d, 2, 64)
    mems = []
    for wb in cands:
        eng.window_bytes = wb
        mems.append(eng.memory_bytes(64, 2, 0))
    assert eng._window(d, 2, 64) < 64 and len(cands) >= 2        # the last candidate splits the points
    monkeypatch.setattr(typ, "available_memory_bytes", lambda: 2.0 * min(mems) * 1.001)
    eng._choose_window_bytes(64, 2, 0)
    assert eng.memory_bytes(64, 2, 0) <= min(mems) * 1.001
    monkeypatch.setattr(typ, "available_memory_bytes", lambda: 2.0 * mems[0] * 1.001)
    eng._choose_window_bytes(64, 2, 0)
    assert eng.window_bytes == cands[0] and eng._window(d, 2, 64) == 64


def test_row_parts_share_the_matrix_and_multiply_like_it():
    # scipy's own product of the whole matrix is the reference; the parts must be views (no
    # second copy of a multi-GiB sector matrix per thread)
    import scipy.sparse as sps
    a = sps.random(3000, 3000, 0.01, format="csr", dtype=np.float32, random_state=1)
    x = np.random.default_rng(0).standard_normal((3000, 2)).astype(np.float32)
    ra = cheb.RowApply(a, cheb.row_parts(3000, 3, min_rows=10))
    assert len(ra.parts) == 3
    for i, (r0, r1) in enumerate(ra.parts):
        assert np.shares_memory(ra.mats[i].data, a.data) and np.shares_memory(ra.mats[i].indices, a.indices)
        assert np.array_equal(ra(np.asfortranarray(x), i), (a @ x)[r0:r1])


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_in_place_products_equal_scipy_and_reuse_their_buffer(dtype):
    # scipy's own `a @ x` is the reference: the in-place kernel call must give the same numbers
    # (same kernel, same order of sums), write into the given buffer and reuse it per part
    import scipy.sparse as sps
    a = sps.random(2000, 2000, 0.02, format="csr", dtype=dtype, random_state=3)
    rng = np.random.default_rng(4)
    ra = cheb.RowApply(a, cheb.row_parts(2000, 2, min_rows=10))
    first = None
    for step in range(3):
        x = np.asfortranarray(rng.standard_normal((2000, 3)).astype(dtype))
        y = ra(x, 1)
        r0, r1 = ra.parts[1]
        assert np.array_equal(y, (a @ x)[r0:r1])
        first = y if first is None else first
        assert y is first                       # the part's buffer, reused
    out = np.full((2000, 2), 7.0, dtype, order="F")
    x = np.asfortranarray(rng.standard_normal((2000, 2)).astype(dtype))
    assert cheb.sparse_times(a, x, out) is out and np.array_equal(out, a @ x)
    # a mismatched buffer or a float64 vector against float32 data still gives scipy's product
    assert np.allclose(cheb.sparse_times(a, x.astype(np.float64), out), a @ x.astype(np.float64))
