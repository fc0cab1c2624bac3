"""Progress lines with an estimated time left (qhl.base.progress) and their use by long commands.

Reference: the linear estimate time_left = elapsed / done * (total - done) (common practice),
checked on hand-computed numbers with a fake clock.
"""

import io

import numpy as np

from qhl.base.progress import Progress, format_seconds, time_left


class Clock:
    def __init__(self):
        self.t = 100.0

    def __call__(self):
        return self.t


def test_time_left_and_formatting():
    assert time_left(20.0, 2, 10) == 80.0
    assert time_left(5.0, 0, 10) == float("inf")
    assert [format_seconds(s) for s in (42, 210, 7200, float("inf"))] == ["42 s", "3.5 min", "2.0 h", "?"]


def test_progress_line_log_mode_rate_limited():
    clock, out = Clock(), io.StringIO()
    p = Progress("job", 10, stream=out, min_interval=10.0, clock=clock)
    clock.t += 20.0
    p.update(2, "a")                         # 20 s for 2 of 10: 80 s left
    clock.t += 1.0
    p.update(3)                              # within 10 s: not shown
    clock.t += 79.0
    p.update(10)                             # the last unit is always shown
    lines = out.getvalue().splitlines()
    assert len(lines) == 2
    assert lines[0] == "job: 2/10 [####................] 20 s elapsed, ~80 s left  a"
    assert lines[1] == "job: 10/10 [####################] 1.7 min elapsed, done"


def test_emulated_provider_reports_each_circuit_family():
    from qhl.spins.cluster import Cluster, Experiment, Spin
    from qhl.spins.model import build_model
    from qhl.emulation.provider import EmulatedGradientProvider
    c = Cluster(9.4, "1H", (Spin("A", "1H", (0, 0, 0), -300.0), Spin("B", "1H", (2.0, 0, 0), 250.0)), (),
                (Experiment("fid", 2e-4, 3, 1.0, 1e-2),), name="pair")
    m = build_model(c, free=["offset:*"])
    prov = EmulatedGradientProvider(m, c.experiments, shots=20, seed=0, steps=1)
    seen = []
    prov.progress = lambda done, total, label: seen.append((done, total))
    prov.signals_and_gradients(m.free_values_hz, {"fid": np.array([0.0, 1e-4, 2e-4])})
    # two non-zero times x (1 signal + 2 gradient families)
    assert seen == [(k, 6) for k in range(1, 7)]


def test_learn_prints_time_per_iteration_and_time_left(capsys):
    from qhl.cli import main
    assert main(["learn", "--free", "offset:*", "--max-iter", "5"]) == 0
    err = capsys.readouterr().err
    assert "per iteration" in err and "left (--max-iter 5)" in err


def test_fraction_progress_is_silent_for_short_work_and_then_shows_time_left():
    # time left = elapsed / done * (total - done) (common practice), on a clock the test drives
    import io
    from qhl.base.progress import FractionProgress
    now = [0.0]
    out = io.StringIO()
    bar = FractionProgress("typical engine", after=2.0, stream=out, clock=lambda: now[0])
    bar(0.1)
    assert out.getvalue() == ""                      # under 2 s: nothing
    now[0] = 3.0
    bar(0.5)
    assert "500/1000" in out.getvalue() and "~3 s left" in out.getvalue()
    now[0] = 6.0
    bar(1.0)
    bar.close()
    assert out.getvalue().rstrip().endswith("done")
