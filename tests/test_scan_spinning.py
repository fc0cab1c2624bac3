"""`qhl scan` with a rotor: every task diagnoses the FID of a sample spinning at the magic angle.

References: the rows equal qhl.survey.diagnostics.diagnose at the same rate (whose Floquet levels are checked
against a dense period propagator in tests/test_floquet_diagnostics.py, and whose Fisher information comes
from the exact spinning engine, checked against the dense time-ordered reference in
tests/test_spinning_engine.py). The cluster is invented.
"""

import numpy as np
import pytest

from qhl.base.errors import QhlInputError
from qhl.cli import main
from qhl.survey.diagnostics import diagnose
from qhl.survey.scan import ScanSettings, define_scan, read_results, run_scan

import test_spinning_engine as se


def test_spinning_scan_rows_are_the_floquet_diagnostics(tmp_path):
    c = se._cluster(se.FOUR)
    spinning = ScanSettings(points=24, spinning_hz=12500.0)
    static = ScanSettings(points=24)
    d_spin, d_static = define_scan([c], (0.5, 1.0), spinning), define_scan([c], (0.5, 1.0), static)
    assert not {t.task_id for t in d_spin.tasks} & {t.task_id for t in d_static.tasks}
    assert "spinning_hz=12500.0" in d_spin.describe() and "spinning_hz" not in d_static.describe()
    out = tmp_path / "spin.csv"
    run_scan(d_spin, out, workers=0, progress=False)
    _, rows = read_results(out)
    assert len(rows) == 2
    for row in rows:
        assert row["n_ratios"] > 0
        want = diagnose(c, row["dipolar_scale"], points=24, spinning_hz=12500.0)
        assert row["mean_r"] == pytest.approx(want.mean_r, rel=1e-12)
        assert row["median_crb_hz"] == pytest.approx(want.median_crb_hz, rel=1e-9)
        static_row = diagnose(c, row["dipolar_scale"], points=24)
        assert not np.isclose(row["median_crb_hz"], static_row.median_crb_hz, rtol=1e-6)


def test_bad_rotor_rates_are_refused(tmp_path):
    with pytest.raises(QhlInputError, match="spinning_hz"):
        ScanSettings(spinning_hz=-1.0)
    with pytest.raises(QhlInputError, match="spinning_hz"):
        ScanSettings(spinning_hz=float("nan"))
    with pytest.raises(SystemExit) as e:
        main(["scan", "x.toml", "--dipolar-scale", "1", "--out", str(tmp_path / "o.csv"), "--spinning-hz", "2e6"])
    assert e.value.code == 2


def test_a_pair_at_the_magic_angle_is_refused_before_any_task(tmp_path, capsys):
    # Maricq and Waugh 1979 (P2(cos theta) = 0 at the magic angle, qhl.spins.spinning): such a pair's static
    # coupling cannot carry the rotor modulation; the refusal used to come from a worker after other tasks
    # ran, without the file's name
    good = tmp_path / "good.toml"
    bad = tmp_path / "magic.toml"
    text = ('field_tesla = 9.4\nobserve = "1H"\n[[spin]]\nlabel = "A"\nisotope = "1H"\nposition_angstrom = [0, 0, 0]\n'
            'offset_hz = 10.0\n[[spin]]\nlabel = "B"\nisotope = "1H"\nposition_angstrom = {pos}\noffset_hz = -40.0\n')
    good.write_text(text.format(pos="[1.0, 0.3, 1.2]"))
    bad.write_text(text.format(pos="[1.0, 1.0, 1.0]"))        # along (1, 1, 1): at the magic angle to z
    out = tmp_path / "rows.csv"
    rc = main(["scan", str(good), str(bad), "--dipolar-scale", "0:1:2", "--spinning-hz", "10000",
               "--out", str(out), "--workers", "0"])
    err = capsys.readouterr().err
    assert rc == 2 and err.startswith(f"qhl: error: {bad}: experiment.spinning_hz: ") and "magic angle" in err
    assert not out.exists() and "Traceback" not in err
