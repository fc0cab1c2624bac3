"""Sector Hamiltonians built from Pauli groups (qhl.exact.sector_operators.sector_matrix) against
qiskit's dense matrices (SparsePauliOp.to_matrix restricted to each magnetisation sector; the
reference imports nothing of qhl) for every evaluation path: the diagonal quadratic form, the
lookup tables over a group's bits, and the term-by-term fallback (long Z strings, groups on more
than TABLE_BITS bits); and the refusals (complex entries, terms that leave a sector)."""

import numpy as np
import pytest
from qiskit.quantum_info import SparsePauliOp

from qhl.base.errors import QhlInputError
from qhl.exact.sector_operators import TABLE_BITS, SectorSpace, pauli_groups, sector_matrix


def _dense_sector(op, states):
    return op.to_matrix()[np.ix_(states, states)]


def _operator(n, rng, extra=()):
    """Offsets, ZZ and flip-flop (XX + YY) couplings with random coefficients, plus `extra` terms."""
    terms = []
    for i in range(n):
        terms.append(("Z", [i], rng.normal() * 300))
        for j in range(i + 1, n):
            c = rng.normal() * 1e3
            terms += [("ZZ", [i, j], c), ("XX", [i, j], -0.5 * c), ("YY", [i, j], -0.5 * c)]
    terms.append(("", [], 17.0))                        # identity: a constant on the diagonal
    terms += list(extra)
    return SparsePauliOp.from_sparse_list(terms, num_qubits=n)


@pytest.mark.parametrize("extra", [
    (),
    (("ZZZ", [0, 2, 5], 40.0),),                                   # diagonal with a 3-qubit Z string
    (("XXZZZ", [1, 3, 0, 2, 4], 25.0), ("YYZZZ", [1, 3, 0, 2, 4], 25.0)),   # 5 bits > TABLE_BITS
    (("XXZ", [0, 4, 2], 11.0), ("YYZ", [0, 4, 2], 11.0)),           # a 3-bit table
])
def test_sector_blocks_equal_qiskit_dense(extra):
    assert TABLE_BITS < 5
    n = 7
    op = _operator(n, np.random.default_rng(len(extra)), extra)
    space = SectorSpace(("1H",) * n)
    groups = pauli_groups(op)
    for k in range(len(space.labels)):
        st = space.states(k)
        ref = _dense_sector(op, st)
        assert np.abs(ref.imag).max() < 1e-9
        mat, lo, hi = sector_matrix(space, k, groups, bounds=True)
        np.testing.assert_allclose(mat.toarray(), ref.real, atol=1e-9)
        assert mat.has_sorted_indices
        e = np.linalg.eigvalsh(ref)
        assert lo <= e[0] + 1e-9 and e[-1] <= hi + 1e-9           # Gershgorin encloses the spectrum
        # no stored zeros beyond what the operator has (entries are the nonzero ones)
        assert mat.nnz == np.count_nonzero(np.abs(ref) > 1e-12)


def test_heteronuclear_sectors_and_single_precision():
    # two isotopes: sectors are products of per-isotope down counts; flip-flops only inside one
    n = 6
    iso = ("1H", "1H", "13C", "1H", "13C", "1H")
    terms = [("Z", [i], 100.0 * (i + 1)) for i in range(n)]
    terms += [("ZZ", [0, 2], 140.0), ("XX", [0, 3], 5.0), ("YY", [0, 3], 5.0), ("ZZ", [0, 3], -10.0),
              ("XX", [2, 4], 3.0), ("YY", [2, 4], 3.0)]
    op = SparsePauliOp.from_sparse_list(terms, num_qubits=n)
    space = SectorSpace(iso)
    for k in range(len(space.labels)):
        st = space.states(k)
        ref = _dense_sector(op, st).real
        mat = sector_matrix(space, k, pauli_groups(op), dtype=np.float32)
        assert mat.dtype == np.float32
        np.testing.assert_allclose(mat.toarray(), ref, atol=1e-4, rtol=1e-6)


def test_terms_leaving_a_sector_and_complex_entries_are_refused():
    n = 4
    space = SectorSpace(("1H",) * n)
    leave = SparsePauliOp.from_sparse_list([("XX", [0, 1], 1.0)], num_qubits=n)      # XX alone: 00 <-> 11
    with pytest.raises(QhlInputError, match="magnetisation sectors"):
        sector_matrix(space, 2, pauli_groups(leave))
    wide = SparsePauliOp.from_sparse_list([("XXZZ", [0, 1, 2, 3], 1.0)], num_qubits=n)
    with pytest.raises(QhlInputError, match="magnetisation sectors"):
        sector_matrix(space, 2, pauli_groups(wide))
    cplx = SparsePauliOp.from_sparse_list([("XY", [0, 1], 1.0)], num_qubits=n)       # i(...) on flips
    with pytest.raises(QhlInputError, match="real Hamiltonian"):
        sector_matrix(space, 2, pauli_groups(cplx))
    # without sectors (one space) the same XX term is fine and equals the dense matrix
    full = SectorSpace(("1H",) * n, conserving=False)
    np.testing.assert_allclose(sector_matrix(full, 0, pauli_groups(leave)).toarray(), leave.to_matrix().real)


def test_blocks_bounds_and_sorting_on_threads_equal_the_serial_build(monkeypatch):
    # the build's blocks (forced small here: many blocks) and the column sort by row parts run on
    # a thread pool; every block writes its own rows, so the CSR arrays and the Gershgorin bounds
    # must equal the serial build's exactly, and both qiskit's dense sector block
    import qhl.exact.chebyshev as cheb
    from concurrent.futures import ThreadPoolExecutor
    from qhl.exact import sector_operators as so
    monkeypatch.setattr(so._BuildPlan, "rows_per_block", lambda self: 7)
    monkeypatch.setattr(cheb, "MIN_PART_ROWS", 5)
    n = 8
    op = _operator(n, np.random.default_rng(11))
    space = SectorSpace(("1H",) * n)
    groups = pauli_groups(op)
    with ThreadPoolExecutor(3) as pool:
        for k in (2, 4):
            st = space.states(k)
            ser, lo_s, hi_s = sector_matrix(space, k, groups, bounds=True, dtype=np.float32)
            par, lo_p, hi_p = sector_matrix(space, k, groups, bounds=True, dtype=np.float32, pool=pool, threads=3)
            assert len(cheb.row_parts(st.size, 3)) == 3
            assert par.has_sorted_indices and np.all(np.diff(par.indices[par.indptr[0]:par.indptr[1]]) > 0)
            for name in ("indptr", "indices", "data"):
                np.testing.assert_array_equal(getattr(par, name), getattr(ser, name))
            assert (lo_p, hi_p) == (lo_s, hi_s)
            np.testing.assert_allclose(par.toarray(), _dense_sector(op, st).real, atol=1e-4 * np.abs(op.coeffs).max())


def test_lanczos_products_on_threads_give_the_same_interval(monkeypatch):
    # row-part products compute every row as the one product does: identical Ritz values
    import qhl.exact.chebyshev as cheb
    from concurrent.futures import ThreadPoolExecutor
    monkeypatch.setattr(cheb, "MIN_PART_ROWS", 5)
    n = 8
    space = SectorSpace(("1H",) * n)
    mat = sector_matrix(space, 4, pauli_groups(_operator(n, np.random.default_rng(5))), dtype=np.float32)
    with ThreadPoolExecutor(2) as pool:
        assert cheb.lanczos_bounds(mat, pool=pool, threads=2) == cheb.lanczos_bounds(mat)
    e = np.linalg.eigvalsh(mat.toarray().astype(float))
    lo, hi = cheb.lanczos_bounds(mat)
    assert lo < e[0] + 0.05 * (e[-1] - e[0]) and hi > e[-1] - 0.05 * (e[-1] - e[0])   # near the true edges
