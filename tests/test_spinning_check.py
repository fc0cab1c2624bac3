"""`qhl check` on a spinning experiment: emulated time-dependent circuits against the exact spinning engine.

References: the exact spinning engine is itself checked against the dense time-ordered reference
(tests/test_spinning_engine.py, tests/reference_spinning.py); the compiled family's exact mean is the
density-operator expectation of the circuits (qiskit.quantum_info through circuit_family.exact_expectation).
Statistics: fixed seed; each row's z is ~ N(0, 1) for a noiseless emulation, |z| < 4 per row (false-failure
rate 6e-5 per row, about 6e-4 for the 10 rows). The cluster is invented.
"""

import json

import numpy as np
import pytest

from qhl.base.errors import QhlInputError
from qhl.cli import main
from qhl.emulation.check import check_derivatives

import test_spinning_circuits as spin


@pytest.mark.slow        # ~45 s on two cores: runs in CI's slow pass
def test_check_rows_of_a_spinning_cluster():
    c = spin._cluster(3)
    rep = check_derivatives(c, spin.T, 16, 20000, seed=3, order=2)
    rows = rep.rows
    assert len(rows) == 10 and rep.status == "pass"
    assert all(abs(r["z"]) < 4 for r in rows)
    exact = np.array([r["exact"] for r in rows])
    trot = np.array([r["trotter_exact"] for r in rows])
    # the compiled second-order formula at 16 steps per rotor period against the exact derivative: the
    # Trotter bias is a small share of the largest component (measured 1.3e-3 of it at r = 16)
    assert np.abs(trot - exact).max() < 5e-3 * np.abs(exact).max()


def test_check_cli_on_a_spinning_cluster_and_refusals(capsys, tmp_path):
    path = tmp_path / "rotor.toml"
    path.write_text(spin._text(3))
    rc = main(["check", str(path), "--time", str(spin.T), "--steps", "8", "--shots", "2000", "--json"])
    out = capsys.readouterr()
    assert rc == 0, out.err
    d = json.loads(out.out)
    assert len(d["rows"]) == 10
    for extra in (["--hessian"], ["--target", "line"]):
        rc = main(["check", str(path), "--time", str(spin.T), "--steps", "8", "--shots", "100", *extra])
        err = capsys.readouterr().err
        assert rc == 2 and "spins" in err and "Traceback" not in err
    with pytest.raises(QhlInputError, match="spins"):
        check_derivatives(spin._cluster(3), spin.T, 8, 100, hessian=True)
