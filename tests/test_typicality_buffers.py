"""Reused buffers of the typical engine: the Workspace, unsorted CSR rows,
the inner products by row chunks, and the Chebyshev cut by precision.

References: qiskit's dense operators (SparsePauliOp.to_matrix, a general-purpose library) for the
sector blocks, numpy for the inner products, and the exact engine (qhl.exact.engine, checked
against dense expm in test_engine_dense.py) for the estimates. Deterministic (fixed seeds).
"""

import numpy as np
import pytest
from qiskit.quantum_info import SparsePauliOp

from qhl import ExactEngine, Experiment, build_model
import qhl.exact.typicality as ty
from qhl.exact.chebyshev import Workspace, chebyshev_terms
from qhl.exact.sector_operators import SectorSpace, ladder_block, pauli_groups, sector_matrix
from qhl.exact.typicality import TypicalEngine
from qhl.survey.structure import cut_clusters, demo_structure_path, invented_offsets_hz, read_structure

EXP = Experiment("fid", 1.5e-4, 24, 1.0, 1e-3)


def invented_cluster(n, seed=0):
    """n protons cut from the invented demo structure, invented shifts over 8 ppm at 9.4 T."""
    nuc = read_structure(demo_structure_path(), ("1H",))
    off = invented_offsets_hz(nuc, 8.0, 9.4, seed)
    return cut_clusters(nuc, n, 1, field_tesla=9.4, experiments=(EXP,), offsets_hz=off)[0]


def _flip_flop_operator(n, rng):
    """A random real magnetisation-conserving operator: Z offsets, ZZ and XX + YY pairs."""
    terms = []
    for i in range(n):
        terms.append(("Z", [i], rng.normal()))
        for j in range(i + 1, n):
            b = rng.normal()
            terms += [("ZZ", [i, j], b), ("XX", [i, j], -0.5 * b), ("YY", [i, j], -0.5 * b)]
    return SparsePauliOp.from_sparse_list(terms, n).simplify()


def test_workspace_hands_out_views_of_one_buffer_per_name():
    w = Workspace()
    a = w.take("x", (3, 4), np.float32, zero=True)
    assert a.shape == (3, 4) and a.dtype == np.float32 and a.flags.c_contiguous and not a.any()
    a[:] = 7
    b = w.take("x", (2, 3), np.complex64)              # 48 bytes again: the same memory
    assert np.shares_memory(a, b)
    c = w.take("x", (100, 10), np.float64, zero=True)  # larger: a new buffer, zeroed
    assert not np.shares_memory(a, c) and not c.any()
    d = w.take("y", (100, 10), np.float64)
    assert not np.shares_memory(c, d)
    w.reserve("z", (1000,), np.float64)
    e = w.take("z", (10, 10), np.float64)
    f = w.take("z", (1000,), np.float64)                # reserved: no growth
    assert np.shares_memory(e, f)


def test_unsorted_csr_equals_qiskit_dense_blocks():
    n = 8
    op = _flip_flop_operator(n, np.random.default_rng(3))
    dense = op.to_matrix().real
    space = SectorSpace(("1H",) * n)
    groups = pauli_groups(op)
    for k in (1, 4, 6):
        st = space.states(k)
        ref = dense[np.ix_(st, st)]
        srt = sector_matrix(space, k, groups)
        uns = sector_matrix(space, k, groups, sort=False)
        assert srt.has_sorted_indices and not uns.has_sorted_indices
        for mat in (srt, uns):
            np.testing.assert_allclose(mat.toarray(), ref, atol=1e-12)
        # the same rows hold the same entries, in another order
        np.testing.assert_array_equal(uns.indptr, srt.indptr)
        x = np.random.default_rng(k).standard_normal((st.size, 2))
        np.testing.assert_allclose(uns @ x, ref @ x, atol=1e-10)


def test_chunked_inner_products_equal_numpy(monkeypatch):
    # <out_p[j]| O_ps |out_s[j]> summed by chunks of 5 rows (forced; default 16384) against the
    # whole-vector numpy product with the ladder block as a dense matrix
    monkeypatch.setattr(ty, "ACCUMULATE_ROWS", 5)
    n = 7
    space = SectorSpace(("1H",) * n)
    s, p = 3, 2                                         # O = I+ lowers the down count by one
    lad = ladder_block(space, p, s, range(n), raising=True)
    rng = np.random.default_rng(9)
    R, P, T = 2, 1, 3
    m = R * (1 + P)
    ds, dp = space.dims[s], space.dims[p]
    for cdt in (np.complex64, np.complex128):
        out_s = (rng.standard_normal((T, ds, m)) + 1j * rng.standard_normal((T, ds, m))).astype(cdt)
        out_p = (rng.standard_normal((T, dp, m)) + 1j * rng.standard_normal((T, dp, m))).astype(cdt)
        rep_s = np.zeros((R, T), complex)
        rep_g = np.zeros((R, P, T), complex)
        raise_op = ty._Raise(lad, out_s.real.dtype)
        assert len(raise_op.chunks) == -(-dp // 5)
        for j in range(T):
            TypicalEngine._accumulate(rep_s, rep_g, j, out_p, out_s, raise_op, j, 2.0)
        dense = lad.toarray()
        tol = 1e-5 if cdt == np.complex64 else 1e-12
        for j in range(T):
            a = out_p[j].astype(complex).reshape(dp, 1 + P, R)
            b = (dense @ out_s[j].astype(complex)).reshape(dp, 1 + P, R)
            want = 2.0 * np.einsum("xr,xr->r", a[:, 0].conj(), b[:, 0])
            np.testing.assert_allclose(rep_s[:, j], want, rtol=tol, atol=tol * np.abs(want).max())
            want_g = 2.0 * (np.einsum("xpr,xr->rp", a[:, 1:].conj(), b[:, 0])
                            + np.einsum("xr,xpr->rp", a[:, 0].conj(), b[:, 1:]))
            np.testing.assert_allclose(rep_g[:, :, j], want_g, rtol=tol, atol=tol * np.abs(want_g).max())


def test_engine_with_small_chunks_equals_default_and_the_exact_engine(monkeypatch):
    # the same random vectors with 5-row chunks and with the default chunks: equal to rounding
    # (double); the estimate within 6 standard errors of the exact engine (the rule of
    # test_typicality.py: false-failure rate < 0.2 % for 16 replicas)
    c = invented_cluster(8)
    m = build_model(c)
    ref = TypicalEngine(m, replicas=16, seed=2, threads=1).estimate(EXP)
    monkeypatch.setattr(ty, "ACCUMULATE_ROWS", 5)
    est = TypicalEngine(m, replicas=16, seed=2, threads=1).estimate(EXP)
    np.testing.assert_allclose(est.replicas, ref.replicas, atol=1e-12)
    s = ExactEngine(m).signal(EXP)
    z = np.abs(est.signal.real - s.real)[1:] / est.signal_stderr_real[1:]
    assert z.max() < 6.0


def test_chebyshev_cut_by_precision():
    c = invented_cluster(6)
    m = build_model(c)
    assert TypicalEngine(m).tol == 1e-10
    assert TypicalEngine(m, precision="single").tol == 1e-8
    assert TypicalEngine(m, precision="single", tol=1e-12).tol == 1e-12
    # the looser cut keeps fewer terms: sum_{k > K} |a_k| < tol with a_k = 2 J_k(z); for
    # z = 90, 1e-8 needs fewer terms than 1e-10 (Bessel tails fall faster than geometrically)
    assert chebyshev_terms(90.0, 1e-8, False) < chebyshev_terms(90.0, 1e-10, False)


@pytest.mark.parametrize("derivative,tol", [(True, 1e-10), (False, 1e-8)])
def test_term_count_from_the_transition_window_equals_the_full_sum(derivative, tol):
    # the cut rule's tails summed over every term k = 0..K with scipy's Bessel functions (written out
    # here, independently of the windowed count) give the same K; and w tau ~ 1e9 to 1e13, where the
    # full sum held 1e9+ terms (a classical-cost estimate hung), is answered just above w tau
    from scipy.special import jv

    from qhl.exact.chebyshev import chebyshev_terms
    for z in (0.3, 7.0, 90.0, 1234.5, 20000.0):
        k = np.arange(int(z + 12 * max(z, 1) ** (1 / 3) + 60) + 1)
        a = np.abs(jv(k, z)) * np.where(k == 0, 1.0, 2.0) * ((1 + k ** 2 / z) if derivative else 1.0)
        tail = np.cumsum(a[::-1])[::-1]
        assert chebyshev_terms(z, tol, derivative) == int(np.flatnonzero(tail >= tol)[-1] + 1)
    for z in (1e9, 3e10, 6e12):
        assert z < chebyshev_terms(z, tol, derivative) < z + 60 * z ** (1 / 3)
